"""What the page shows, as plain values for the template: numbers with their units and keys.

Every number on the page is a :class:`Num`: its value is looked up in the report's JSON
(``report.json``) by a key path such as ``runs.0.max_abs_shift_mm``, shown in the unit
of the page (an echo time stored in seconds is shown in milliseconds, ``scale=1000``) and
carried in the page with its key, value, format and scale, so that a test (or a reader)
can check that the page and the JSON agree. Texts from datasets stay plain strings; the
template escapes every one of them.

Examples
--------
>>> data = {"runs": [{"max_abs_shift_mm": 2.345}]}
>>> cell = num(data, "runs.0.max_abs_shift_mm", "{:.2f}", "mm")
>>> cell.text, cell.unit
('2.35', 'mm')
"""

from __future__ import annotations

import json
from dataclasses import dataclass

__all__ = ["Num", "Text", "num", "lookup", "format_number", "field_map_facts", "run_facts", "dropout_facts",
           "plan_facts", "plan_table", "MISSING", "PLAN_FIXED"]

MISSING = "n/a"
#: How a plan's metric is named on the page.
METRIC_WORDS = {"bold_sensitivity": "BOLD sensitivity", "retention": "through-plane retention"}


def lookup(data, key: str):
    """The value at a dotted key path (list indices as numbers); None where it, or a part of the
    path, is null. A path the data does not have is a KeyError: a page value whose field was
    renamed fails the build instead of showing 'n/a'.

    Examples
    --------
    >>> lookup({"a": [{"b": 3}], "c": None}, "a.0.b"), lookup({"c": None}, "c.d")
    (3, None)
    >>> lookup({"a": [{"b": 3}]}, "a.0.x")
    Traceback (most recent call last):
    KeyError: "the report data has no 'a.0.x' (no field 'x')"
    """
    value = data
    for part in key.split("."):
        if isinstance(value, list):
            try:
                value = value[int(part)]
            except (ValueError, IndexError):
                raise KeyError(f"the report data has no {key!r} (no item {part})") from None
        elif isinstance(value, dict):
            if part not in value:  # a page key no record field has: a bug, never shown as 'n/a'
                raise KeyError(f"the report data has no {key!r} (no field {part!r})")
            value = value[part]
        else:
            raise KeyError(f"the report data has no {key!r} ({part!r} below a plain value)")
        if value is None:
            return None
    return value


def format_number(value, fmt: str, scale: float = 1.0) -> str:
    """The text the page shows for a value (``'n/a'`` for None; lists joined by commas).

    Examples
    --------
    >>> format_number([0.00492, 0.00738], "{:.2f}", 1000.0)
    '4.92, 7.38'
    >>> format_number(None, "{:.2f}")
    'n/a'
    """
    if value is None:
        return MISSING
    if isinstance(value, (list, tuple)):
        return ", ".join(format_number(v, fmt, scale) for v in value)
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, (int, float)):
        shown = value * scale if scale != 1.0 else value
        try:
            return fmt.format(shown)
        except (TypeError, ValueError):
            return f"{shown:g}"
    return str(value)


@dataclass(frozen=True)
class Num:
    """A number of the page: key path into report.json, value, format, scale and unit."""

    key: str
    value: object
    fmt: str
    scale: float
    unit: str

    @property
    def text(self) -> str:
        return format_number(self.value, self.fmt, self.scale)

    @property
    def value_json(self) -> str:
        return json.dumps(self.value)


@dataclass(frozen=True)
class Text:
    """A text value (a name, a code, a sentence): shown as it is, escaped by the template."""

    text: str
    key: str | None = None


def num(data, key: str, fmt: str, unit: str, scale: float = 1.0) -> Num:
    """The :class:`Num` of `key` in the report's JSON `data`."""
    return Num(key=key, value=lookup(data, key), fmt=fmt, scale=scale, unit=unit)


def text(data, key: str) -> Text:
    value = lookup(data, key)
    return Text(MISSING if value is None else str(value), key)


