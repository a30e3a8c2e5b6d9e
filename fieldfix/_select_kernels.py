"""Quickselect order statistics for numba kernels (private; shared by the dropout sweep and the
field-map outlier filter).

Hoare's selection with a median-of-three pivot (Hoare 1961, Commun. ACM 4:321, "Algorithm 65:
find"): expected linear time, in place. The tests compare the results with ``np.partition`` and
``np.median``.
"""

from __future__ import annotations

import numpy as np

from ._kernel import kernel

__all__ = ["select_kth", "middle_of", "median_of"]


@kernel()
def select_kth(a, n, k):
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


@kernel()
def middle_of(a, n, k, even):
    """The k-th smallest of a[:n] (reorders a); with `even`, its mean with the (k-1)-th (k >= 1)."""
    upper = select_kth(a, n, k)
    if not even:
        return upper
    lower = a[0]  # after the selection a[:k] holds the k values ranked below
    for i in range(1, k):
        if a[i] > lower:
            lower = a[i]
    return 0.5 * (lower + upper)


@kernel()
def median_of(a, n):
    """Exact median of a[:n] by quickselect (reorders a)."""
    if n == 0:
        return np.nan
    return middle_of(a, n, n // 2, n % 2 == 0)
