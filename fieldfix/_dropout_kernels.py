"""Numba kernels for protocol sweeps of retention / BOLD sensitivity, with a plain-numpy reference.

Both evaluate, for every protocol and every voxel of a brain mask, the signal metric of
:mod:`fieldfix.dropout` and reduce it to four numbers: ROI median, ROI percentage under
a threshold, brain median, brain percentage under the threshold.

Inputs (shared by the kernel and the reference)
------------------------------------------------
grad : (3, n_vox) float64
    World gradient of the B0 map at each voxel (Hz/mm).
dirs : (n_tilts, 3, 3) float64
    Per tilt, rows: the slice normal (unit), the PE voxel step and the readout voxel step
    (mm). Their products with `grad` give the gradient along the normal (Hz/mm) and the
    field change per PE and per readout voxel step (Hz).
roi : (n_vox,) bool
    ROI membership of each brain voxel.
tilt_index, pe_sign : (n_protocols,) int64
te_s, thickness_mm, zshim_cpmm : (n_protocols,) float64
mode : int
    0: through-plane retention at the nominal TE; 1: BOLD sensitivity.
t_pe_s : float
    ``pe_lines * echo_spacing_s``.
before_s, after_s : float
    Acquisition window around TE: ``[TE - before_s, TE + after_s]``.
table, step, tail_sinc
    Retention table of the slice profile (see :class:`fieldfix.dropout.SliceProfile`).
analytic : {None, 'rect', 'gaussian'}
    Numba only: evaluate the profile's closed form (the rectangular profile's sinc law, or
    the Gaussian profile's exp(-pi^2 u^2 / (4 ln 2)), zero past the table as the table
    gives) with vectorised arithmetic, within 1e-11, instead of interpolating the table
    (within about 4e-7).
threshold : float

Output: (n_protocols, 4) float64 array.
"""

from __future__ import annotations

import math

import numba
import numpy as np

from ._kernel import kernel
from ._select_kernels import median_of, middle_of, select_kth

__all__ = ["sweep_stats", "sweep_stats_reference", "protocol_values_reference", "project_gradient",
           "gradient_rows"]


@numba.njit(cache=True, inline="always")
def _lookup(x, table, tail_sinc, step):
    """Linear interpolation of `table` at x table steps (x = u / step); tail beyond it."""
    n = table.shape[0]
    if x < n - 1:
        i = int(x)
        f = x - i
        return table[i] + f * (table[i + 1] - table[i])
    if tail_sinc:
        pu = np.pi * x * step
        return abs(np.sin(pu)) / pu
    return 0.0


# Exact brain medians without sorting every protocol's values (Floyd & Rivest 1975, Commun. ACM 18:165,
# "Algorithm 489"): the metric is first evaluated on every `stride`-th voxel; two order statistics of this
# sample bracket the median with high probability. The pass over all voxels then counts the values
# below and inside the bracket and appends those inside to a candidate list, and the median is selected
# among the candidates. When the counts show that the bracket missed, the median is selected over all
# values evaluated again, so the result is exact either way.
_SAMPLE_SIZE = 4096
_BRACKET_SIGMAS = 3.0
_CHUNK = 2048  # voxels per chunk: the chunk's terms and values stay in the L1 cache
_GAUSS_RATE = np.pi**2 / (4.0 * np.log(2.0))  # Gaussian slab of FWHM = thickness: R = exp(-rate u^2)
# Taylor series of sin(pi t)/(pi t) in t**2 (terms 1..7; |t| <= 1/2 here) and of exp(y) (terms 3..13)
_SIN_PI_COEFFS = tuple((-1.0) ** k * math.pi ** (2 * k) / math.factorial(2 * k + 1) for k in range(1, 8))
_EXP_COEFFS = tuple(1.0 / math.factorial(k) for k in range(3, 14))
_ANALYTIC = {None: 0, "rect": 1, "gaussian": 2}
CLOSED_FORMS = ("rect", "gaussian")  #: slice profiles the kernel can evaluate in closed form


