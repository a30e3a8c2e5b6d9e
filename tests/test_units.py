"""Unit parsing: accepted forms, refusals, and the gyromagnetic ratio."""

import math

import pytest
from hypothesis import given, strategies as st

from fieldfix.errors import UnitError
from fieldfix.units import (
    GAMMA_HZ_PER_T,
    GAMMA_RAD_PER_S_PER_T,
    format_quantity,
    parse_angle_deg,
    parse_field_t,
    parse_frequency_hz,
    parse_length_mm,
    parse_quantity,
    parse_quantity_list,
    parse_time_s,
)


@pytest.mark.parametrize("text", ["4.92ms", "0.00492 s", "4920us", "4920 µs", "4.92e-3s", "4.92 ms"])
def test_time_forms_agree(text):
    assert parse_time_s(text) == pytest.approx(0.00492, rel=1e-12)


@pytest.mark.parametrize("text,mm", [("2.5mm", 2.5), ("0.25cm", 2.5), ("0.0025m", 2.5), ("2500um", 2.5)])
def test_lengths(text, mm):
    assert parse_length_mm(text) == pytest.approx(mm)


def test_angles_frequencies_fields():
    assert parse_angle_deg("15deg") == 15.0
    assert parse_angle_deg(f"{math.pi / 2}rad") == pytest.approx(90.0)
    assert parse_angle_deg("-30deg") == -30.0
    assert parse_frequency_hz("100Hz") == 100.0
    assert parse_frequency_hz(f"{200 * math.pi}rad/s") == pytest.approx(100.0)
    assert parse_field_t("3T") == 3.0
    assert parse_field_t("2890mT") == pytest.approx(2.89)


@pytest.mark.parametrize("text", ["4.92", "30", " 0.5 "])
def test_bare_numbers_are_refused_with_accepted_forms(text):
    with pytest.raises(UnitError) as info:
        parse_time_s(text)
    assert "no unit" in str(info.value)
    assert "4.92ms" in str(info.value)  # the message shows accepted forms


@pytest.mark.parametrize("text", ["4.92mm", "ms", "4..9ms", "", "fast", "1e999s"])
def test_wrong_or_unreadable_units_are_refused(text):
    with pytest.raises(UnitError):
        parse_time_s(text)


def test_numbers_without_text_are_refused():
    with pytest.raises(UnitError):
        parse_quantity(4.92, "time")


def test_lists_and_ranges():
    assert parse_quantity_list("25ms,30ms,35ms", "time") == pytest.approx([0.025, 0.03, 0.035])
    assert parse_quantity_list("-30deg:30deg:10deg", "angle") == [-30, -20, -10, 0, 10, 20, 30]
    assert parse_quantity_list("2mm:3mm:0.5mm", "length") == [2.0, 2.5, 3.0]
    for bad in ["30deg:-30deg:10deg", "0deg:10deg:0deg", "1deg:2deg", ",", "25,30"]:
        with pytest.raises(UnitError):
            parse_quantity_list(bad, "angle")


def test_gamma_matches_the_textbook_value():
    # Proton gyromagnetic ratio 42.577 MHz/T (from memory; CODATA gives 42.577478...).
    assert GAMMA_HZ_PER_T == pytest.approx(42.577e6, rel=1e-4)
    assert GAMMA_RAD_PER_S_PER_T == pytest.approx(2 * math.pi * GAMMA_HZ_PER_T, rel=1e-9)


@given(st.floats(min_value=1e-7, max_value=10.0, allow_nan=False))
def test_time_round_trip(seconds):
    assert parse_time_s(format_quantity(seconds, "time")) == pytest.approx(seconds, rel=1e-5)


@given(st.floats(min_value=-1e4, max_value=1e4, allow_nan=False), st.sampled_from(["length", "angle", "frequency"]))
def test_round_trip_other_dimensions(value, dimension):
    assert parse_quantity(format_quantity(value, dimension), dimension) == pytest.approx(value, rel=1e-5, abs=1e-9)
