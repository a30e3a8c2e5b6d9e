"""``fieldfix unwarp``: correct EPI runs along the phase-encode axis with a B0 map."""

from __future__ import annotations

import argparse
import sys

HELP = "unwarp EPI runs along the phase-encode axis with a B0 map (Hz), with Jacobian intensity correction"

#: Takes --tag (added by the frame with the common options).
TAGGED = True

#: Shown after the options in --help.
EPILOG = (
    "Shift in voxels = field (Hz) x effective echo spacing (s) x phase-encode lines; with a total "
    "readout time, echo spacing = readout time / (lines - 1). For each RUN, --out receives "
    "<stem>_corrected.nii.gz, _shift_vox, _jacobian, _fold_mask, _displacement_mm (NIfTI vector "
    "field, world mm; .nii instead of .nii.gz for a .nii run or --compress none) and <stem>_unwarp.json, "
    "and a quality report (report.html, report_summary.png, report.json) unless --no-report."
)


#: On/off options of unwarp beyond the basic ones, with their help.
SWITCHES = (
    ("--no-align",
      "place the field map through the scanner coordinates alone (by default its magnitude is aligned "
      "to each run's first volume, distortion in the loop, so a head that moved between the scans gets "
      "the field where it is)"),
    ("--motion",
      "also follow head motion through each run: per-volume rigid poses, the field moving with the "
      "head, motion and distortion undone in one interpolation; writes <stem>_motion.tsv (six columns "
      "and framewise displacement)"),
    ("--combine-polarities",
      "with two runs of opposite phase-encode polarity (blip up / blip down), also write one run "
      "restored jointly from both (<first stem>_combined.nii.gz), which recovers compressed regions a "
      "single polarity cannot"),
    ("--force",
      "correct even when shifts over the run's signal exceed half the field of view along the phase-"
      "encode axis, which almost always means a unit or timing mistake (large but plausible shifts are "
      "corrected with a warning)"),
)


def configure(parser: argparse.ArgumentParser) -> None:
    from .main import plausible

    parser.add_argument("runs", nargs="+", metavar="RUN", help="EPI runs (3D or 4D NIfTI) sharing one B0 map")
    parser.add_argument("--b0", required=True, metavar="B0_HZ", help="B0 map in Hz (undistorted space)")
    parser.add_argument("--phase-encoding", metavar="CODE", default=None,
                        help="BIDS phase-encode code: i, i-, j, j-, k or k- (default: the run's sidecar)")
    timing = parser.add_mutually_exclusive_group()
    timing.add_argument("--readout-time", metavar="TIME", default=None,
                        help=f"total readout time with its unit, e.g. 45.6ms (default: the sidecar; {plausible('readout_time_s')})")
    timing.add_argument("--echo-spacing", metavar="TIME", default=None,
                        help=f"effective echo spacing with its unit, e.g. 0.5ms (default: the sidecar; "
                             f"{plausible('echo_spacing_s')})")
    parser.add_argument("--te", metavar="TIME", default=None,
                        help="echo time of the runs with its unit, e.g. 30ms (default: the sidecar's EchoTime); "
                             "the field-map alignment models the signal each run loses under the field at it")
    parser.add_argument("--timing-wins", choices=("arguments", "sidecar"), default=None,
                        help="which source wins when the options contradict a sidecar (default: stop with an error)")
    parser.add_argument("--interp", choices=("cubic", "linear", "sinc"), default="cubic",
                        help="interpolation along the phase-encode axis (default: cubic B-spline, exact on samples)")
    parser.add_argument("--compress", choices=("auto", "gzip", "none"), default="auto",
                        help="image outputs as .nii.gz (gzip) or .nii (none); default auto: as each run")
    parser.add_argument("--gzip-effort", choices=("fast", "small"), default="fast",
                        help="gzip of .nii.gz outputs: fast (ISA-L level 1, the default) or small (level 3: about "
                             "2.5x slower, int16 files a few percent smaller)")
    parser.add_argument("--no-jacobian", action="store_true", help="skip the Jacobian intensity correction")
    parser.add_argument("--b0-mask", metavar="MASK", default=None,
                        help="mask of the B0 map, for the statistics (default: b0_mask beside the B0 map if present)")
    parser.add_argument("--b0-magnitude", metavar="MAG", default=None,
                        help="the field map's magnitude, for aligning the map to each run (default: b0_magnitude "
                             "beside the B0 map, as fieldfix fieldmap writes it)")
    for flag, text in SWITCHES:
        parser.add_argument(flag, action="store_true", help=text)
    parser.add_argument("--displacement-frame", choices=("ras", "lps"), default="ras",
                        help="world frame of the displacement field's vectors: ras (NIfTI, default) or lps (the "
                             "physical space most registration toolkits expect; x and y negated)")
    parser.add_argument("--no-report", action="store_true",
                        help="do not build the HTML quality report (report.html) in the output folder")


