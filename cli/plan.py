"""``fieldfix plan``: rank candidate protocols by the signal they keep in a region of interest."""

from __future__ import annotations

import argparse

from ._field_model import MODEL_FLAGS, add_field_options

HELP = "sweep slice thickness, echo time, tilt and phase-encode polarity over a B0 map and rank the protocols"

#: Takes --tag (added by the frame with the common options).
TAGGED = True

#: Shown after the options in --help.
EPILOG = (
    "Writes plan.csv (ranked table), plan.json (recommendation, reason, all rows, the columns in words "
    "with units) and plan.png; without --b0 also plan_modelled_b0_hz.nii.gz, the modelled field. "
    "The figure of merit is relative: no absolute SNR is claimed."
)


def configure(parser: argparse.ArgumentParser) -> None:
    add_field_options(parser, field_strength_help="sets the default T2* and the physiological noise, and the "
                                                  "modelled field's strength (default 3T)")
    parser.add_argument("--roi", required=True, metavar="ROI", help="region-of-interest mask, or a label image with "
                                                                   "--roi-label")
    parser.add_argument("--roi-label", metavar="VALUES", default=None,
                        help="label values of the --roi image that form the ROI, e.g. 11,12")
    parser.add_argument("--like", metavar="EPI", default=None,
                        help="pilot EPI: orientation, phase-encode axis and lines, in-plane size, thickness and the "
                             "sidecar's EffectiveEchoSpacing, EchoTime, PartialFourier (typed options win)")
    parser.add_argument("--brain-mask", metavar="MASK", default=None,
                        help="whole-brain mask (default: non-zero voxels of the B0 map)")
    parser.add_argument("--te", default=None, metavar="TIMES", help="echo times, e.g. 25ms,30ms,35ms")
    parser.add_argument("--thickness", default=None, metavar="LENGTHS", help="slice thicknesses, e.g. 2mm,2.5mm,3mm")
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
    parser.add_argument("--pe-lines", type=int, default=None,
                        help="phase-encode lines of the full k-space (default 64, or the --like image's)")
    parser.add_argument("--inplane", metavar="LENGTH", default=None,
                        help="in-plane voxel size (default 3mm, or the --like image's)")
    parser.add_argument("--partial-fourier", metavar="FRACTION", default=None,
                        help="fraction of k-space acquired along phase encoding, e.g. 6/8 (default 1, or the --like "
                             "sidecar's PartialFourier)")
    parser.add_argument("--profile", choices=("rect", "gaussian", "rf"), default="rect", help="slice profile")
    parser.add_argument("--tbw", type=float, default=4.0, help="time-bandwidth product of the RF pulse (default 4)")
    parser.add_argument("--threshold", type=float, default=0.5, help="level counted as lost (default 0.5)")
    parser.add_argument("--gap", metavar="LENGTH", default="0mm", help="gap between slices (default 0mm)")
    parser.add_argument("--time-per-slice", metavar="TIME", default=None,
                        help="fixed time per slice (default: 6 ms + TE + the lines after the k-space centre)")
    parser.add_argument("--multiband", type=int, default=1, help="slices excited together (default 1)")
    parser.add_argument("--max-tr", metavar="TIME", default="3s",
                        help="longest acceptable TR (default 3s, the upper end of whole-brain fMRI TRs); a warning "
                             "when no protocol fits")
    parser.add_argument("--tr", metavar="TIME", default=None,
                        help="run every protocol at this TR (dead time after the slices) instead of its shortest")
    parser.add_argument("--rank-by", choices=("efficiency", "retention"), default=None,
                        help="efficiency: BOLD contrast-to-noise per unit time (default with --echo-spacing); "
                             "retention: the ROI median of the signal metric only")
    parser.add_argument("--t2star", metavar="TIME", default=None,
                        help="T2* of the tissue (default grey matter at --field-strength: 60/45/27 ms at 1.5/3/7 T)")
    parser.add_argument("--physio-noise", type=float, default=0.011,
                        help="physiological noise as a fraction of the signal (default 0.011; 0 for thermal only)")
    parser.add_argument("--coverage", choices=("brain", "roi"), default="brain",
                        help="mask the slices must cover (default brain)")
    parser.add_argument("--tolerance", type=float, default=0.01,
                        help="ROI medians this close to the best count as equal when recommending (default 0.01)")


