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

Each ``*_nb`` kernel has a ``*_reference`` twin written with plain numpy / Python;
tests compare them.
"""

from __future__ import annotations

import numpy as np
from numba import njit

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


@njit(cache=True)
def second_difference_nb(phase, mask, directions):
    """Second-difference measure ``D`` per voxel (inf where none is available).

    ``D**2 = 13/n * sum_d (wrap(p[i-d] - p[i]) - wrap(p[i] - p[i+d]))**2`` over the ``n``
    directions whose two neighbours are inside the grid and the mask.
    """
    nx, ny, nz = phase.shape
    nd = directions.shape[0]
    out = np.empty((nx, ny, nz), dtype=np.float64)
    for i in range(nx):
        for j in range(ny):
            for k in range(nz):
                if not mask[i, j, k]:
                    out[i, j, k] = np.inf
                    continue
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
                    t = _wrap(phase[i0, j0, k0] - p) - _wrap(p - phase[i1, j1, k1])
                    acc += t * t
                    n += 1
                if n == 0:
                    out[i, j, k] = np.inf
                else:
                    out[i, j, k] = np.sqrt(acc * nd / n)
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


@njit(cache=True)
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


@njit(cache=True)
def _edge_count(mask):
    nx, ny, nz = mask.shape
    n = 0
    for i in range(nx):
        for j in range(ny):
            for k in range(nz):
                if not mask[i, j, k]:
                    continue
                if i + 1 < nx and mask[i + 1, j, k]:
                    n += 1
                if j + 1 < ny and mask[i, j + 1, k]:
                    n += 1
                if k + 1 < nz and mask[i, j, k + 1]:
                    n += 1
    return n


@njit(cache=True)
def edges_nb(mask, dvalue, n_keys):
    """Edges between 6-neighbours inside the mask with their quantised cost keys.

    Returns ``(a, b, keys)``: flat C-order voxel indices (``a < b``, int32: callers
    check that the grid has fewer than 2**31 voxels) and uint16 keys (small = reliable;
    ``N_KEYS`` is 65536).  Edge order: voxel ``a`` in C order, then its +axis0, +axis1,
    +axis2 neighbour.
    """
    nx, ny, nz = mask.shape
    n = _edge_count(mask)
    a = np.empty(n, dtype=np.int32)
    b = np.empty(n, dtype=np.int32)
    keys = np.empty(n, dtype=np.uint16)
    e = 0
    for i in range(nx):
        for j in range(ny):
            for k in range(nz):
                if not mask[i, j, k]:
                    continue
                v = (i * ny + j) * nz + k
                da = dvalue[i, j, k]
                if i + 1 < nx and mask[i + 1, j, k]:
                    a[e] = v
                    b[e] = v + ny * nz
                    keys[e] = _edge_key(da, dvalue[i + 1, j, k], n_keys, LOG10_LO, LOG10_HI)
                    e += 1
                if j + 1 < ny and mask[i, j + 1, k]:
                    a[e] = v
                    b[e] = v + nz
                    keys[e] = _edge_key(da, dvalue[i, j + 1, k], n_keys, LOG10_LO, LOG10_HI)
                    e += 1
                if k + 1 < nz and mask[i, j, k + 1]:
                    a[e] = v
                    b[e] = v + 1
                    keys[e] = _edge_key(da, dvalue[i, j, k + 1], n_keys, LOG10_LO, LOG10_HI)
                    e += 1
    return a, b, keys


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


@njit(cache=True)
def prepare_nb(phase, mask):
    """Wrap ``phase`` into [-pi, pi), zero it outside ``mask``; drop non-finite voxels."""
    out = np.empty(phase.shape, dtype=np.float64)
    m = np.empty(phase.shape, dtype=np.bool_)
    pf = phase.ravel()
    mf = mask.ravel()
    of = out.ravel()
    qf = m.ravel()
    for i in range(pf.size):
        p = pf[i]
        ok = mf[i] and np.isfinite(p)
        qf[i] = ok
        of[i] = _wrap(p) if ok else 0.0
    return out, m


def prepare_reference(phase, mask):
    """Plain-numpy twin of :func:`prepare_nb`."""
    phase = np.asarray(phase, dtype=np.float64)
    m = np.asarray(mask, dtype=bool) & np.isfinite(phase)
    return np.where(m, _wrap_np(np.where(m, phase, 0.0)), 0.0), m


@njit(cache=True)
def counting_order_nb(keys, n_keys):
    """Stable ascending order (int32) of integer ``keys`` in ``0..n_keys-1`` (counting sort)."""
    counts = np.zeros(n_keys + 1, dtype=np.int64)
    for i in range(keys.size):
        counts[keys[i] + 1] += 1
    for i in range(n_keys):
        counts[i + 1] += counts[i]
    order = np.empty(keys.size, dtype=np.int32)
    for i in range(keys.size):
        kk = keys[i]
        order[counts[kk]] = i
        counts[kk] += 1
    return order


def counting_order_reference(keys, n_keys=N_KEYS):
    """Plain-numpy twin of :func:`counting_order_nb`."""
    return np.argsort(np.asarray(keys), kind="stable")


# --------------------------------------------------------------------------------------
# merging groups along sorted edges
# --------------------------------------------------------------------------------------
@njit(cache=True)
def _find(node, v):
    """Root of voxel v and v's 2*pi multiple relative to it, with path compression.

    ``node[v, 0]`` is the parent (or ``-size`` at a root), ``node[v, 1]`` the offset to
    the parent: both in one row, so one cache line serves a step up the tree.
    """
    root = v
    total = 0
    while node[root, 0] >= 0:
        total += node[root, 1]
        root = node[root, 0]
    cur = v
    acc = total
    while node[cur, 0] >= 0:
        nxt = node[cur, 0]
        old = node[cur, 1]
        node[cur, 0] = root
        node[cur, 1] = acc
        acc -= old
        cur = nxt
    return root, total


@njit(cache=True)
def merge_nb(phase_flat, a, b, order, n_voxels):
    """Visit edges in ``order`` and merge groups; return the 2*pi multiple per voxel
    (relative to its group root, int32) and the root voxel per voxel (int64).
    ``phase_flat`` is wrapped to [-pi, pi) (as :func:`prepare_nb` leaves it), so each
    edge's step is -1, 0 or 1.

    Union by size with path compression; parent, size and offset share one int32 row
    per voxel, half the memory of separate int64 arrays and one cache line per step.
    Voxels touched by no edge stay their own group with multiple 0. The edges are first
    copied in visiting order with their required step (-1, 0 or 1, int8): the scattered
    reads of edge ends and phases then run as independent loads in one pass, and the
    union-find loop, whose steps depend on each other, reads its edges in sequence
    (twice as fast on a 7 T head, same result).
    """
    n_edges = order.size
    first = np.empty(n_edges, dtype=np.int32)
    second = np.empty(n_edges, dtype=np.int32)
    step = np.empty(n_edges, dtype=np.int8)
    for t in range(n_edges):
        e = order[t]
        va = a[e]
        vb = b[e]
        first[t] = va
        second[t] = vb
        # required k_b - k_a so that the step across the edge equals its wrapped value
        step[t] = -np.int8(np.floor((phase_flat[vb] - phase_flat[va]) / TWO_PI + 0.5))
    node = np.zeros((n_voxels, 2), dtype=np.int32)
    node[:, 0] = -1
    for t in range(n_edges):
        ra, ka = _find(node, first[t])
        rb, kb = _find(node, second[t])
        if ra == rb:
            continue
        rel = np.int64(step[t]) + ka - kb  # k_rb - k_ra
        if node[ra, 0] <= node[rb, 0]:  # ra is the larger group (sizes stored negated)
            node[ra, 0] += node[rb, 0]
            node[rb, 0] = ra
            node[rb, 1] = rel
        else:
            node[rb, 0] += node[ra, 0]
            node[ra, 0] = rb
            node[ra, 1] = -rel
    multiple = np.zeros(n_voxels, dtype=np.int32)
    roots = np.empty(n_voxels, dtype=np.int64)
    for v in range(n_voxels):
        r, kk = _find(node, v)
        multiple[v] = kk
        roots[v] = r
    return multiple, roots


def merge_reference(phase_flat, a, b, order, n_voxels):
    """Pure-Python twin of :func:`merge_nb` in Herraez's original form: explicit group
    member lists; the smaller group is shifted by a multiple of 2*pi and appended to
    the larger one.  Returns ``(multiple, roots)`` where ``roots`` is a group label.

    Multiples may differ from :func:`merge_nb` by one constant per group (the group's
    reference voxel differs); unwrapped differences within a group are identical.
    """
    group = list(range(n_voxels))
    members = {v: [v] for v in range(n_voxels)}
    multiple = [0] * n_voxels
    for e in order:
        va, vb = int(a[e]), int(b[e])
        ga, gb = group[va], group[vb]
        if ga == gb:
            continue
        d = -int(np.floor((phase_flat[vb] - phase_flat[va]) / TWO_PI + 0.5))
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
