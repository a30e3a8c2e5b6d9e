"""Spatial phase unwrapping in 3D: quality-guided and Laplacian.

Two methods, both returning an :class:`UnwrapResult`:

* :func:`unwrap_quality` -- quality-guided region merging after Herraez et al. 2002
  (Applied Optics 41(35):7437) in the 3D form of Abdul-Rahman et al. 2007
  (Applied Optics 46(26):6623).  Reliability comes from wrapped second differences
  over the 13 directions of the 3x3x3 neighbourhood, computed only from voxels inside
  the mask; edges are visited from most to least reliable.  Exact (congruent): the
  result differs from the input by whole multiples of 2*pi at every voxel.
* :func:`unwrap_laplacian` -- the Laplacian method of Schofield and Zhu 2003 (Optics
  Letters 28(14):1194): ``phi = lap^-1 [cos(p) lap sin(p) - sin(p) lap cos(p)]`` with
  the Laplacian taken inside the mask and the Poisson equation solved by conjugate
  gradients preconditioned with a DCT solver.  Robust to noise; by default the
  estimate is made congruent with the input by rounding its difference to multiples
  of 2*pi.

Rules shared by both methods (documented here because the summary reports them):

* **Disconnected regions.**  A mask may fall apart into regions with no path between
  them, whose relative 2*pi offset the data cannot fix.  Regions are placed from the
  largest to the smallest; each later region is shifted by the multiple of 2*pi that
  brings the median of (its phase minus a first-order polynomial fitted, by least
  squares, to all voxels already placed) closest to zero.  The field is smooth on the
  scale of a head, so a plane through what is known is the best cheap guess.
* **Global offset.**  Finally the whole map is shifted by the multiple of 2*pi that puts
  the median unwrapped phase of the mask in [-pi, pi) (common practice, no source: the
  scanner centre frequency is set on the imaged object, so its median field is near 0).
* Voxels outside the mask keep their wrapped value.

Example
-------
>>> import numpy as np
>>> z, y, x = np.mgrid[:16, :16, :16]
>>> truth = 0.15 * (x + y + z) - 3.0
>>> wrapped = np.angle(np.exp(1j * truth))
>>> res = unwrap_quality(wrapped)
>>> bool(np.allclose(res.phase, truth))
True
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import _unwrap_kernels as _k
from ._solvers import conjugate_gradient

TWO_PI = 2.0 * np.pi
METHODS = ("quality", "laplacian")

__all__ = [
    "UnwrapResult",
    "wrap_phase",
    "unwrap",
    "unwrap_quality",
    "unwrap_laplacian",
    "reliability",
    "METHODS",
]


@dataclass(frozen=True)
class UnwrapResult:
    """Result of a spatial unwrap.

    Attributes
    ----------
    phase : ndarray
        Unwrapped phase in radians (float64), same shape as the input.
    mask : ndarray of bool
        Voxels that were unwrapped.
    multiple : ndarray of int
        Multiple of 2*pi added to each voxel (0 outside the mask; for the
        non-congruent Laplacian output it is the rounded difference).
    n_changed : int
        Number of mask voxels whose 2*pi multiple is not zero.
    n_regions : int
        Number of disconnected regions (6-connectivity) in the mask.
    method : str
        ``"quality"`` or ``"laplacian"``.
    """

    phase: np.ndarray
    mask: np.ndarray
    multiple: np.ndarray
    n_changed: int
    n_regions: int
    method: str


def wrap_phase(phase_rad):
    """Wrap phase into [-pi, pi).

    Example
    -------
    >>> float(wrap_phase(3 * np.pi / 2))
    -1.5707963267948966
    """
    p = np.asarray(phase_rad, dtype=np.float64)
    return p - TWO_PI * np.floor(p / TWO_PI + 0.5)


def _validate(wrapped, mask):
    """Checked C-contiguous 3D phase (float32 kept, else float64) and bool mask."""
    arr = np.asarray(wrapped)
    if arr.dtype != np.float32:
        arr = arr.astype(np.float64, copy=False)
    if arr.ndim not in (2, 3):
        raise ValueError(f"phase must be 2D or 3D, got shape {arr.shape}")
    squeeze = arr.ndim == 2
    if squeeze:
        arr = arr[..., None]
    if mask is None:
        m = np.ones(arr.shape, dtype=bool)
    else:
        m = np.asarray(mask, dtype=bool)
        if squeeze and m.ndim == 2:
            m = m[..., None]
        if m.shape != arr.shape:
            raise ValueError(f"mask shape {m.shape} does not match phase shape {arr.shape}")
    return np.ascontiguousarray(arr), np.ascontiguousarray(m), squeeze


def _prepare(wrapped, mask):
    arr, m, squeeze = _validate(wrapped, mask)
    original = arr
    arr, m = _k.prepare_nb(arr, m)
    return arr, m, squeeze, original


def reliability(wrapped_rad, mask=None):
    """Voxel reliability ``1/D`` from wrapped second differences (0 outside the mask).

    Abdul-Rahman et al. 2007 (Applied Optics): ``D**2`` sums the squared wrapped second
    differences over 13 directions; here only directions whose neighbours lie in the
    mask count, scaled up to 13 terms.
    """
    arr, m, squeeze, _ = _prepare(wrapped_rad, mask)
    d = _k.second_difference_nb(arr, m, _k.DIRECTIONS)
    with np.errstate(divide="ignore"):
        r = np.where(np.isfinite(d), 1.0 / d, 0.0)
    return r[..., 0] if squeeze else r


def _place_regions(wrapped, multiple, mask, labels, n_regions):
    """Disconnected-region rule (see module docstring); updates ``multiple`` in place."""
    if n_regions <= 1:
        return
    import scipy.ndimage as ndi  # imported on first use: most masks are one region

    sizes = np.bincount(labels.ravel(), minlength=n_regions + 1)[1:]
    order = np.argsort(-sizes, kind="stable") + 1
    flat_lab = labels.ravel()
    unwrapped = (wrapped + TWO_PI * multiple).ravel()
    placed = np.flatnonzero(flat_lab == order[0])
    shape = mask.shape
    rng = np.random.default_rng(0)
    members = ndi.value_indices(labels, ignore_value=0)
    for lab in order[1:]:
        idx_region = np.ravel_multi_index(members[lab], shape)
        sample = placed
        if sample.size > 20000:
            sample = np.sort(rng.choice(sample, 20000, replace=False))
        vals = unwrapped[idx_region]
        if sample.size >= 8:
            cs = np.column_stack([np.ones(sample.size), *np.unravel_index(sample, shape)])
            coef, *_ = np.linalg.lstsq(cs.astype(np.float64), unwrapped[sample], rcond=None)
            cr = np.column_stack([np.ones(idx_region.size), *np.unravel_index(idx_region, shape)])
            pred = cr.astype(np.float64) @ coef
        else:
            pred = np.full(idx_region.size, np.median(unwrapped[sample]))
        k = int(np.round(np.median(pred - vals) / TWO_PI))
        if k:
            unwrapped[idx_region] += TWO_PI * k
            multiple.ravel()[idx_region] += k
        placed = np.concatenate([placed, idx_region])


def _finish(wrapped, multiple, mask, squeeze, method, smooth=None, n_regions=None, outside=None):
    """Apply region and global rules to integer ``multiple`` and build the result.

    ``smooth`` (non-congruent Laplacian only) replaces the phase inside the mask by a
    smooth estimate shifted by the same global multiple; ``outside`` gives the values
    returned outside the mask (the input re-wrapped).
    """
    multiple = multiple.astype(np.int64)
    multiple[~mask] = 0
    if n_regions is None or n_regions > 1:
        import scipy.ndimage as ndi

        labels, n_regions = ndi.label(mask)  # 6-connectivity in 3D
        _place_regions(wrapped, multiple, mask, labels, n_regions)
    if mask.any():
        # median of the unwrapped phase, from the median multiple plus the wrapped part
        g = int(np.round(np.median(wrapped[mask] + TWO_PI * multiple[mask]) / TWO_PI))
        if g:
            multiple[mask] -= g
    if smooth is None:
        out = multiple * TWO_PI  # in place from here on: full-size float64 temporaries are the memory peak
        out += wrapped
    else:
        out = np.where(mask, smooth + TWO_PI * (multiple - np.rint((smooth - wrapped) / TWO_PI)), wrapped)
    if outside is not None and not mask.all():
        rest = ~mask
        out[rest] = wrap_phase(np.asarray(outside)[rest])
    n_changed = int(np.count_nonzero(multiple))
    if squeeze:
        out, mask, multiple = out[..., 0], mask[..., 0], multiple[..., 0]
    return UnwrapResult(out, mask, multiple, n_changed, int(n_regions), method)


def unwrap_quality(wrapped_rad, mask=None):
    """Quality-guided 3D unwrap (Herraez et al. 2002; Abdul-Rahman et al. 2007).

    Parameters
    ----------
    wrapped_rad : array_like, 2D or 3D
        Wrapped phase in radians (any range; it is re-wrapped to [-pi, pi)).
    mask : array_like of bool, optional
        Voxels to unwrap.  Default: all finite voxels.

    Returns
    -------
    UnwrapResult

    Example
    -------
    >>> z, y, x = np.mgrid[:12, :12, :12]
    >>> truth = 0.6 * x - 2.0
    >>> res = unwrap_quality(np.angle(np.exp(1j * truth)))
    >>> bool(np.allclose(res.phase, truth)), res.n_regions
    (True, 1)
    """
    original, m, squeeze = _validate(wrapped_rad, mask)
    if original.size >= 2**29:
        raise ValueError(f"phase image of {original.size} voxels is too large (the edge lists pack 29-bit "
                         "voxel indices)")
    # one compiled call: edges join 6-neighbours only, so its groups are the 6-connected regions
    arr, m, multiple, n_regions = _k.unwrap_quality_nb(original, m, _k.DIRECTIONS, _k.N_KEYS)
    # arr is wrapped outside the mask too, where multiple is 0: no separate pass for those voxels
    if n_regions > 1:
        return _finish(arr, multiple, m, squeeze, "quality", n_regions=int(n_regions))
    shift = 0
    if n_regions == 1:  # the global-offset rule of _finish, on the mask voxels only
        inside = arr[m]
        inside += TWO_PI * multiple[m]
        shift = int(np.round(np.median(inside) / TWO_PI))
        del inside
    n_changed = _k.apply_multiple_nb(arr, m, multiple, shift)  # arr becomes the result
    if squeeze:
        arr, m, multiple = arr[..., 0], m[..., 0], multiple[..., 0]
    return UnwrapResult(arr, m, multiple, int(n_changed), int(n_regions), "quality")


def _axis_pairs(mask):
    """Per axis: (lo, hi) slices and the bool array of neighbour pairs inside the mask."""
    out = []
    for ax in range(mask.ndim):
        lo = [slice(None)] * mask.ndim
        hi = [slice(None)] * mask.ndim
        lo[ax] = slice(0, -1)
        hi[ax] = slice(1, None)
        lo, hi = tuple(lo), tuple(hi)
        out.append((lo, hi, mask[lo] & mask[hi]))
    return out


def _graph_laplacian(u, pairs):
    """``sum over 6-neighbours j inside the mask of (u_j - u_i)`` (Neumann at the mask edge)."""
    out = np.zeros_like(u)
    for lo, hi, ok in pairs:
        d = np.where(ok, u[hi] - u[lo], 0.0)
        out[lo] += d
        out[hi] -= d
    return out


def _poisson_neumann(rhs):
    """Solve ``lap u = rhs`` on the whole grid (7-point stencil, Neumann box boundary,
    unit spacing) with the DCT-II; the mean of ``u`` is 0."""
    import scipy.fft  # imported on first use: the quality-guided unwrap needs no FFT

    coeff = scipy.fft.dctn(rhs, type=2, norm="ortho")
    denom = np.zeros(rhs.shape)
    for ax, n in enumerate(rhs.shape):
        lam = 2.0 * (np.cos(np.pi * np.arange(n) / n) - 1.0)
        shape = [1] * rhs.ndim
        shape[ax] = n
        denom = denom + lam.reshape(shape)
    denom.flat[0] = 1.0
    coeff /= denom
    coeff.flat[0] = 0.0
    return scipy.fft.idctn(coeff, type=2, norm="ortho")


def _solve_masked_poisson(rhs, mask, pairs, *, rtol, maxiter):
    """Solve ``graph_laplacian(u) = rhs`` on the mask by conjugate gradients on ``-L``,
    preconditioned with the whole-grid DCT solver.  Returns ``(u, iterations)``."""
    b = -np.where(mask, rhs, 0.0)

    def apply_a(x):
        return -_graph_laplacian(x, pairs)

    def precond(r):
        return np.where(mask, -_poisson_neumann(np.where(mask, r, 0.0)), 0.0)

    x0 = np.where(mask, -_poisson_neumann(-b), 0.0)  # whole-grid solution as a start
    if np.linalg.norm(b) == 0:
        return x0, 0
    return conjugate_gradient(apply_a, b, x0, precond, rtol=rtol, maxiter=maxiter)


def unwrap_laplacian(wrapped_rad, mask=None, *, congruent=True, refinements=2, rtol=1e-4, maxiter=50):
    """Laplacian unwrap (Schofield and Zhu 2003, Optics Letters 28(14):1194).

    Schofield and Zhu write the Laplacian of the true phase as
    ``cos(p) lap(sin p) - sin(p) lap(cos p)``.  With the discrete Laplacian restricted to
    the 6-neighbours inside the mask this becomes ``sum_j sin(p_j - p_i)``, which is
    what is computed; the Poisson equation on the mask (Neumann at its edge) is then
    solved by conjugate gradients preconditioned with the whole-grid DCT solver (exact
    in one step when the mask is the whole box).

    Parameters
    ----------
    wrapped_rad : array_like, 2D or 3D
        Wrapped phase in radians.
    mask : array_like of bool, optional
        Voxels of interest.  Default: all finite voxels.
    congruent : bool
        If True (default) round ``(estimate - wrapped) / 2pi`` to integers so the output
        differs from the input by whole multiples of 2*pi; if False return the smooth
        least-squares estimate itself (anchored to the data).
    refinements : int
        Extra passes on the wrapped residual ``wrap(p - estimate)``: ``sin`` underestimates
        steep phase steps, and the residual is flatter, so each pass recovers part of
        what the previous one missed.
    rtol, maxiter : float, int
        Stopping rule of the conjugate-gradient solver.

    Returns
    -------
    UnwrapResult

    Example
    -------
    >>> z, y, x = np.mgrid[:16, :16, :16]
    >>> truth = 0.5 * x
    >>> res = unwrap_laplacian(np.angle(np.exp(1j * truth)))
    >>> d = res.phase - truth
    >>> bool(np.allclose(d, d.flat[0]))
    True
    """
    arr, m, squeeze, original = _prepare(wrapped_rad, mask)
    pairs = _axis_pairs(m)
    est = np.zeros_like(arr)
    for _ in range(1 + max(int(refinements), 0)):
        resid = wrap_phase(arr - est) if est.any() else arr
        rhs = np.zeros_like(arr)
        for lo, hi, ok in pairs:
            d = np.where(ok, np.sin(resid[hi] - resid[lo]), 0.0)
            rhs[lo] += d
            rhs[hi] -= d
        step, _ = _solve_masked_poisson(rhs, m, pairs, rtol=rtol, maxiter=maxiter)
        est = est + step
    import scipy.ndimage as ndi

    # each region's solution has its own arbitrary constant: anchor it to the data
    labels, n_regions = ndi.label(m)
    if n_regions == 1:
        est[m] += np.median(wrap_phase(arr[m] - est[m]))
    elif n_regions > 1:
        for lab, idx in ndi.value_indices(labels, ignore_value=0).items():
            est[idx] += np.median(wrap_phase(arr[idx] - est[idx]))
    k = np.rint((est - arr) / TWO_PI).astype(np.int64)
    return _finish(arr, k, m, squeeze, "laplacian", smooth=None if congruent else est,
                   n_regions=n_regions, outside=original)


def unwrap(wrapped_rad, mask=None, method="quality"):
    """Unwrap with the named method (``"quality"`` or ``"laplacian"``).

    Example
    -------
    >>> res = unwrap(np.zeros((4, 4, 4)), method="laplacian")
    >>> res.n_changed
    0
    """
    if method == "quality":
        return unwrap_quality(wrapped_rad, mask)
    if method == "laplacian":
        return unwrap_laplacian(wrapped_rad, mask)
    raise ValueError(f"unknown unwrap method {method!r}; choose one of {', '.join(METHODS)}")