def field_map_facts(data, i: int) -> list[tuple[str, list[tuple[str, object]]]]:
    """Groups of (label, cell) rows of a field map: the field, its measurement, mask and processing."""
    p = f"field_maps.{i}"
    field = [("1st percentile", num(data, f"{p}.field_percentiles_hz.p1", "{:+.1f}", "Hz")),
             ("Median", num(data, f"{p}.field_percentiles_hz.p50", "{:+.1f}", "Hz")),
             ("99th percentile", num(data, f"{p}.field_percentiles_hz.p99", "{:+.1f}", "Hz")),
             ("Mean", num(data, f"{p}.field_mean_hz", "{:+.1f}", "Hz")),
             ("Unaliased range", num(data, f"{p}.unaliased_range_hz", "\u00b1{:.1f}", "Hz")),
             ("Beyond the unaliased range", num(data, f"{p}.percent_mask_beyond_unaliased_range", "{:.2f}",
                                                "% of mask"))]
    measured = [("Input", text(data, f"{p}.input_kind")),
                ("Echo times", num(data, f"{p}.echo_times_s", "{:.2f}", "ms", 1000.0)),
                ("Echo-time difference", num(data, f"{p}.delta_te_s", "{:.2f}", "ms", 1000.0)),
                ("Phase units", Text("; ".join(lookup(data, f"{p}.phase_units") or []) or MISSING)),
                ("Field strength", num(data, f"{p}.field_strength_t", "{:g}", "T"))]
    processing = [("Mask", text(data, f"{p}.mask_source")),
                  ("Mask volume", num(data, f"{p}.mask_volume_ml", "{:.1f}", "ml")),
                  ("Mask coverage of the bright magnitude",
                   num(data, f"{p}.mask_coverage", "{:.0f}", "% (Otsu)", 100.0)),
                  ("Voxels whose 2\u03c0 offset changed", num(data, f"{p}.voxels_offset_changed", "{:d}", "voxels")),
                  ("Outlier voxels replaced", num(data, f"{p}.outlier_voxels", "{:d}", "voxels")),
                  ("Smoothing", num(data, f"{p}.smooth_fwhm_mm", "{:g}", "mm FWHM"))]
    return [("Field inside the mask", field), ("Measurement", measured), ("Mask and processing", processing)]


def run_facts(data, i: int) -> list[tuple[str, list[tuple[str, object]]]]:
    """Groups of (label, cell) rows of a run: acquisition, correction, shifts."""
    p = f"runs.{i}"
    run = lookup(data, p) or {}
    acquisition = [
        ("Phase encoding", Text(f"{run['pe_code']} ({run['pe_direction_world']})")),
        ("Total readout time", num(data, f"{p}.timing.readout_time_s", "{:.2f}", "ms", 1000.0)),
        ("Effective echo spacing", num(data, f"{p}.timing.echo_spacing_s", "{:.3f}", "ms", 1000.0)),
        ("Phase-encode lines", num(data, f"{p}.timing.n_pe_lines", "{:d}", "lines")),
        ("Timing from", text(data, f"{p}.timing.source"))]
    correction = [
        ("Interpolation along phase encoding", text(data, f"{p}.interp")),
        ("Folded when the Jacobian is at most", num(data, f"{p}.jacobian_floor", "{:g}", "(intensity factor)")),
        ("Run covered by the B0 map", num(data, f"{p}.coverage_percent", "{:.1f}", "% of voxels")),
        ("Statistics region", text(data, f"{p}.statistics_region")),
        ("Corrected with", text(data, f"{p}.field_map"))]
    shifts = [
        ("Largest |shift| in the mask", num(data, f"{p}.max_abs_shift_mm", "{:.2f}", "mm")),
        ("Largest |shift| in the mask", num(data, f"{p}.max_abs_shift_vox", "{:.2f}", "voxels")),
        ("Mask moved by more than 1 voxel", num(data, f"{p}.percent_shifted_over_1_voxel", "{:.1f}", "% of mask")),
        ("Folded voxels in the mask", num(data, f"{p}.folded_voxels", "{:d}", "voxels")),
        ("Moved region for the edge agreement", num(data, f"{p}.shifted_region_voxels", "{:d}", "voxels"))]
    return [("Acquisition", acquisition), ("Correction", correction), ("Shifts", shifts)]


