"""The shared quickselect kernels against numpy's partition and median (reference library)."""

import numpy as np
import pytest

from fieldfix._select_kernels import median_of, middle_of, select_kth


@pytest.mark.parametrize("n", [1, 2, 3, 27, 28, 1000, 4097])
def test_select_and_median_match_numpy_on_random_values_with_ties(n):
    rng = np.random.default_rng(n)
    values = np.round(rng.normal(size=n + 5), 1)  # rounding makes ties; 5 spare values past n
    for k in sorted({0, n // 3, n // 2, n - 1}):
        work = values.copy()
        assert select_kth(work, n, k) == np.partition(values[:n], k)[k]
        assert np.array_equal(work[n:], values[n:])  # nothing past n is touched
    work = values.copy()
    assert median_of(work, n) == pytest.approx(np.median(values[:n]), abs=1e-12)
    assert np.array_equal(np.sort(work[:n]), np.sort(values[:n]))  # a reordering, no value lost


def test_middle_of_even_count_is_the_mean_of_the_two_middle_values():
    values = np.array([5.0, 1.0, 4.0, 2.0, 3.0, 6.0])
    assert middle_of(values.copy(), 6, 3, True) == 3.5
    assert middle_of(values.copy(), 6, 3, False) == 4.0
    assert np.isnan(median_of(np.empty(0), 0))


def test_sorted_and_constant_inputs():
    ramp = np.arange(101.0)
    assert median_of(ramp.copy(), 101) == 50.0
    assert median_of(ramp[::-1].copy(), 101) == 50.0
    assert median_of(np.full(64, 2.5), 64) == 2.5
