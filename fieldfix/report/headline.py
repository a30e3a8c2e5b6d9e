"""The page's headline: the numbers that show whether a correction worked where it matters.

For each run, in this order:

1. edge agreement where voxels moved (the moved region of :mod:`.runs`), before and after;
2. the agreement of the two phase-encode polarities, when the field map came from a
   reversed phase-encode pair and its summary carries that record (``pair_agreement``,
   with ``nrmsd_before`` / ``nrmsd_after``: the normalised RMS difference of the
   polarities, :func:`fieldfix.pairs.pair_agreement`; lower is better);
3. where a scenario's ground truth exists (the demo), the errors against it (edge agreement
   and shift map of the first run beside its own numbers, then the field map's);
4. beside them, the edge agreement over the whole mask, which a local correction barely
   moves (most voxels do not move at all).

Examples
--------
>>> from fieldfix.outputs import DemoChecks
>>> [m.kind for m in truth_measures("b0_summary.json", [], DemoChecks(b0_error_vs_truth_median_hz=1.2))]
['truth_b0_error']
"""

from __future__ import annotations

from ..outputs import DemoChecks, HeadlineMeasure, ReportRun

__all__ = ["run_measures", "polarity_measures", "truth_measures", "headline", "NGF_UNIT"]

#: The unit shown beside an edge agreement (normalised gradient fields, 0 to 1).
NGF_UNIT = "NGF, 0\u20131"


def _measure(**fields) -> HeadlineMeasure:
    before, after = fields.get("before"), fields.get("after")
    change = round(after - before, 6) if before is not None and after is not None else None
    return HeadlineMeasure(**fields, change=change)


def run_measures(run: ReportRun) -> tuple[list[HeadlineMeasure], list[HeadlineMeasure]]:
    """(first, beside): the moved-region agreement, and the whole-mask one."""
    first, beside = [], []
    if run.edge_agreement_shifted_after is not None:
        first.append(_measure(
            item=run.stem, kind="edges_moved", label="Edge agreement where voxels moved",
            region=f"{run.shifted_region_voxels} voxels moved by more than 1 voxel, with their paths",
            unit=NGF_UNIT, before=run.edge_agreement_shifted_before, after=run.edge_agreement_shifted_after,
            higher_is_better=True, voxels=run.shifted_region_voxels))
    if run.edge_agreement_after is not None:
        beside.append(_measure(
            item=run.stem, kind="edges_whole", label="Edge agreement over the whole mask", region=run.edge_region or "",
            unit=NGF_UNIT, before=run.edge_agreement_before, after=run.edge_agreement_after, higher_is_better=True))
    return first, beside


def polarity_measures(item: str, record) -> list[HeadlineMeasure]:
    """The polarity agreement of a field map estimated from a reversed phase-encode pair.

    `record` is the field-map summary's optional pair record (None when the map came from
    gradient echoes); it must carry ``nrmsd_before`` and ``nrmsd_after``.
    """
    if record is None:
        return []
    return [_measure(item=item, kind="polarities", label="Difference between the two phase-encode polarities",
                            region="field-map mask", unit="NRMSD, 0 = identical", before=record.nrmsd_before,
                            after=record.nrmsd_after, higher_is_better=False)]


def truth_measures(item: str, runs: list[ReportRun], truth: DemoChecks | None) -> list[HeadlineMeasure]:
    """The errors against a scenario's ground truth (the demo's checks), when there is one."""
    if truth is None:
        return []
    out = []
    if truth.b0_error_vs_truth_median_hz is not None:
        out.append(_measure(item=item, kind="truth_b0_error", label="B0 map against the modelled field",
                                   region="brain, median absolute error", unit="Hz",
                                   before=None, after=truth.b0_error_vs_truth_median_hz, higher_is_better=False))
    if truth.edge_agreement_shifted_after is not None and runs:
        out.append(_measure(item=runs[0].stem, kind="truth_edges_moved",
                                   label="Edge agreement with the undistorted simulation where voxels moved",
                                   region="the demo's own check: brain voxels moved by more than half a voxel, "
                                          "every edge counted", unit=NGF_UNIT,
                                   before=truth.edge_agreement_shifted_before,
                                   after=truth.edge_agreement_shifted_after, higher_is_better=True))
    if truth.shift_error_vs_truth_median_vox is not None and runs:
        out.append(_measure(item=runs[0].stem, kind="truth_shift_error", label="Shift against the true field's shift",
                            region="brain, median absolute error", unit="voxels", before=None,
                            after=truth.shift_error_vs_truth_median_vox, higher_is_better=False))
    return out


#: The truth measures of the first run, shown beside its own edge agreement.
_RUN_TRUTH = ("truth_edges_moved", "truth_shift_error")


def headline(runs: list[ReportRun], pair_records: dict, truth: DemoChecks | None, field_map: str | None
             ) -> list[HeadlineMeasure]:
    """Every headline number in page order (see the module docstring).

    `pair_records` maps a run's stem to the pair record of its field map (or None).
    """
    out: list[HeadlineMeasure] = []
    truth_items = truth_measures(field_map or "field map", runs, truth)
    for n, run in enumerate(runs):
        first, beside = run_measures(run)
        out += first + polarity_measures(run.stem, pair_records.get(run.stem))
        if n == 0:
            out += [m for m in truth_items if m.kind in _RUN_TRUTH]
        out += beside
    out += [m for m in truth_items if m.kind not in _RUN_TRUTH or not runs]
    return out