#: Library parameters -> the options that set them (for error messages).
FLAGS = {"te_s": "--te", "thickness_mm": "--thickness", "tilt_deg": "--tilt", "pe_lines": "--pe-lines",
         "multiband": "--multiband", "max_tr_s": "--max-tr", "fixed_tr_s": "--tr", "echo_spacing_s": "--echo-spacing",
         "tag": "--tag", "t2star_s": "--t2star", "rank_by": "--rank-by", "time_per_slice_s": "--time-per-slice",
         "lambda_physio": "--physio-noise", **MODEL_FLAGS}
#: Options whose values may start with '-' (e.g. --tilt -30deg:30deg:10deg).
DASH_VALUES = ("--tilt", "--zshim")


def _spec(args):
    """The sweep specification of the options (a new knob: one line here, one field in SweepSpec)."""
    import dataclasses

    from fieldfix.plan import SweepSpec
    from fieldfix.plan_merit import Physiology
    from fieldfix.units import parse_checked, parse_length_mm, parse_quantity_list
    from fieldfix.workflows._plan_pilot import spec_from_pilot

    from ._field_model import field_strength_t
    from .dropout import parse_fraction

    field_t = field_strength_t(args)
    typed = {
        "te_s": parse_quantity_list(args.te, "time") if args.te else None,
        "thickness_mm": parse_quantity_list(args.thickness, "length") if args.thickness else None,
        "pe_lines": args.pe_lines, "inplane_mm": parse_length_mm(args.inplane) if args.inplane else None,
        "echo_spacing_s": parse_checked(args.echo_spacing, "echo_spacing_s") if args.echo_spacing else None,
        "partial_fourier": parse_fraction(args.partial_fourier) if args.partial_fourier else None,
    }
    typed = {k: v for k, v in typed.items() if v is not None}
    spec = SweepSpec(
        tilt_deg=parse_quantity_list(args.tilt, "angle"), pe_signs={"both": (1, -1), "+": (1,), "-": (-1,)}[args.polarity],
        zshim_mtms_per_m=parse_quantity_list(args.zshim, "moment") if args.zshim else (0.0,),
        orientation=args.orientation, pe_world_axis=args.pe_axis, profile=args.profile, tbw=args.tbw,
        threshold=args.threshold, slice_gap_mm=parse_length_mm(args.gap),
        time_per_slice_s=parse_checked(args.time_per_slice, "time_per_slice_s") if args.time_per_slice else None,
        multiband=args.multiband, max_tr_s=parse_checked(args.max_tr, "max_tr_s") if args.max_tr else None,
        fixed_tr_s=parse_checked(args.tr, "max_tr_s", "fixed_tr_s") if args.tr else None, coverage=args.coverage,
        rank_by=args.rank_by, tolerance=args.tolerance,
        physiology=Physiology.at(field_t, parse_checked(args.t2star, "t2star_s") if args.t2star else None,
                                 lambda_physio=args.physio_noise))
    if args.like:
        spec = spec_from_pilot(args.like, spec, given=set(typed))
    return dataclasses.replace(spec, **typed)


def run(args) -> dict:
    from fieldfix.errors import InputError
    from fieldfix.workflows.plan import run_plan

    from ._field_model import modelled_field_of, whole_numbers
    from .main import job_options

    if (args.pe_lines is not None and args.pe_lines < 2) or args.multiband < 1:
        raise InputError("--pe-lines must be at least 2 and --multiband at least 1")
    if not args.like and not (args.te and args.thickness):
        raise InputError("--te and --thickness are needed (or --like a pilot EPI to take them from)")
    labels = whole_numbers(args.roi_label, "--roi-label") if args.roi_label else None
    model = modelled_field_of(args)
    spec = _spec(args)
    job = job_options(args)
    summary = run_plan(args.b0, job, roi_path=args.roi, brain_mask_path=args.brain_mask, spec=spec,
                       roi_labels=labels, model=model)
    data = summary.to_json()
    data["outputs"] = {k: str(v) for k, v in summary.outputs.paths(job.out_dir).items()}
    keys = ("protocols", "metric", "ranking", "field_source", "recommended", "reason", "warnings", "outputs", "caution")
    return {k: data[k] for k in keys}
