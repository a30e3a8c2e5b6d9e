"""Findings a reader should see before trusting the figures ("anything suspicious?").

Rules (the thresholds are ours and are printed on the page):

* the field exceeds the unaliased range of the echo pair in some mask voxels;
* the field-map mask covers less than :data:`LOW_COVERAGE_FRACTION` of the bright magnitude;
* a run has folded voxels in its mask;
* a run's edge agreement where voxels moved (else over the mask) falls by more than
  :data:`EDGE_WORSE_TOLERANCE` after correction, or changes by no more than that although
  voxels moved by more than one voxel; some slices agree less after correction;
* the unwarping job warned (partial coverage of the run by the B0 map);
* the echo leaves the acquisition window in some voxels of a dropout prediction.

Examples
--------
>>> "folded voxels" in RULES
True
"""

from __future__ import annotations

from ..outputs import ReportDropout, ReportFieldMap, ReportRun, ReportWarning

__all__ = ["LOW_COVERAGE_FRACTION", "EDGE_WORSE_TOLERANCE", "field_map_warnings", "run_warnings",
           "dropout_warnings", "collect_warnings", "RULES"]

LOW_COVERAGE_FRACTION = 0.7
EDGE_WORSE_TOLERANCE = 0.01

RULES = (f"field beyond the unaliased range in any mask voxel; field-map mask covering less than "
         f"{LOW_COVERAGE_FRACTION:.0%} of the magnitude above Otsu's threshold; folded voxels; edge agreement "
         f"(where voxels moved, else over the mask) falling by more than {EDGE_WORSE_TOLERANCE} after correction, "
         f"or changing by no more than that although voxels moved by more than 1 voxel; a slice falling by more "
         f"than 0.02; the unwarping job's own warnings; echoes outside the acquisition window")


def field_map_warnings(fm: ReportFieldMap) -> list[ReportWarning]:
    """Warnings of one field map."""
    out = []
    if fm.percent_mask_beyond_unaliased_range and fm.unaliased_range_hz is not None:
        out.append(ReportWarning(
            "field_beyond_unaliased_range", fm.name,
            f"{fm.percent_mask_beyond_unaliased_range:.2f}% of the mask has |field| above "
            f"\u00b1{fm.unaliased_range_hz:.1f} Hz, the unaliased range of the echo pair; these values rest on "
            "spatial unwrapping: look for 2\u03c0 jumps."))
    if fm.mask_coverage is not None and fm.mask_coverage < LOW_COVERAGE_FRACTION:
        out.append(ReportWarning(
            "low_mask_coverage", fm.name,
            f"the field-map mask covers only {100 * fm.mask_coverage:.0f}% of the bright part of the magnitude image "
            f"(less than {100 * LOW_COVERAGE_FRACTION:.0f}%); outside it the field is extrapolated."))
    return out


def _edge_warnings(run: ReportRun) -> list[ReportWarning]:
    before, after = run.edge_agreement_before, run.edge_agreement_after
    region = "over the mask"
    if run.edge_agreement_shifted_before is not None and run.edge_agreement_shifted_after is not None:
        before, after = run.edge_agreement_shifted_before, run.edge_agreement_shifted_after
        region = "where voxels moved"
    out = []
    if before is not None and after is not None:
        if after < before - EDGE_WORSE_TOLERANCE:
            out.append(ReportWarning(
                "edges_worse", run.stem,
                f"edge agreement {region} fell from {before:.3f} to {after:.3f} (NGF, 0\u20131) after correction: "
                "check the phase-encode direction and polarity and the readout time."))
        elif after <= before + EDGE_WORSE_TOLERANCE and run.percent_shifted_over_1_voxel > 0:
            out.append(ReportWarning(
                "edges_unchanged", run.stem,
                f"edge agreement {region} barely changed ({before:.3f} before, {after:.3f} after, NGF 0\u20131) "
                f"although {run.percent_shifted_over_1_voxel:.1f}% of the mask moved by more than 1 voxel."))
    if run.slices_worse_mm:
        shown = ", ".join(f"{z:g} mm" for z in run.slices_worse_mm[:12]) + (" ..." if len(run.slices_worse_mm) > 12
                                                                             else "")
        out.append(ReportWarning("edges_disagree_slices", run.stem,
                                 f"edges agree less after correction in {len(run.slices_worse_mm)} slice(s), at "
                                 f"z = {shown}."))
    return out


def run_warnings(run: ReportRun) -> list[ReportWarning]:
    """Warnings of one unwarped run."""
    out = []
    if run.folded_voxels:
        out.append(ReportWarning("folds", run.stem,
                                 f"{run.folded_voxels} voxels of the mask fold (Jacobian at or below "
                                 f"{run.jacobian_floor:g}); their corrected intensities are not reliable."))
    out += _edge_warnings(run)
    out += [ReportWarning("job_warning", run.stem, text) for text in run.job_warnings]
    return out


def dropout_warnings(drop: ReportDropout) -> list[ReportWarning]:
    """Warnings of one dropout prediction."""
    if drop.percent_echo_lost:
        return [ReportWarning("echo_outside_window", drop.name,
                              f"in {drop.percent_echo_lost:.1f}% of the mask the local echo leaves the acquisition "
                              "window: the signal there is predicted lost whatever the slice profile.")]
    return []


def collect_warnings(field_maps: list[ReportFieldMap], runs: list[ReportRun], dropout: list[ReportDropout]
                     ) -> list[ReportWarning]:
    """Every warning of a report, field maps first."""
    out = []
    for fm in field_maps:
        out += field_map_warnings(fm)
    for run in runs:
        out += run_warnings(run)
    for drop in dropout:
        out += dropout_warnings(drop)
    return out
