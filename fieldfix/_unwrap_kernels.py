"""Numba kernels for 3D quality-guided phase unwrapping, each beside a plain reference.

Private module: the public entry points live in :mod:`fieldfix.unwrap`.

The method follows Herraez et al. 2002 (Applied Optics 41(35):7437, 2D) and its 3D
extension by Abdul-Rahman et al. 2007 (Applied Optics 46(26):6623):

1. every voxel gets a reliability ``1 / D`` where ``D`` is the root sum of squared
   *wrapped second differences* along the 13 directions through the centre of its
   3x3x3 neighbourhood;
2. every edge between 6-connected neighbours gets the sum of its two voxel
   reliabilities;
3. edges are visited from most to least reliable and the two groups they join are
   merged, the second group being shifted by the multiple of 2*pi that makes the
   phase step across the edge equal to its wrapped value.

Step 3 is implemented here as a weighted union-find (each node stores its integer
2*pi offset relative to its parent), which is equivalent to Herraez's linked group
lists but needs no list splicing.  Edge order uses a counting sort of quantised
reliability keys (65536 levels on a fixed logarithmic scale), so sorting is O(edges).
:func:`unwrap_quality_nb` runs the steps in one compiled call (one cache load in a fresh
process) on compact ids of the mask voxels, so the merge touches mask voxels only.

Each ``*_nb`` kernel has a ``*_reference`` twin written with plain numpy / Python;
tests compare them.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from ._kernel import kernel

TWO_PI = 2.0 * np.pi

# The 13 directions through the centre of a 3x3x3 neighbourhood (one of each +/- pair):
# 3 along the axes, 6 in-plane diagonals, 4 space diagonals (Abdul-Rahman et al. 2007).
DIRECTIONS = np.array(
    [
        (1, 0, 0), (0, 1, 0), (0, 0, 1),
        (1, 1, 0), (1, -1, 0), (1, 0, 1), (1, 0, -1), (0, 1, 1), (0, 1, -1),
        (1, 1, 1), (1, 1, -1), (1, -1, 1), (1, -1, -1),
    ],
    dtype=np.int64,
)

N_KEYS = 65536


# --------------------------------------------------------------------------------------
# reliability from wrapped second differences
# --------------------------------------------------------------------------------------
@njit(cache=True, inline="always")
def _wrap(x):
    return x - TWO_PI * np.floor(x / TWO_PI + 0.5)


@njit(cache=True, inline="always")
def _wrap_step(x):
    """``_wrap`` for a difference of two phases in [-pi, pi), i.e. ``x`` in (-2pi, 2pi)."""
    if x >= np.pi:
        return x - TWO_PI
    if x < -np.pi:
        return x + TWO_PI
    return x


@njit(cache=True, inline="always")
def _second_difference_at(phase, mask, i, j, k, directions):
    """``D`` at voxel (i, j, k) inside the mask (inf when no direction is available)."""
    nx, ny, nz = phase.shape
    nd = directions.shape[0]
    p = phase[i, j, k]
    acc = 0.0
    n = 0
    for d in range(nd):
        di = directions[d, 0]
        dj = directions[d, 1]
        dk = directions[d, 2]
        i0 = i - di
        j0 = j - dj
        k0 = k - dk
        i1 = i + di
        j1 = j + dj
        k1 = k + dk
        if i0 < 0 or j0 < 0 or k0 < 0 or i1 < 0 or j1 < 0 or k1 < 0:
            continue
        if i0 >= nx or j0 >= ny or k0 >= nz or i1 >= nx or j1 >= ny or k1 >= nz:
            continue
        if not (mask[i0, j0, k0] and mask[i1, j1, k1]):
            continue
        t = _wrap_step(phase[i0, j0, k0] - p) - _wrap_step(p - phase[i1, j1, k1])
        acc += t * t
        n += 1
    if n == 0:
        return np.inf
    return np.sqrt(acc * nd / n)


@kernel()
def second_difference_nb(phase, mask, directions):
    """Second-difference measure ``D`` per voxel (inf where none is available).

    ``D**2 = 13/n * sum_d (wrap(p[i-d] - p[i]) - wrap(p[i] - p[i+d]))**2`` over the ``n``
    directions whose two neighbours are inside the grid and the mask; ``phase`` is
    wrapped to [-pi, pi) (as :func:`prepare_nb` leaves it).
    """
    nx, ny, nz = phase.shape
    out = np.empty((nx, ny, nz), dtype=np.float64)
    for i in range(nx):
        for j in range(ny):
            for k in range(nz):
                if mask[i, j, k]:
                    out[i, j, k] = _second_difference_at(phase, mask, i, j, k, directions)
                else:
                    out[i, j, k] = np.inf
    return out


def _wrap_np(x):
    return x - TWO_PI * np.floor(x / TWO_PI + 0.5)


def second_difference_reference(phase, mask, directions=DIRECTIONS):
    """Plain-numpy twin of :func:`second_difference_nb` (array shifts instead of loops)."""
    phase = np.asarray(phase, dtype=np.float64)
    mask = np.asarray(mask, dtype=bool)
    pad = 1
    pp = np.pad(phase, pad)
    pm = np.pad(mask, pad)  # padding is outside the mask
    core = (slice(pad, -pad),) * 3
    acc = np.zeros(phase.shape)
    cnt = np.zeros(phase.shape, dtype=np.int64)
    shape = np.array(phase.shape)
    for d in directions:
        minus = tuple(slice(pad - int(d[a]), pad - int(d[a]) + int(shape[a])) for a in range(3))
        plus = tuple(slice(pad + int(d[a]), pad + int(d[a]) + int(shape[a])) for a in range(3))
        ok = pm[minus] & pm[plus] & mask
        t = _wrap_np(pp[minus] - pp[core]) - _wrap_np(pp[core] - pp[plus])
        acc += np.where(ok, t * t, 0.0)
        cnt += ok
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.sqrt(acc * len(directions) / cnt)
    out[(cnt == 0) | ~mask] = np.inf
    return out


# --------------------------------------------------------------------------------------
# edges and their quantised keys
# --------------------------------------------------------------------------------------
# Edge cost = 1 / (1/D[a] + 1/D[b]) (small = reliable), quantised to N_KEYS integer keys on
# a fixed logarithmic scale between 10**LOG10_LO and 10**LOG10_HI radians (about 0.04 %
# relative resolution).  Costs below the range share key 0, above it key N_KEYS - 2;
# edges between two voxels without any second difference get key N_KEYS - 1.
LOG10_LO = -9.0
LOG10_HI = 3.0


@kernel()
def _edge_key(da, db, n_keys, lo, hi):
    ra = 1.0 / da if da > 0 else 1e300
    rb = 1.0 / db if db > 0 else 1e300
    s = ra + rb
    if s <= 0:
        return n_keys - 1
    lc = -np.log10(s)
    if lc <= lo:
        return 0
    if lc >= hi:
        return n_keys - 2
    return min(np.int64((lc - lo) / (hi - lo) * (n_keys - 2)), n_keys - 2)


def quantise_reliability(rel_sum, n_keys=N_KEYS):
    """Plain-numpy key of an edge from its reliability sum ``1/D[a] + 1/D[b]``.

    Same scale and arithmetic as the numba edge kernel (``log10(cost) = -log10(sum)``).
    """
    s = np.asarray(rel_sum, dtype=np.float64)
    with np.errstate(divide="ignore"):
        lc = -np.log10(s)
    raw = np.floor((lc - LOG10_LO) / (LOG10_HI - LOG10_LO) * (n_keys - 2))
    keys = np.minimum(np.where(np.isfinite(raw), raw, 0), n_keys - 2)
    keys = np.where(lc <= LOG10_LO, 0, keys)
    keys = np.where(lc >= LOG10_HI, n_keys - 2, keys)
    keys = np.where(s <= 0, n_keys - 1, keys)
    return keys.astype(np.int64)


def edges_reference(mask, dvalue, n_keys=N_KEYS):
    """Plain-numpy twin of :func:`edges_nb` (same edges, same order, same keys)."""
    mask = np.asarray(mask, dtype=bool)
    shape = mask.shape
    idx = np.arange(mask.size, dtype=np.int64).reshape(shape)
    with np.errstate(divide="ignore"):
        rel = np.where(dvalue > 0, 1.0 / np.where(dvalue > 0, dvalue, 1.0), 1e300)
    parts_a, parts_b, parts_c, parts_axis = [], [], [], []
    for axis in range(3):
        lo = [slice(None)] * 3
        hi = [slice(None)] * 3
        lo[axis] = slice(0, -1)
        hi[axis] = slice(1, None)
        lo, hi = tuple(lo), tuple(hi)
        ok = mask[lo] & mask[hi]
        c = rel[lo][ok] + rel[hi][ok]
        parts_a.append(idx[lo][ok])
        parts_b.append(idx[hi][ok])
        parts_c.append(c)
        parts_axis.append(np.full(c.size, axis))
    a = np.concatenate(parts_a)
    b = np.concatenate(parts_b)
    c = np.concatenate(parts_c)
    ax = np.concatenate(parts_axis)
    order = np.lexsort((ax, a))  # by voxel a, then axis
    return a[order], b[order], quantise_reliability(c[order], n_keys)


@kernel()
def prepare_nb(phase, mask, keep_outside=False):
    """Wrap ``phase`` into [-pi, pi) and drop non-finite voxels from ``mask``.

    Outside the mask the phase is set to 0, or with ``keep_outside`` wrapped as well
    (non-finite values become NaN, as :func:`fieldfix.unwrap.wrap_phase` makes them).
    """
    out = np.empty(phase.shape, dtype=np.float64)
    m = np.empty(phase.shape, dtype=np.bool_)
    pf = phase.ravel()
    mf = mask.ravel()
    of = out.ravel()
    qf = m.ravel()
    for i in range(pf.size):
        p = np.float64(pf[i])
        ok = mf[i] and np.isfinite(p)
        qf[i] = ok
        of[i] = _wrap(p) if ok or keep_outside else 0.0
    return out, m


def prepare_reference(phase, mask, keep_outside=False):
    """Plain-numpy twin of :func:`prepare_nb`."""
    phase = np.asarray(phase, dtype=np.float64)
    m = np.asarray(mask, dtype=bool) & np.isfinite(phase)
    with np.errstate(invalid="ignore"):
        rest = _wrap_np(phase) if keep_outside else 0.0
        return np.where(m, _wrap_np(np.where(m, phase, 0.0)), rest), m


@kernel()
def voxel_ids_nb(mask):
    """Compact id of every mask voxel in C order (int32; -1 outside) and their number."""
    mf = mask.ravel()
    ids = np.empty(mf.size, dtype=np.int32)
    n = 0
    for v in range(mf.size):
        if mf[v]:
            ids[v] = n
            n += 1
        else:
            ids[v] = -1
    return ids.reshape(mask.shape), n


def voxel_ids_reference(mask):
    """Plain-numpy twin of :func:`voxel_ids_nb`."""
    m = np.asarray(mask, dtype=bool)
    ids = np.where(m.ravel(), np.cumsum(m.ravel()) - 1, -1).reshape(m.shape)
    return ids, int(m.sum())


@kernel()
def second_difference_compact_nb(phase, mask, ids, n, directions):
    """``D`` of the mask voxels only, indexed by their compact id (see :func:`voxel_ids_nb`)."""
    nx, ny, nz = phase.shape
    out = np.empty(n, dtype=np.float64)
    for i in range(nx):
        for j in range(ny):
            for k in range(nz):
                if mask[i, j, k]:
                    out[ids[i, j, k]] = _second_difference_at(phase, mask, i, j, k, directions)
    return out


@njit(cache=True, inline="always")
def _step(pa, pb):
    """Required ``k_b - k_a`` so that the step from a to b equals its wrapped value
    (phases in [-pi, pi), so the difference lies in (-2pi, 2pi))."""
    d = pb - pa
    if d >= np.pi:
        return np.int8(-1)
    if d < -np.pi:
        return np.int8(1)
    return np.int8(0)


@njit(cache=True, inline="always")
def _edge_pass(phase, mask, ids, dvalue, keys, counts, edges, scatter):
    """One walk over the edges of :func:`sorted_edges_nb` in their listing order; returns how
    many there are. Without `scatter`, each edge's key goes to `keys` and is counted in
    ``counts[key + 1]``; with it, each edge is scattered to ``edges[counts[key]]`` (`counts`
    holding each key's next free row). Inlined with a constant `scatter`, so each call site
    compiles to its own loop."""
    nx, ny, nz = mask.shape
    n_keys = counts.shape[0] - 1
    e = 0
    for i in range(nx):
        for j in range(ny):
            for k in range(nz):
                if not mask[i, j, k]:
                    continue
                for ax in range(3):
                    i1, j1, k1 = i + (ax == 0), j + (ax == 1), k + (ax == 2)
                    if i1 >= nx or j1 >= ny or k1 >= nz or not mask[i1, j1, k1]:
                        continue
                    if scatter:
                        kk = keys[e]
                        pos = counts[kk]
                        counts[kk] = pos + 1
                        edges[pos, 0] = ids[i, j, k]
                        edges[pos, 1] = 4 * ids[i1, j1, k1] + _step(phase[i, j, k], phase[i1, j1, k1]) + 1
                    else:
                        kk = _edge_key(dvalue[ids[i, j, k]], dvalue[ids[i1, j1, k1]], n_keys, LOG10_LO, LOG10_HI)
                        keys[e] = kk
                        counts[kk + 1] += 1
                    e += 1
    return e


@kernel()
def sorted_edges_nb(phase, mask, ids, dvalue, n_keys):
    """Edges between 6-neighbours inside the mask, sorted from most to least reliable.

    Returns one int32 row per edge: the compact id of its first end and
    ``4 * second + step + 1``, the compact id of its second end (``first < second``)
    packed with the required step of 2*pi multiples (-1/0/1; callers keep the mask under
    2**29 voxels); one row is one write in the scatter and one read in the merge.  Keys: ``_edge_key`` of
    ``dvalue`` (indexed by compact id).  The order is a stable counting sort of the keys
    of edges listed by voxel ``a`` in C order, then its +axis0, +axis1, +axis2 neighbour;
    the second pass scatters each edge straight to its sorted place.
    """
    keys = np.empty(3 * dvalue.shape[0], dtype=np.uint16)  # at most three edges per mask voxel
    counts = np.zeros(n_keys + 1, dtype=np.int64)
    n_edges = _edge_pass(phase, mask, ids, dvalue, keys, counts, np.empty((0, 2), dtype=np.int32), False)
    for t in range(n_keys):
        counts[t + 1] += counts[t]
    edges = np.empty((n_edges, 2), dtype=np.int32)
    _edge_pass(phase, mask, ids, dvalue, keys, counts, edges, True)
    return edges


def sorted_edges_reference(phase, mask, dvalue, n_keys=N_KEYS):
    """Plain-numpy twin of :func:`sorted_edges_nb`; ``dvalue`` is the full grid here."""
    ids, _ = voxel_ids_reference(mask)
    a, b, keys = edges_reference(mask, dvalue, n_keys)
    order = np.argsort(keys, kind="stable")
    a, b = a[order], b[order]
    flat = np.asarray(phase, dtype=np.float64).ravel()
    step = -np.floor((flat[b] - flat[a]) / TWO_PI + 0.5).astype(np.int64)
    return np.column_stack([ids.ravel()[a], 4 * ids.ravel()[b] + step + 1]).astype(np.int32)


def unpack_edges(edges):
    """``(first, second, step)`` of the packed edge rows of :func:`sorted_edges_nb`."""
    first = edges[:, 0].astype(np.int64)
    return first, edges[:, 1] >> 2, (edges[:, 1] & 3).astype(np.int64) - 1


# --------------------------------------------------------------------------------------
# merging groups along sorted edges
# --------------------------------------------------------------------------------------
@njit(cache=True, inline="always")
def _find(node, v):
    """Root of voxel v and v's 2*pi multiple relative to it, with path halving.

    ``node[v, 0]`` is the parent (or ``-size`` at a root), ``node[v, 1]`` the offset to
    the parent: both in one row, so one cache line serves a step up the tree.  Each
    visited node is re-linked to its grandparent (its offset becomes the sum of the two
    offsets): one pass up the tree instead of a second compressing pass.
    """
    total = 0
    while True:
        p = node[v, 0]
        if p < 0:
            return v, total
        gp = node[p, 0]
        if gp < 0:
            return p, total + node[v, 1]
        off = node[v, 1] + node[p, 1]
        node[v, 0] = gp
        node[v, 1] = off
        total += off
        v = gp


@kernel()
def merge_nb(edges, n_nodes):
    """Visit the sorted, packed edges of :func:`sorted_edges_nb` in turn and merge groups.

    Each row holds the first end and ``4 * second + step + 1``; ``step`` (-1, 0 or 1) is
    the required difference of 2*pi multiples, second minus first.  Returns the multiple of every node relative to its group root (int32) and
    the root of every node (int32).  Union by size with path compression; parent (or
    ``-size`` at a root) and offset share one int32 row per node, so one cache line
    serves a step up the tree.  Nodes touched by no edge stay their own group with
    multiple 0.
    """
    node = np.empty((n_nodes, 2), dtype=np.int32)
    node[:, 0] = -1
    node[:, 1] = 0
    for t in range(edges.shape[0]):
        ra, ka = _find(node, edges[t, 0])
        packed = edges[t, 1]
        rb, kb = _find(node, packed >> 2)
        if ra == rb:
            continue
        rel = np.int64(packed & 3) - 1 + ka - kb  # k_rb - k_ra
        if node[ra, 0] <= node[rb, 0]:  # ra is the larger group (sizes stored negated)
            node[ra, 0] += node[rb, 0]
            node[rb, 0] = ra
            node[rb, 1] = rel
        else:
            node[rb, 0] += node[ra, 0]
            node[ra, 0] = rb
            node[ra, 1] = -rel
    multiple = np.empty(n_nodes, dtype=np.int32)
    roots = np.empty(n_nodes, dtype=np.int32)
    for v in range(n_nodes):
        r, kk = _find(node, v)
        multiple[v] = kk
        roots[v] = r
    return multiple, roots


def merge_reference(first, second, step, n_nodes):
    """Pure-Python twin of :func:`merge_nb` in Herraez's original form: explicit group
    member lists; the smaller group is shifted by a multiple of 2*pi and appended to
    the larger one.  Returns ``(multiple, groups)`` where ``groups`` is a group label.

    Multiples may differ from :func:`merge_nb` by one constant per group (the group's
    reference voxel differs); unwrapped differences within a group are identical.
    """
    group = list(range(n_nodes))
    members = {v: [v] for v in range(n_nodes)}
    multiple = [0] * n_nodes
    for va, vb, d in zip(first.tolist(), second.tolist(), step.tolist()):
        ga, gb = group[va], group[vb]
        if ga == gb:
            continue
        shift = d + multiple[va] - multiple[vb]  # add to every member of b's group
        if len(members[ga]) >= len(members[gb]):
            for v in members[gb]:
                multiple[v] += shift
                group[v] = ga
            members[ga].extend(members.pop(gb))
        else:
            for v in members[ga]:
                multiple[v] -= shift
                group[v] = gb
            members[gb].extend(members.pop(ga))
    return np.array(multiple, dtype=np.int64), np.array(group, dtype=np.int64)


# --------------------------------------------------------------------------------------
# the whole quality-guided unwrap in one compiled call
# --------------------------------------------------------------------------------------
@kernel()
def unwrap_quality_nb(phase, mask, directions, n_keys):
    """Prepare, rank edges and merge; one call, so a fresh process loads one cached kernel.

    Returns ``(wrapped, inside, multiple, n_regions)``: the phase and mask of
    :func:`prepare_nb` (``keep_outside``: the phase is wrapped everywhere), the 2*pi multiple of every voxel relative to its group root
    (int32, 0 outside the mask) and the number of groups (6-connected regions).
    """
    wrapped, inside = prepare_nb(phase, mask, True)
    ids, n = voxel_ids_nb(inside)
    dvalue = second_difference_compact_nb(wrapped, inside, ids, n, directions)
    edges = sorted_edges_nb(wrapped, inside, ids, dvalue, n_keys)
    multiple_c, roots = merge_nb(edges, n)
    multiple = np.zeros(wrapped.shape, dtype=np.int32)
    mf = multiple.ravel()
    idf = ids.ravel()
    for v in range(idf.size):
        c = idf[v]
        if c >= 0:
            mf[v] = multiple_c[c]
    n_regions = 0
    for c in range(n):
        if roots[c] == c:
            n_regions += 1
    return wrapped, inside, multiple, n_regions


@kernel()
def apply_multiple_nb(wrapped, inside, multiple, shift):
    """In place: ``multiple -= shift`` and ``wrapped += 2*pi*multiple`` inside the mask.

    Returns the number of mask voxels whose multiple is not zero afterwards.
    """
    wf = wrapped.ravel()
    mf = multiple.ravel()
    qf = inside.ravel()
    n_changed = 0
    for v in range(wf.size):
        if qf[v]:
            k = mf[v] - shift
            mf[v] = k
            if k != 0:
                n_changed += 1
                wf[v] += TWO_PI * k
    return n_changed


def apply_multiple_reference(wrapped, inside, multiple, shift):
    """Plain-numpy twin of :func:`apply_multiple_nb` (returns new arrays and the count)."""
    k = np.where(inside, multiple - shift, multiple)
    return np.where(inside, wrapped + TWO_PI * k, wrapped), k, int(np.count_nonzero(k[inside]))