_ZSHIM_UNIT = "mT\u00b7ms/m"


def dropout_facts(data, i: int) -> tuple[list, list]:
    """(protocol rows, statistics rows) of a dropout prediction."""
    p = f"dropout.{i}"
    q = f"{p}.parameters"
    protocol = [("Echo time", num(data, f"{q}.te_s", "{:.1f}", "ms", 1000.0)),
                ("Slice thickness", num(data, f"{q}.thickness_mm", "{:g}", "mm")),
                ("Slice tilt", num(data, f"{q}.tilt_deg", "{:g}", "\u00b0")),
                ("Slice axis", text(data, f"{q}.slice_axis")),
                ("Slice profile", text(data, f"{q}.profile")),
                ("Z-shim moment", num(data, f"{q}.zshim_mtms_per_m", "{:g}", _ZSHIM_UNIT)),
                ("Phase encoding", text(data, f"{q}.pe_code")),
                ("Effective echo spacing", num(data, f"{q}.echo_spacing_s", "{:.3f}", "ms", 1000.0)),
                ("Partial Fourier", num(data, f"{q}.partial_fourier", "{:g}", "of k-space")),
                ("Loss threshold", num(data, f"{q}.threshold", "{:g}", "fraction of signal"))]
    stats = [("B0 field", text(data, f"{p}.field_source")),
             ("Statistics inside", text(data, f"{p}.mask")),
             ("Voxels", num(data, f"{p}.retention.voxels", "{:d}", "voxels")),
             ("Median retention", num(data, f"{p}.retention.median", "{:.3f}", "fraction, 0\u20131")),
             ("Retention under the threshold", num(data, f"{p}.retention.percent_below_threshold", "{:.1f}",
                                                   "% of mask"))]
    if lookup(data, f"{p}.bold_sensitivity") is not None:
        stats += [("Median BOLD sensitivity",
                   num(data, f"{p}.bold_sensitivity.median", "{:.3f}", "fraction, 0\u20131")),
                  ("BOLD sensitivity under the threshold",
                   num(data, f"{p}.bold_sensitivity.percent_below_threshold", "{:.1f}", "% of mask")),
                  ("Echo outside the acquisition window", num(data, f"{p}.percent_echo_lost", "{:.1f}", "% of mask"))]
    return protocol, stats


#: Plan parameters held fixed, in page order (``SweepSpec.as_dict`` names): key -> (label,
#: format, unit, scale); None format: a text. The others are the swept axes
#: (``fieldfix.plan.SWEEP_AXES``); a test holds the two to the planner's parameters.
PLAN_FIXED = {
    "orientation": ("Slice orientation", None, "", 1.0), "pe_world_axis": ("Phase-encode world axis", None, "", 1.0),
    "inplane_mm": ("In-plane voxel size", "{:g}", "mm", 1.0), "pe_lines": ("Phase-encode lines", "{:d}", "lines", 1.0),
    "echo_spacing_s": ("Effective echo spacing", "{:.3f}", "ms", 1000.0),
    "partial_fourier": ("Partial Fourier", "{:g}", "of k-space", 1.0), "profile": ("Slice profile", None, "", 1.0),
    "tbw": ("RF time-bandwidth product", "{:g}", "(time \u00d7 bandwidth)", 1.0),
    "threshold": ("Loss threshold", "{:g}", "fraction of signal", 1.0),
    "slice_gap_mm": ("Slice gap", "{:g}", "mm", 1.0), "time_per_slice_s": ("Time per slice", "{:g}", "ms", 1000.0),
    "overhead_s": ("Excitation, rewinder and spoiler time per slice", "{:g}", "ms", 1000.0),
    "multiband": ("Multiband factor", "{:d}", "slices at once", 1.0), "max_tr_s": ("TR limit", "{:g}", "s", 1.0),
    "tolerance": ("Tolerance on the ranked figure", "{:g}", "fraction", 1.0), "coverage": ("Slices cover", None, "", 1.0),
    "fixed_tr_s": ("TR of every protocol", "{:g}", "s", 1.0), "rank_by": ("Ranking", None, "", 1.0),
    "t2star_s": ("T2* of the tissue", "{:g}", "ms", 1000.0), "field_strength_t": ("Field strength", "{:g}", "T", 1.0),
    "lambda_physio": ("Physiological noise", "{:g}", "fraction of the signal", 1.0),
    "snr_reference": ("Reference image SNR", "{:g}", "(3 mm voxel, 30 ms readout, TE 0, 3 T)", 1.0),
}


