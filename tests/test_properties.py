"""Property tests of the distortion model (hypothesis).

* Distorting with a small smooth shift map and unwarping with the same map (Jacobian on)
  gives back the image: the pull-back with Jacobian is the inverse of the
  signal-conserving forward model (change of variables, ``dy' = J dy``).
* Reversing the phase-encode polarity and the field sign gives the same shifts, the same
  distorted image and the same correction (``shift = sign * f * esp * N``).
* The Jacobian keeps summed signal: the forward model conserves it exactly while nothing
  leaves the field of view, and the Jacobian-weighted pull-back conserves it to
  discretisation error; without the Jacobian a uniform stretch changes it by ``1 / J``.
* Units: lists of quantities round trip through format/parse (single values are covered in
  tests/test_units.py).
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from fieldfix.shift import jacobian_from_shift, shift_vox_from_field
from fieldfix.unwarp import distort, distort_with_field, shift_maps, unwarp_volume
from fieldfix.units import format_quantity, parse_quantity_list

N_PE = 32  # voxels along the phase-encode axis
OTHER = (6, 5)  # the two other axes


def _grid(pe_axis: int):
    """Coordinates along the PE axis and the two others, on a grid whose PE axis is `pe_axis`."""
    shape = list(OTHER)
    shape.insert(pe_axis, N_PE)
    coords = np.meshgrid(*[np.arange(n, dtype=float) for n in shape], indexing="ij")
    others = [c for a, c in enumerate(coords) if a != pe_axis]
    return tuple(shape), coords[pe_axis], others


def _smooth_object(y, others, centre_offset, sigma):
    """A smooth blob along the PE axis, modulated across it.

    Tapered to exactly zero beyond 10 voxels from its centre, so with a centre within 2
    voxels of the middle and shifts up to 2.5 voxels no signal reaches the grid's ends.
    """
    distance = y - (N_PE - 1) / 2 - centre_offset
    taper = np.where(np.abs(distance) < 10, np.cos(np.pi * distance / 20) ** 2, 0.0)
    line = np.exp(-0.5 * (distance / sigma) ** 2) * taper
    return line * (1.0 + 0.3 * np.cos(2 * np.pi * others[0] / OTHER[0])) * (1.0 + 0.1 * others[1])


def _smooth_shift(y, others, amplitudes, frequencies, phases, max_shift):
    """Sum of low-frequency sinusoids along the PE axis (varying slowly across), peak <= max_shift."""
    shift = np.zeros_like(y)
    for a, f, p in zip(amplitudes, frequencies, phases):
        shift += a * np.sin(2 * np.pi * f * y / N_PE + p + 0.2 * others[0])
    shift *= 1.0 + 0.05 * others[1]
    peak = np.abs(shift).max()
    if peak > 0:
        shift *= min(1.0, max_shift / peak)
    return shift


def _limit_slope(shift, pe_axis, max_slope):
    """Scale a shift map so that |d shift / dy| <= max_slope (Jacobian within 1 -/+ max_slope)."""
    steepest = np.abs(np.gradient(shift, axis=pe_axis)).max()
    return shift * min(1.0, max_slope / steepest) if steepest > 0 else shift


shift_parameters = st.tuples(
    st.lists(st.floats(0.05, 1.0), min_size=1, max_size=2),  # sign comes from the phase
    st.lists(st.floats(0.3, 1.5), min_size=2, max_size=2),
    st.lists(st.floats(0.0, 2 * np.pi), min_size=2, max_size=2),
)


@settings(max_examples=40, deadline=None)
@given(pe_axis=st.integers(0, 2), params=shift_parameters, max_shift=st.floats(0.2, 2.5),
       centre_offset=st.floats(-2.0, 2.0), sigma=st.floats(3.0, 4.0), interp=st.sampled_from(["linear", "cubic"]))
def test_distort_then_unwarp_is_near_identity(pe_axis, params, max_shift, centre_offset, sigma, interp):
    shape, y, others = _grid(pe_axis)
    image = _smooth_object(y, others, centre_offset, sigma)
    shift = _limit_slope(_smooth_shift(y, others, *params, max_shift), pe_axis, 0.35)  # 0.65 <= J <= 1.35
    distorted = distort(image, shift, pe_axis)
    corrected = unwarp_volume(distorted, shift, pe_axis, interp=interp, jacobian=True)

    def error(candidate):
        return np.abs(candidate - image).max() / image.max()

    # Box-integrating forward model + 2/4-tap pull-back on a blob of sigma >= 3 voxels:
    # in 120 random cases the worst errors were 4.4% (linear) and 2.6% (cubic).
    assert error(corrected) < {"linear": 0.06, "cubic": 0.04}[interp]
    if np.abs(shift).max() > 1.0:
        # The round trip really undoes the distortion: far closer than the distorted image,
        # and closer than a pull-back in the wrong direction.
        assert error(corrected) < 0.5 * error(distorted)
        assert error(corrected) < 0.5 * error(unwarp_volume(distorted, -shift, pe_axis, interp=interp))


@settings(max_examples=40, deadline=None)
@given(axis=st.integers(0, 2), seed=st.integers(0, 2 ** 31), echo_spacing_ms=st.floats(0.2, 1.2),
       scale_hz=st.floats(1.0, 40.0))
def test_reversed_polarity_and_field_sign_give_the_same_shifts(axis, seed, echo_spacing_ms, scale_hz):
    rng = np.random.default_rng(seed)
    shape, y, others = _grid(axis)
    b0_hz = scale_hz * (np.sin(2 * np.pi * y / N_PE + rng.uniform(0, 6)) + 0.5 * np.cos(others[0] / 3))
    plus, minus = "ijk"[axis], "ijk"[axis] + "-"
    esp = echo_spacing_ms * 1e-3
    s_plus = shift_vox_from_field(b0_hz, plus, esp)
    s_minus = shift_vox_from_field(-b0_hz, minus, esp)
    assert np.array_equal(s_plus, s_minus)
    # Polarity alone flips the sign of every shift, and the shift is f * esp * N (shift.py docstring).
    assert np.allclose(shift_vox_from_field(b0_hz, minus, esp), -s_plus)
    assert np.allclose(s_plus, b0_hz * esp * N_PE)
    maps_plus, maps_minus = shift_maps(b0_hz, plus, esp), shift_maps(-b0_hz, minus, esp)
    assert np.array_equal(maps_plus.jacobian, maps_minus.jacobian)
    assert np.array_equal(maps_plus.fold, maps_minus.fold)
    image = _smooth_object(y, others, 0.0, 3.5)
    d_plus = distort_with_field(image, b0_hz, plus, esp)
    d_minus = distort_with_field(image, -b0_hz, minus, esp)
    assert np.array_equal(d_plus, d_minus)
    assert np.array_equal(unwarp_volume(d_plus, s_plus, axis), unwarp_volume(d_minus, s_minus, axis))


@settings(max_examples=40, deadline=None)
@given(pe_axis=st.integers(0, 2), params=shift_parameters, max_shift=st.floats(0.2, 2.5),
       centre_offset=st.floats(-2.0, 2.0), sigma=st.floats(3.0, 4.0))
def test_jacobian_keeps_summed_signal(pe_axis, params, max_shift, centre_offset, sigma):
    shape, y, others = _grid(pe_axis)
    image = _smooth_object(y, others, centre_offset, sigma)
    shift = _limit_slope(_smooth_shift(y, others, *params, max_shift), pe_axis, 0.5)  # J >= 0.5
    distorted = distort(image, shift, pe_axis)
    # Forward model: signal is moved, not made or lost (nothing reaches the edges here).
    assert distorted.sum() == pytest.approx(image.sum(), rel=1e-9)
    assert distorted.min() >= -1e-12
    # Pull-back with the Jacobian: the sum over each PE line is kept to discretisation error.
    corrected = unwarp_volume(distorted, shift, pe_axis, jacobian=True).astype(float)
    line_in = distorted.sum(axis=pe_axis)
    line_out = corrected.sum(axis=pe_axis)
    assert np.allclose(line_out, line_in, rtol=0.01)


@pytest.mark.parametrize("slope", [-0.3, 0.25, 0.6])
def test_uniform_stretch_changes_the_sum_by_one_over_j_without_the_jacobian(slope):
    # Analytic case: shift = slope * (y - centre) gives J = 1 + slope everywhere; the
    # distorted object spans a length J times the original with intensity 1/J, so pulling
    # back without the Jacobian gives sum / J, with it the original sum.
    shape, y, others = _grid(1)
    image = _smooth_object(y, others, 0.0, 2.5)
    shift = slope * (y - (N_PE - 1) / 2)
    assert np.allclose(jacobian_from_shift(shift, 1), 1 + slope)
    distorted = distort(image, shift, 1)
    assert distorted.sum() == pytest.approx(image.sum(), rel=1e-3)
    plain = unwarp_volume(distorted, shift, 1, interp="cubic", jacobian=False).sum()
    weighted = unwarp_volume(distorted, shift, 1, interp="cubic", jacobian=True).sum()
    assert weighted == pytest.approx(image.sum(), rel=0.01)
    assert plain == pytest.approx(image.sum() / (1 + slope), rel=0.01)


@given(st.lists(st.floats(-1e3, 1e3, allow_nan=False), min_size=1, max_size=8),
       st.sampled_from(["time", "length", "angle", "frequency"]))
def test_quantity_lists_round_trip(values, dimension):
    scale = 1e-3 if dimension == "time" else 1.0
    values = [v * scale for v in values]
    text = ",".join(format_quantity(v, dimension) for v in values)
    assert parse_quantity_list(text, dimension) == pytest.approx(values, rel=1e-5, abs=1e-9)


@settings(max_examples=300)
@given(st.text(max_size=20) | st.from_regex(r"\s*[-+]?\d{0,4}\.?\d{0,4}(e[-+]?\d{1,4})?\s*[a-zA-Zµμ/*.°]{0,8}\s*",
                                           fullmatch=True),
       st.sampled_from(["time", "length", "angle", "frequency", "field", "moment"]))
def test_any_text_gives_a_unit_error_or_a_finite_value(text, dimension):
    from fieldfix.errors import UnitError
    from fieldfix.units import parse_quantity

    try:
        value = parse_quantity(text, dimension)
    except UnitError as err:
        assert "\n" not in str(err)
        return
    assert isinstance(value, float) and np.isfinite(value)


@settings(max_examples=200)
@given(st.text(max_size=30) | st.from_regex(r"-?\d{1,3}(\.\d)?(deg|rad)?:-?\d{1,4}(deg|rad)?:\d{0,2}\.?\d{0,3}(deg|rad)?",
                                           fullmatch=True))
def test_any_text_as_a_list_or_range_gives_a_unit_error_or_values(text):
    from fieldfix.errors import UnitError

    try:
        values = parse_quantity_list(text, "angle")
    except UnitError:
        return
    assert values and all(np.isfinite(v) for v in values) and len(values) <= 10000
    if ":" in text and "," not in text:  # a range runs upwards from its start
        assert values == sorted(values)
