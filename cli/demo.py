"""``fieldfix demo``: the whole job on an invented sample scenario."""

from __future__ import annotations

import argparse

HELP = "run the whole job (field map, unwarping, dropout, plan, report) on an invented sample scenario"

#: Shown after the options in --help.
EPILOG = (
    "The scenario's dataset (BIDS layout, with its ground truth) is built into DIR/dataset on first use "
    "and reused by later runs into the same DIR. --out receives the B0 map, the corrected "
    "run with its shift and Jacobian maps, dropout and plan results, report.html and demo_summary.json."
)


def configure(parser: argparse.ArgumentParser) -> None:
    from fieldfix.scenarios import list_scenarios
    from fieldfix.workflows.demo import DEFAULT_SCENARIO

    names = list_scenarios()
    parser.add_argument("--scenario", default=DEFAULT_SCENARIO, metavar="NAME",
                        help=f"sample scenario name ({', '.join(names) or 'none found'}) or a folder holding "
                             f"a scenario.json (default: {DEFAULT_SCENARIO})")


def _seconds(step) -> str:
    return f" ({step.seconds:.1f} s)" if step.seconds is not None else ""


def _human(summary) -> dict:
    steps = summary.steps
    n = summary.checks_against_truth
    did = {}
    ds = steps["dataset"]
    did["dataset"] = f"{ds.status} {ds.path}{_seconds(ds)}"
    for name, step in steps.items():
        if name != "dataset":
            did[name] = "done" + _seconds(step) + (f" -> {step.outputs[0]}" if step.outputs else "")
    results = {}
    if n.b0_brain_p1_p99_hz is not None:
        lo, hi = n.b0_brain_p1_p99_hz
        results["B0 in the brain (1st to 99th percentile)"] = f"{lo:+.0f} to {hi:+.0f} Hz"
    if n.b0_error_vs_truth_median_hz is not None:
        results["B0 map vs modelled field"] = (f"median error {n.b0_error_vs_truth_median_hz:.1f} Hz, "
                                               f"95% within {n.b0_error_vs_truth_p95_hz:.1f} Hz")
    if n.max_abs_shift_vox is not None:
        results["shift along phase encoding"] = (
            f"largest {n.max_abs_shift_vox:.1f} voxels, {n.percent_shifted_over_1_voxel:.1f}% of voxels moved by "
            "more than 1 voxel")
    if n.shift_error_vs_truth_median_vox is not None:
        results["shift vs the true field's shift, in the brain"] = (
            f"median error {n.shift_error_vs_truth_median_vox:.2f} voxels, 95% within "
            f"{n.shift_error_vs_truth_p95_vox:.2f} voxels")
    if n.edge_agreement_before is not None:
        text = ""
        if n.edge_agreement_shifted_before is not None:
            text = (f"in the brain where voxels moved: {n.edge_agreement_shifted_before:.3f} before -> "
                    f"{n.edge_agreement_shifted_after:.3f} after unwarping "
                    f"({n.edge_agreement_shifted_true_field:.3f} with the true field); ")
        results["edges vs undistorted simulation"] = text + (
            f"whole brain: {n.edge_agreement_before:.3f} -> {n.edge_agreement_after:.3f} "
            f"({n.edge_agreement_true_field:.3f}; 1 = all in place)")
    if n.dropout_brain_median_retention is not None:
        text = (f"brain keeps a median {100 * n.dropout_brain_median_retention:.0f}% of its signal, "
                f"{n.dropout_brain_percent_below_threshold:.1f}% of voxels under half")
        if n.dropout_roi_mean_retention is not None:
            text += f"; region of interest {100 * n.dropout_roi_mean_retention:.0f}% predicted"
            if n.roi_signal_kept is not None:
                text += f" (simulated: {100 * n.roi_signal_kept:.0f}%)"
        results["dropout predicted for this protocol"] = text
    if n.plan_recommended is not None:
        text = n.plan_recommended + f" (median BOLD sensitivity {n.plan_recommended_roi_median:.2f} in the region)"
        results[f"best of {n.plan_protocols_compared} protocols for the region"] = text
    out = {"scenario": f"{summary.scenario}: {summary.title} (invented)", "did": did, "results": results}
    if summary.warnings:
        out["warnings"] = summary.warnings
    if summary.report:
        out["open the report"] = summary.report
    out["all outputs"] = summary.out_dir
    out["time"] = f"{summary.seconds:.0f} s"
    out["note"] = summary.caution
    return out


def run(args) -> dict:
    from fieldfix.workflows.demo import run_demo

    summary = run_demo(args.out, scenario=args.scenario, overwrite=args.overwrite, progress=args.progress,
                       command=getattr(args, "command_line", None))
    return summary if args.json else _human(summary)