def plan_facts(data, i: int) -> tuple[list, list]:
    """(label, cell) rows of a plan: (masks and counts, the parameters held fixed)."""
    p = f"plans.{i}"
    rows = [("Region of interest", text(data, f"{p}.roi")),
            ("Region of interest", num(data, f"{p}.roi_voxels", "{:d}", "voxels")),
            ("Whole-brain statistics inside", text(data, f"{p}.brain_mask")),
            ("Protocols compared", num(data, f"{p}.protocols", "{:d}", "protocols")),
            ("Ranked by", Text(METRIC_WORDS.get(lookup(data, f"{p}.metric"), MISSING)))]
    fixed = []
    for key, (label, fmt, unit, scale) in PLAN_FIXED.items():
        if key in (lookup(data, f"{p}.fixed") or {}):
            value = lookup(data, f"{p}.fixed.{key}")
            fixed.append((label, text(data, f"{p}.fixed.{key}") if fmt is None or value is None
                          else num(data, f"{p}.fixed.{key}", fmt, unit, scale)))
    return rows, fixed


#: Columns of the plan table: key, header, unit, format, scale (None format: a text).
PLAN_COLUMNS = (("rank", "Rank", "#", "{:d}", 1.0), ("protocol", "Protocol", "", None, 1.0),
                ("thickness_mm", "Slice thickness", "mm", "{:g}", 1.0), ("te_s", "Echo time", "ms", "{:g}", 1000.0),
                ("tilt_deg", "Tilt", "\u00b0", "{:g}", 1.0), ("pe_polarity", "PE polarity", "", None, 1.0),
                ("zshim_mtms_per_m", "Z-shim", _ZSHIM_UNIT, "{:g}", 1.0),
                ("roi_median", "ROI median", "fraction, 0\u20131", "{:.3f}", 1.0),
                ("roi_percent_below", "ROI under threshold", "% of ROI", "{:.1f}", 1.0),
                ("brain_median", "Brain median", "fraction, 0\u20131", "{:.3f}", 1.0),
                ("brain_percent_below", "Brain under threshold", "% of brain", "{:.1f}", 1.0),
                ("n_slices", "Slices", "slices", "{:d}", 1.0), ("tr_s", "Shortest TR", "s", "{:.2f}", 1.0))


def plan_table(data, i: int) -> tuple[list[tuple[str, str]], list[list[object]]]:
    """(headers with units, rows of cells) of a plan's best protocols."""
    p = f"plans.{i}.top"
    headers = [(header, unit) for _, header, unit, _, _ in PLAN_COLUMNS]
    rows = []
    for j in range(len(lookup(data, p) or [])):
        rows.append([text(data, f"{p}.{j}.{key}") if fmt is None else num(data, f"{p}.{j}.{key}", fmt, unit, scale)
                     for key, _, unit, fmt, scale in PLAN_COLUMNS])
    return headers, rows