#: Library parameters -> the options that set them (for error messages).
FLAGS = {"pe_code": "--phase-encoding", "readout_time_s": "--readout-time", "echo_spacing_s": "--echo-spacing",
         "te_s": "--te", "timing_win": "--timing-wins", "interp": "--interp", "b0_mask": "--b0-mask", "force": "--force",
         "tag": "--tag", "combine_polarities": "--combine-polarities", "compress": "--compress",
         "gzip_effort": "--gzip-effort"}
DASH_VALUES = ("--phase-encoding",)


def run(args) -> dict:
    from pathlib import Path

    from fieldfix.units import parse_checked
    from fieldfix.workflows.unwarp import UnwarpSettings, run_unwarp

    from .main import job_options

    settings = UnwarpSettings(
        pe_code=args.phase_encoding,
        readout_time_s=parse_checked(args.readout_time, "readout_time_s") if args.readout_time is not None else None,
        echo_spacing_s=parse_checked(args.echo_spacing, "echo_spacing_s") if args.echo_spacing is not None else None,
        te_s=parse_checked(args.te, "te_s") if args.te is not None else None,
        timing_win=args.timing_wins, interp=args.interp, jacobian=not args.no_jacobian, b0_mask=args.b0_mask,
        force=args.force, combine_polarities=args.combine_polarities, align_fieldmap=not args.no_align,
        b0_magnitude=args.b0_magnitude, motion=args.motion, displacement_frame=args.displacement_frame, compress=args.compress,
        gzip_effort=args.gzip_effort)
    job = job_options(args)
    summaries = run_unwarp(args.runs, args.b0, job, settings)
    runs = []
    for item in summaries:
        runs.append({
            "run": item.run,
            "corrected": str(job.path(item.outputs.corrected)),
            "phase_encoding": f"{item.pe_code} ({item.pe_direction_world})",
            "readout_time_ms": item.timing.readout_time_s * 1e3,
            "max_abs_shift_mm": item.max_abs_shift_mm,
            "percent_shifted_over_1_voxel": item.percent_shifted_over_1_voxel,
            "folded_voxels": item.folded_voxels,
            "volumes": item.n_volumes,
            "warnings": item.warnings,
        })
        for warning in item.warnings:
            print(f"fieldfix unwarp: warning: {item.run}: {warning}", file=sys.stderr)
    result = {"runs": runs}
    if args.combine_polarities:
        from fieldfix.io import image_stem
        from fieldfix.outputs import CombinedFiles

        result["combined"] = str(job.path(CombinedFiles.named(image_stem(args.runs[0]), job.tag).corrected))
    if not args.no_report:
        from fieldfix.report import build_report, field_map_summary_beside, summary_paths

        sources = summary_paths(args.out)
        beside = field_map_summary_beside(args.b0)  # the field map the runs were corrected with
        if beside is not None and all(p.resolve() != beside.resolve() for p in sources):
            sources.append(beside)
        target = Path(args.out) / f"{job.tag}report.html"
        result["report"] = str(build_report(sources, target, overwrite=args.overwrite))
    result["caution"] = summaries[0].caution
    return result
