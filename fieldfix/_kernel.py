"""The compile options every fieldfix numba kernel shares, in one place.

Inlined helpers (``inline="always"``) compile with their caller's options and keep plain
``numba.njit``; every other kernel is declared with :func:`kernel`.
"""

from __future__ import annotations

from numba import njit

__all__ = ["kernel"]


def kernel(**options):
    """``numba.njit`` with the options all kernels share, plus the kernel's own.

    ``nogil=True``: the streaming unwarp's reader and writer threads, and a dask worker's other
    tasks, run while the kernel computes. ``cache=True``: a fresh process loads the compiled
    kernel instead of compiling it again.

    Examples
    --------
    >>> import numpy as np
    >>> from fieldfix._select_kernels import median_of  # declared as @kernel()
    >>> float(median_of(np.array([3.0, 1.0, 2.0]), 3)), median_of.targetoptions["nogil"]
    (2.0, True)
    """
    return njit(nogil=True, cache=True, **options)