def sample_stride(n_vox: int) -> int:
    """Voxel stride of the sample that brackets the brain median (1 for small masks)."""
    return max(1, n_vox // _SAMPLE_SIZE)


@kernel(error_model="numpy")
def _terms(start, stop, stride, gn, gro, inv, te, zs, lo, hi, mode, wv, fv):
    """For voxels start, start+stride, ... < stop: wv = |through-plane cycles per mm of thickness|,
    fv = TE ratio (1 for mode 0), 0 where no echo is acquired."""
    j = 0
    for v in range(start, stop, stride):
        if mode == 0:
            wv[j] = abs(gn[v] * te + zs)
            fv[j] = 1.0
        else:
            iv = inv[v]
            ok = (iv > 0.0) & (iv >= lo) & (iv <= hi) & (abs(gro[v] * te * iv) <= 0.5)
            wv[j] = abs(gn[v] * te * iv + zs) if ok else 0.0
            fv[j] = iv if ok else 0.0
        j += 1
    return j


# fastmath "contract" only lets LLVM fuse a * b + c into one FMA (one rounding instead of two):
# no reassociation, no assumptions about NaN or infinity.
@kernel(error_model="numpy", fastmath={"contract"})
def _evaluate(wv, fv, n, thick, analytic, table, step, tail_sinc, vals):
    """vals[:n] = R(wv * thick) * fv: a closed form (analytic 1: rect, 2: Gaussian) or the table."""
    if analytic == 1:  # |sin(pi u)| / (pi u) from the argument reduced to [-1/2, 1/2]: vectorises
        c1, c2, c3, c4, c5, c6, c7 = _SIN_PI_COEFFS
        for v in range(n):
            u = wv[v] * thick
            t = u - np.floor(u + 0.5)  # sin(pi u) = +-sin(pi t)
            t2 = t * t
            s = 1.0 + t2 * (c1 + t2 * (c2 + t2 * (c3 + t2 * (c4 + t2 * (c5 + t2 * (c6 + t2 * c7))))))
            far = abs(t * s) / max(u, 0.5)  # |sin(pi t)| / (pi u), with s = sin(pi t) / (pi t)
            vals[v] = (s if u < 0.5 else far) * fv[v]  # below 1/2 cycle the reduction is the identity
        return
    if analytic == 2:  # exp(-a u^2) as (Taylor series of exp(-a u^2 / 256)) ** 256: vectorises
        u_max = (table.shape[0] - 1) * step
        c3, c4, c5, c6, c7, c8, c9, c10, c11, c12, c13 = _EXP_COEFFS
        for v in range(n):
            u = wv[v] * thick
            inside = u < u_max
            y = -_GAUSS_RATE / 256.0 * (u * u if inside else 0.0)  # |y| <= 1/2 for u_max = 6
            y2 = y * y  # sum y^k / k!, k <= 13, in Estrin's scheme (short dependency chains)
            y4 = y2 * y2
            e = (((1.0 + y) + (0.5 + c3 * y) * y2) + ((c4 + c5 * y) + (c6 + c7 * y) * y2) * y4) + (
                ((c8 + c9 * y) + (c10 + c11 * y) * y2) + (c12 + c13 * y) * y4) * (y4 * y4)
            e = e * e
            e = e * e
            e = e * e
            e = e * e
            e = e * e
            e = e * e
            e = e * e
            e = e * e  # ** 256
            vals[v] = (e if inside else 0.0) * fv[v]
        return
    inv_step = 1.0 / step
    lim = table.shape[0] - 1.0
    n_past = 0
    for v in range(n):  # branch-free body; the arguments past the table are fixed up after
        x = wv[v] * thick * inv_step
        past = x >= lim
        xc = 0.0 if past else x
        i = int(xc)
        fr = xc - i
        vals[v] = (table[i] + fr * (table[i + 1] - table[i])) * fv[v]
        n_past += past
    if n_past:
        for v in range(n):
            x = wv[v] * thick * inv_step
            if x >= lim:
                vals[v] = _lookup(x, table, tail_sinc, step) * fv[v]


@kernel()
def _count(vals, n, threshold, b_lo, b_hi):
    """Counts over vals[:n]: under the threshold, under the bracket, inside the bracket."""
    below = 0
    under = 0
    inside = 0
    for v in range(n):
        x = vals[v]
        below += x < threshold
        under += x < b_lo
        inside += (x >= b_lo) & (x <= b_hi)
    return below, under, inside


@kernel()
def _append_inside(vals, n, b_lo, b_hi, out, c):
    """Append the values of vals[:n] inside [b_lo, b_hi] to out[c:]; return the new length."""
    for v in range(n):  # branch-free: always store, advance only for an inside value
        x = vals[v]
        out[c] = x
        c += (x >= b_lo) & (x <= b_hi)
    return c


@kernel(error_model="numpy")
def _project(grad, dirs_t, signed_t_pe_s, gn, gro, inv):
    """Gradient along the normal and per readout step, and the echo-time factor 1 / (1 + s g_pe T_pe)."""
    n0, n1, n2 = dirs_t[0, 0], dirs_t[0, 1], dirs_t[0, 2]
    p0, p1, p2 = dirs_t[1, 0], dirs_t[1, 1], dirs_t[1, 2]
    r0, r1, r2 = dirs_t[2, 0], dirs_t[2, 1], dirs_t[2, 2]
    for v in range(grad.shape[1]):
        x, y, z = grad[0, v], grad[1, v], grad[2, v]
        gn[v] = n0 * x + n1 * y + n2 * z
        gro[v] = r0 * x + r1 * y + r2 * z
        d = 1.0 + signed_t_pe_s * (p0 * x + p1 * y + p2 * z)
        inv[v] = 1.0 / d if d > 0.0 else -1.0  # -1 flags "no echo forms"


@numba.njit(cache=True, inline="always")
def _index_difference(flat, i, stride, index, n):
    """numpy.gradient's difference along one voxel axis: central inside, one-sided at the edges."""
    if n == 1:
        return 0.0
    up = index < n - 1
    down = index > 0
    return (flat[i + stride * up] - flat[i - stride * down]) / (1.0 * up + down)


@kernel()
def gradient_rows(field, at, inverse_transpose):
    """(3, N) world gradient of a 3D map at flat (C-order) indices `at`, one row per world axis.

    The same differences and chain rule, in the same order of operations, as
    :func:`fieldfix.geometry.world_gradient` with `at` (its plain-numpy twin): equal to the last bit.
    """
    nx, ny, nz = field.shape
    flat = field.ravel()
    out = np.empty((3, at.shape[0]))
    for v in range(at.shape[0]):
        i = at[v]
        d2 = _index_difference(flat, i, 1, i % nz, nz)
        d1 = _index_difference(flat, i, nz, i // nz % ny, ny)
        d0 = _index_difference(flat, i, ny * nz, i // (ny * nz), nx)
        for r in range(3):
            out[r, v] = (inverse_transpose[r, 0] * d0 + inverse_transpose[r, 1] * d1) + inverse_transpose[r, 2] * d2
    return out


@kernel(parallel=True)
def _sweep_grouped(grad, dirs, n_roi, group_block, block_start, block_tilt, block_sign, te_s, thickness_mm,
                   zshim_cpmm, mode, t_pe_s, before_s, after_s, analytic, table, step, tail_sinc, threshold,
                   stride, half_width, out, misses):
    # Protocols are sorted so that a block shares (tilt, polarity, TE, z-shim) and differs only
    # in thickness; a group is a run of blocks with the same (tilt, polarity). One thread takes
    # a whole group: the projections of the gradient and the echo-time factor are computed once
    # per group, the thickness-free terms once per block and chunk of voxels, and each protocol
    # is one pass over the chunk.
    n_vox = grad.shape[1]
    n_groups = group_block.shape[0] - 1
    n_samp = (n_vox + stride - 1) // stride
    k_hi = n_vox // 2  # ranks of the median's two middle values (equal for odd counts)
    k_lo = (n_vox - 1) // 2
    r_lo = max(int(k_lo / max(n_vox - 1, 1) * (n_samp - 1)) - half_width, -1)
    r_hi = min(int(k_hi / max(n_vox - 1, 1) * (n_samp - 1)) + 1 + half_width, n_samp)
    for g in numba.prange(n_groups):
        t = block_tilt[group_block[g]]
        sign = block_sign[group_block[g]]
        gn = np.empty(n_vox)
        gro = np.empty(n_vox)
        inv = np.empty(n_vox)
        _project(grad, dirs[t], sign * t_pe_s, gn, gro, inv)
        n_max = 1  # protocols in the group's largest block
        for blk in range(group_block[g], group_block[g + 1]):
            n_max = max(n_max, block_start[blk + 1] - block_start[blk])
        cand = np.empty((n_max, n_vox + 1))
        n_cand = np.empty(n_max, np.int64)
        n_under = np.empty(n_max, np.int64)
        below = np.empty(n_max, np.int64)
        b_lo = np.empty(n_max)
        b_hi = np.empty(n_max)
        size = max(_CHUNK, n_samp, n_roi)
        wv = np.empty(size)
        fv = np.empty(size)
        vals = np.empty(size)
        for blk in range(group_block[g], group_block[g + 1]):
            p0 = block_start[blk]
            nb = block_start[blk + 1] - p0
            te = te_s[p0]
            zs = zshim_cpmm[p0]
            lo = 1.0 - before_s / te
            hi = 1.0 + after_s / te
            # 1. the ROI (its voxels come first) and the sample that brackets each brain median
            _terms(0, n_roi, 1, gn, gro, inv, te, zs, lo, hi, mode, wv, fv)
            for q in range(nb):
                p = p0 + q
                _evaluate(wv, fv, n_roi, thickness_mm[p], analytic, table, step, tail_sinc, vals)
                out[p, 1] = 100.0 * _count(vals, n_roi, threshold, 0.0, 0.0)[0] / n_roi if n_roi > 0 else np.nan
                out[p, 0] = median_of(vals, n_roi)
            _terms(0, n_vox, stride, gn, gro, inv, te, zs, lo, hi, mode, wv, fv)
            for q in range(nb):
                _evaluate(wv, fv, n_samp, thickness_mm[p0 + q], analytic, table, step, tail_sinc, vals)
                b_hi[q] = select_kth(vals, n_samp, r_hi) if r_hi < n_samp else np.inf
                b_lo[q] = select_kth(vals, min(r_hi, n_samp), r_lo) if r_lo >= 0 else -np.inf
                n_cand[q] = 0
                n_under[q] = 0
                below[q] = 0
            # 2. all voxels, a chunk at a time
            for c0 in range(0, n_vox, _CHUNK):
                m = _terms(c0, min(c0 + _CHUNK, n_vox), 1, gn, gro, inv, te, zs, lo, hi, mode, wv, fv)
                for q in range(nb):
                    _evaluate(wv, fv, m, thickness_mm[p0 + q], analytic, table, step, tail_sinc, vals)
                    n_b, n_u, n_in = _count(vals, m, threshold, b_lo[q], b_hi[q])
                    below[q] += n_b
                    n_under[q] += n_u
                    if n_in:
                        n_cand[q] = _append_inside(vals, m, b_lo[q], b_hi[q], cand[q], n_cand[q])
            # 3. brain medians
            for q in range(nb):
                p = p0 + q
                out[p, 3] = 100.0 * below[q] / n_vox if n_vox > 0 else np.nan
                c0 = n_under[q]
                if n_vox == 0:
                    out[p, 2] = np.nan
                elif c0 <= k_lo and k_hi < c0 + n_cand[q]:  # both middle ranks inside the bracket
                    out[p, 2] = middle_of(cand[q], n_cand[q], k_hi - c0, k_lo != k_hi)
                else:  # the bracket missed: evaluate again and select over all voxels
                    misses[p] = 1
                    for c1 in range(0, n_vox, _CHUNK):
                        m = _terms(c1, min(c1 + _CHUNK, n_vox), 1, gn, gro, inv, te, zs, lo, hi, mode, wv, fv)
                        _evaluate(wv, fv, m, thickness_mm[p], analytic, table, step, tail_sinc, cand[q, c1:])
                    out[p, 2] = median_of(cand[q], n_vox)


def sweep_stats(grad, dirs, roi, tilt_index, pe_sign, te_s, thickness_mm, zshim_cpmm, mode, t_pe_s,
                before_s, after_s, table, step, tail_sinc, threshold, *, analytic=None,
                bracket_sigmas=_BRACKET_SIGMAS, return_misses=False):
    """Numba sweep: per-protocol ROI/brain median and % under threshold (see module doc).

    Protocols are grouped by (tilt, polarity) so that the projections of the gradient and
    the per-voxel echo-time factor are computed once per group (by the thread that takes
    it; no (tilt, voxel) arrays are stored) and by (TE, z-shim) so that only the thickness scaling is
    repeated; the threads share out the groups. Both medians are exact in float64 (the
    ROI's by quickselect, the brain's by a sample bracket and a selection inside it, with a
    full selection when the bracket misses; see the comment above :func:`sample_stride`).

    `bracket_sigmas` sets the bracket's half-width in standard deviations of the sample
    rank (smaller: fewer candidates, more misses; it never changes the result).
    With `return_misses`, also returns a bool array: protocols whose bracket missed.
    """
    roi = np.asarray(roi, bool)
    order = np.concatenate([np.flatnonzero(roi), np.flatnonzero(~roi)])
    tilt_index = np.asarray(tilt_index, np.int64)
    pe_sign = np.asarray(pe_sign, np.int64)
    te_s = np.asarray(te_s, np.float64)
    zshim_cpmm = np.asarray(zshim_cpmm, np.float64)
    thickness_mm = np.asarray(thickness_mm, np.float64)
    perm = np.lexsort((thickness_mm, zshim_cpmm, te_s, pe_sign, tilt_index))
    ti, sg, te, zs = tilt_index[perm], pe_sign[perm], te_s[perm], zshim_cpmm[perm]
    new_group = np.r_[True, (ti[1:] != ti[:-1]) | (sg[1:] != sg[:-1])]
    new_block = new_group | np.r_[True, (te[1:] != te[:-1]) | (zs[1:] != zs[:-1])]
    starts = []
    group_block = []
    for i in range(perm.size):
        if new_group[i]:
            group_block.append(len(starts))
        if new_block[i]:
            starts.append(i)
    block_start = np.array(starts + [perm.size], np.int64)
    group_block = np.array(group_block + [len(starts)], np.int64)
    out = np.empty((perm.size, 4))
    misses = np.zeros(perm.size, np.int8)
    grad = np.asarray(grad, np.float64)
    n_vox = grad.shape[1]
    stride = sample_stride(n_vox)
    n_samp = (n_vox + stride - 1) // stride
    half_width = int(np.ceil(bracket_sigmas * 0.5 * np.sqrt(n_samp)))
    if order.size and not np.array_equal(order, np.arange(order.size)):
        grad = grad[:, order]
    if perm.size:
        _sweep_grouped(np.ascontiguousarray(grad), np.ascontiguousarray(dirs, np.float64), int(roi.sum()),
                       group_block, block_start,
                       ti[block_start[:-1]], sg[block_start[:-1]], te, thickness_mm[perm], zs, int(mode),
                       float(t_pe_s), float(before_s), float(after_s), _ANALYTIC[analytic],
                       np.asarray(table, np.float64), float(step),
                       bool(tail_sinc), float(threshold), stride, half_width, out, misses)
    result = np.empty_like(out)
    result[perm] = out
    if return_misses:
        missed = np.empty_like(misses)
        missed[perm] = misses
        return result, missed.astype(bool)
    return result


def protocol_values_reference(gn, gpe, gro, te, thick, zshim, sign, mode, t_pe_s, before_s, after_s, retention):
    """Plain-numpy metric of one protocol for all voxels (`retention` maps u -> R)."""
    if mode == 0:
        return retention(np.abs(gn * te + zshim) * thick)
    denom = 1.0 + sign * gpe * t_pe_s
    ok = denom > 0
    with np.errstate(divide="ignore", invalid="ignore"):
        tl = np.where(ok, te / np.where(ok, denom, 1.0), np.inf)
    ok &= (tl >= te - before_s) & (tl <= te + after_s)
    ok &= np.abs(gro * np.where(ok, tl, 0.0)) <= 0.5
    tl = np.where(ok, tl, te)
    return np.where(ok, retention(np.abs(gn * tl + zshim) * thick) * tl / te, 0.0)


def project_gradient(grad, dirs):
    """(gn, gpe, gro), each (n_tilts, n_vox): `grad` (3, n_vox) projected on each tilt's `dirs` rows."""
    dirs = np.asarray(dirs, np.float64)
    projected = (dirs.reshape(-1, 3) @ np.asarray(grad, np.float64)).reshape(dirs.shape[0], 3, -1)
    return projected[:, 0], projected[:, 1], projected[:, 2]


def sweep_stats_reference(grad, dirs, roi, tilt_index, pe_sign, te_s, thickness_mm, zshim_cpmm, mode, t_pe_s,
                          before_s, after_s, retention, threshold):
    """Plain-numpy reference of :func:`sweep_stats`; `retention` is a callable u -> R (exact profile)."""
    out = np.empty((te_s.shape[0], 4))
    roi = np.asarray(roi, bool)
    gn, gpe, gro = project_gradient(grad, dirs)
    for p in range(te_s.shape[0]):
        t = tilt_index[p]
        vals = protocol_values_reference(gn[t], gpe[t], gro[t], te_s[p], thickness_mm[p], zshim_cpmm[p], pe_sign[p],
                                         mode, t_pe_s, before_s, after_s, retention)
        rv = vals[roi]
        out[p, 0] = np.median(rv) if rv.size else np.nan
        out[p, 1] = 100.0 * np.count_nonzero(rv < threshold) / rv.size if rv.size else np.nan
        out[p, 2] = np.median(vals) if vals.size else np.nan
        out[p, 3] = 100.0 * np.count_nonzero(vals < threshold) / vals.size if vals.size else np.nan
    return out
