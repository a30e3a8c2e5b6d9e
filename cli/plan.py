"""``fieldfix plan``: rank candidate protocols by the signal they keep in a region of interest."""

from __future__ import annotations

import argparse

HELP = "sweep slice thickness, echo time, tilt and phase-encode polarity over a B0 map and rank the protocols"


def configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--b0", required=True, metavar="B0_HZ", help="B0 map in Hz (3D NIfTI), measured or modelled")
    parser.add_argument("--roi", required=True, metavar="ROI_MASK", help="region-of-interest mask")
    parser.add_argument("--brain-mask", metavar="MASK", default=None,
                        help="whole-brain mask (default: non-zero voxels of the B0 map)")
    parser.add_argument("--te", required=True, metavar="TIMES", help="echo times, e.g. 25ms,30ms,35ms")
    parser.add_argument("--thickness", required=True, metavar="LENGTHS", help="slice thicknesses, e.g. 2mm,2.5mm,3mm")
    parser.add_argument("--tilt", metavar="ANGLES", default="0deg",
                        help="tilts about the left-right axis, list or range, e.g. -30deg:30deg:10deg")
    parser.add_argument("--zshim", metavar="MOMENTS", default=None,
                        help="z-shim moments to try, e.g. 0mT*ms/m,-0.5mT*ms/m")
    parser.add_argument("--orientation", choices=("axial", "coronal", "sagittal"), default="axial",
                        help="untilted slice orientation (default axial)")
    parser.add_argument("--pe-axis", choices=("x", "y", "z"), default="y",
                        help="world axis of phase encoding before tilt: x left-right, y posterior-anterior (default), "
                             "z inferior-superior")
    parser.add_argument("--echo-spacing", metavar="TIME", default=None,
                        help="effective echo spacing, e.g. 0.5ms: ranks by BOLD sensitivity and sweeps both "
                             "phase-encode polarities (without it: through-plane retention only)")
    parser.add_argument("--polarity", choices=("both", "+", "-"), default="both",
                        help="phase-encode polarities to sweep (default both)")
    parser.add_argument("--pe-lines", type=int, default=64, help="phase-encode lines of the full k-space (default 64)")
    parser.add_argument("--inplane", metavar="LENGTH", default="3mm", help="in-plane voxel size (default 3mm)")
    parser.add_argument("--partial-fourier", metavar="FRACTION", default="1",
                        help="fraction of k-space acquired along phase encoding, e.g. 6/8 (default 1)")
    parser.add_argument("--profile", choices=("rect", "gaussian", "rf"), default="rect", help="slice profile")
    parser.add_argument("--tbw", type=float, default=4.0, help="time-bandwidth product of the RF pulse (default 4)")
    parser.add_argument("--threshold", type=float, default=0.5, help="level counted as lost (default 0.5)")
    parser.add_argument("--gap", metavar="LENGTH", default="0mm", help="gap between slices (default 0mm)")
    parser.add_argument("--time-per-slice", metavar="TIME", default="60ms", help="time per slice (default 60ms)")
    parser.add_argument("--multiband", type=int, default=1, help="slices excited together (default 1)")
    parser.add_argument("--max-tr", metavar="TIME", default=None, help="longest acceptable TR, e.g. 2.5s")
    parser.add_argument("--coverage", choices=("brain", "roi"), default="brain",
                        help="mask the slices must cover (default brain)")
    parser.add_argument("--tolerance", type=float, default=0.01,
                        help="ROI medians this close to the best count as equal when recommending (default 0.01)")
    from .main import add_tag_option

    add_tag_option(parser)
    parser.epilog = "Writes plan.csv (ranked table), plan.json (recommendation, reason, all rows) and plan.png."


#: Library parameters -> the options that set them (for error messages).
FLAGS = {"te_s": "--te", "thickness_mm": "--thickness", "tilt_deg": "--tilt", "pe_lines": "--pe-lines",
         "multiband": "--multiband", "max_tr_s": "--max-tr", "echo_spacing_s": "--echo-spacing", "tag": "--tag"}
#: Options whose values may start with '-' (e.g. --tilt -30deg:30deg:10deg).
DASH_VALUES = ("--tilt", "--zshim")


def run(args) -> dict:
    from fieldfix.errors import InputError
    from fieldfix.units import parse_length_mm, parse_quantity_list, parse_time_s
    from fieldfix.workflows.plan import run_plan

    from .dropout import parse_fraction

    if args.pe_lines < 2 or args.multiband < 1:
        raise InputError("--pe-lines must be at least 2 and --multiband at least 1")
    signs = {"both": (1, -1), "+": (1,), "-": (-1,)}[args.polarity]
    from .main import job_options

    job = job_options(args)
    summary = run_plan(
        args.b0, job, roi_path=args.roi, brain_mask_path=args.brain_mask,
        te_s=parse_quantity_list(args.te, "time"), thickness_mm=parse_quantity_list(args.thickness, "length"),
        tilt_deg=parse_quantity_list(args.tilt, "angle"), pe_signs=signs,
        zshim_mtms_per_m=parse_quantity_list(args.zshim, "moment") if args.zshim else (0.0,),
        orientation=args.orientation, pe_world_axis=args.pe_axis, inplane_mm=parse_length_mm(args.inplane),
        pe_lines=args.pe_lines, echo_spacing_s=parse_time_s(args.echo_spacing) if args.echo_spacing else None,
        partial_fourier=parse_fraction(args.partial_fourier), profile=args.profile, tbw=args.tbw,
        threshold=args.threshold, slice_gap_mm=parse_length_mm(args.gap),
        time_per_slice_s=parse_time_s(args.time_per_slice), multiband=args.multiband,
        max_tr_s=parse_time_s(args.max_tr) if args.max_tr else None, tolerance=args.tolerance,
        coverage=args.coverage,
    )
    data = summary.to_json()
    data["outputs"] = {k: str(v) for k, v in summary.outputs.paths(job.out_dir).items()}
    return {k: data[k] for k in ("protocols", "metric", "recommended", "reason", "outputs", "caution")}
