"""Numba kernels for protocol sweeps of retention / BOLD sensitivity, with a plain-numpy reference.

Both evaluate, for every protocol and every voxel of a brain mask, the signal metric of
:mod:`fieldfix.dropout` and reduce it to four numbers: ROI median, ROI percentage under
a threshold, brain median, brain percentage under the threshold.

Inputs (shared by the kernel and the reference)
------------------------------------------------
gn, gpe, gro : (n_tilts, n_vox) float64
    Gradient along the slice normal (Hz/mm), field change per PE voxel step and per
    readout voxel step (Hz) for each tilt.
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
threshold : float

Output: (n_protocols, 4) float64 array.
"""

from __future__ import annotations

import numba
import numpy as np

__all__ = ["sweep_stats", "sweep_stats_reference", "protocol_values_reference"]


@numba.njit(cache=True, inline="always")
def _lookup(x, table, unused, tail_sinc, step):
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


@numba.njit(cache=True)
def _select(a, n, k):
    """Partially order a[:n] in place so that a[k] is the k-th smallest; return it."""
    lo = 0
    hi = n - 1
    while hi > lo:
        mid = (lo + hi) >> 1
        # median of three as pivot
        x, y, z = a[lo], a[mid], a[hi]
        if x > y:
            x, y = y, x
        if y > z:
            y = z
            if x > y:
                y = x
        pivot = y
        i = lo
        j = hi
        while i <= j:
            while a[i] < pivot:
                i += 1
            while a[j] > pivot:
                j -= 1
            if i <= j:
                t = a[i]
                a[i] = a[j]
                a[j] = t
                i += 1
                j -= 1
        if k <= j:
            hi = j
        elif k >= i:
            lo = i
        else:
            return a[k]
    return a[k]


# Exact medians by a two-level radix selection on the bit patterns of non-negative float32
# values (their unsigned-integer order equals their numeric order): level 1 on bits 30..15,
# level 2 on bits 14..0, which pins the order statistic down to the exact float32 value.
_L1 = 1 << 16
_L2 = 1 << 15
_BLOCK_BINS = 256


@numba.njit(cache=True)
def _find_bucket(hist, k):
    """Bucket holding the k-th smallest (0-based) and the count of all lower buckets."""
    nbins = hist.shape[0]
    c = 0
    b = 0
    while b < nbins:  # skip whole blocks first (vectorisable sums)
        s = 0
        for j in range(b, b + _BLOCK_BINS):
            s += hist[j]
        if c + s > k:
            break
        c += s
        b += _BLOCK_BINS
    while b < nbins:
        if c + hist[b] > k:
            return b, c
        c += hist[b]
        b += 1
    return nbins - 1, c


@numba.njit(cache=True)
def _level2(bits, n, b1, hist2):
    for j in range(hist2.shape[0]):
        hist2[j] = 0
    for i in range(n):
        x = bits[i]
        if (x >> 15) == b1:
            hist2[x & 0x7FFF] += 1


@numba.njit(cache=True)
def _radix_median(vals, n, hist1, hist2, one):
    """Exact median of float32 vals[:n] (all >= 0) given hist1 of their bits 30..15."""
    if n == 0:
        return np.nan
    bits = vals.view(np.uint32)
    ob = one.view(np.uint32)
    k_hi = n // 2
    b1_hi, c_hi = _find_bucket(hist1, k_hi)
    _level2(bits, n, b1_hi, hist2)
    b2_hi, _ = _find_bucket(hist2, k_hi - c_hi)
    ob[0] = np.uint32((b1_hi << 15) | b2_hi)
    upper = np.float64(one[0])
    if n % 2 == 1:
        return upper
    k_lo = k_hi - 1
    b1_lo, c_lo = _find_bucket(hist1, k_lo)
    if b1_lo != b1_hi:
        _level2(bits, n, b1_lo, hist2)
    b2_lo, _ = _find_bucket(hist2, k_lo - c_lo)
    ob[0] = np.uint32((b1_lo << 15) | b2_lo)
    return 0.5 * (np.float64(one[0]) + upper)


@numba.njit(cache=True)
def _select_median(a, n):
    """Exact median of a[:n] by quickselect (reorders a)."""
    if n == 0:
        return np.nan
    k = n // 2
    upper = _select(a, n, k)
    if n % 2 == 1:
        return upper
    lower = a[0]
    for i in range(1, k):
        if a[i] > lower:
            lower = a[i]
    return 0.5 * (lower + upper)


_MAX_BLOCK = 8


@numba.njit(cache=True, parallel=True)
def _sweep_grouped(gn, gpe, gro, n_roi, group_block, block_start, block_tilt, block_sign, te_s, thickness_mm,
                   zshim_cpmm, mode, t_pe_s, before_s, after_s, table, step, tail_sinc, threshold, out):
    # Protocols are sorted so that a block shares (tilt, polarity, TE, z-shim) and differs only
    # in thickness; a group is a run of blocks with the same (tilt, polarity). One thread takes
    # a whole group: the echo-time factor is computed once per group, the thickness-free part
    # of the argument once per block.
    n_vox = gn.shape[1]
    inv_step = 1.0 / step
    n_groups = group_block.shape[0] - 1
    for g in numba.prange(n_groups):
        t = block_tilt[group_block[g]]
        sign = block_sign[group_block[g]]
        inv = np.empty(n_vox)
        for v in range(n_vox):
            d = 1.0 + sign * gpe[t, v] * t_pe_s
            inv[v] = 1.0 / d if d > 0.0 else -1.0  # -1 flags "no echo forms"
        vals = np.empty((_MAX_BLOCK, n_vox), np.float32)
        vbits = vals.view(np.uint32)
        rvals = np.empty((_MAX_BLOCK, max(n_roi, 1)))
        hist1 = np.empty((_MAX_BLOCK, _L1), np.int32)
        hist2 = np.empty(_L2, np.int32)
        one = np.empty(1, np.float32)
        below = np.empty(_MAX_BLOCK, np.int64)
        below_r = np.empty(_MAX_BLOCK, np.int64)
        thick = np.empty(_MAX_BLOCK)
        for blk in range(group_block[g], group_block[g + 1]):
            p0 = block_start[blk]
            nb = block_start[blk + 1] - p0
            te = te_s[p0]
            zs = zshim_cpmm[p0]
            lo = 1.0 - before_s / te
            hi = 1.0 + after_s / te
            for q in range(nb):
                thick[q] = thickness_mm[p0 + q] * inv_step
                below[q] = 0
                below_r[q] = 0
                for j in range(_L1):
                    hist1[q, j] = 0
            for v in range(n_vox):
                if mode == 0:
                    ok = True
                    factor = 1.0
                    w = abs(gn[t, v] * te + zs)
                else:
                    iv = inv[v]
                    ok = iv > 0.0 and iv >= lo and iv <= hi and abs(gro[t, v] * te * iv) <= 0.5
                    factor = iv
                    w = abs(gn[t, v] * te * iv + zs)
                for q in range(nb):
                    if ok:
                        val = _lookup(w * thick[q], table, 1.0, tail_sinc, step) * factor
                    else:
                        val = 0.0
                    if val < threshold:
                        below[q] += 1
                        if v < n_roi:
                            below_r[q] += 1
                    if v < n_roi:  # ROI voxels come first; they keep float64 values
                        rvals[q, v] = val
                    vals[q, v] = np.float32(val)
                    hist1[q, vbits[q, v] >> 15] += 1
            for q in range(nb):
                p = p0 + q
                out[p, 0] = _select_median(rvals[q], n_roi)
                out[p, 1] = 100.0 * below_r[q] / n_roi if n_roi > 0 else np.nan
                out[p, 2] = _radix_median(vals[q], n_vox, hist1[q], hist2, one)
                out[p, 3] = 100.0 * below[q] / n_vox if n_vox > 0 else np.nan


def sweep_stats(gn, gpe, gro, roi, tilt_index, pe_sign, te_s, thickness_mm, zshim_cpmm, mode, t_pe_s,
                before_s, after_s, table, step, tail_sinc, threshold):
    """Numba sweep: per-protocol ROI/brain median and % under threshold (see module doc).

    Protocols are grouped by (tilt, polarity) so that the per-voxel echo-time factor is
    computed once per group and by (TE, z-shim) so that only the thickness scaling is
    repeated; the threads share out the groups. The ROI median is exact (float64
    quickselect); the brain median is exact for the float32-rounded values (two-level
    radix selection on their bit patterns), i.e. within about 1e-7 of the float64
    median. Percentages use the float64 values.
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
    run = 0
    for i in range(perm.size):
        if new_group[i]:
            group_block.append(len(starts))
        if new_block[i] or run == _MAX_BLOCK:
            starts.append(i)
            run = 0
        run += 1
    block_start = np.array(starts + [perm.size], np.int64)
    group_block = np.array(group_block + [len(starts)], np.int64)
    out = np.empty((perm.size, 4))
    if order.size and not np.array_equal(order, np.arange(order.size)):
        gn, gpe, gro = (np.asarray(a, np.float64)[:, order] for a in (gn, gpe, gro))
    if perm.size:
        _sweep_grouped(np.ascontiguousarray(gn, np.float64), np.ascontiguousarray(gpe, np.float64),
                       np.ascontiguousarray(gro, np.float64), int(roi.sum()), group_block, block_start,
                       ti[block_start[:-1]], sg[block_start[:-1]], te, thickness_mm[perm], zs, int(mode),
                       float(t_pe_s), float(before_s), float(after_s), np.asarray(table, np.float64), float(step),
                       bool(tail_sinc), float(threshold), out)
    result = np.empty_like(out)
    result[perm] = out
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


def sweep_stats_reference(gn, gpe, gro, roi, tilt_index, pe_sign, te_s, thickness_mm, zshim_cpmm, mode, t_pe_s,
                          before_s, after_s, retention, threshold):
    """Plain-numpy reference of :func:`sweep_stats`; `retention` is a callable u -> R (exact profile)."""
    out = np.empty((te_s.shape[0], 4))
    roi = np.asarray(roi, bool)
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
