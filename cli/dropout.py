"""``fieldfix dropout``: predict signal retention and BOLD sensitivity from a B0 map or a modelled field."""

from __future__ import annotations

import argparse

from ._field_model import MODEL_FLAGS, add_field_options

HELP = "predict signal retention and BOLD sensitivity for one protocol from a B0 map (Hz) or a modelled field"

#: Takes --tag (added by the frame with the common options).
TAGGED = True

#: Shown after the options in --help.
EPILOG = (
    "Writes retention.nii.gz (through-plane retention at the nominal TE), bold_sensitivity.nii.gz "
    "(with --phase-encoding and an echo spacing) and dropout.json, on the B0 map's grid; with "
    "--like on another grid, also retention_on_epi.nii.gz and bold_sensitivity_on_epi.nii.gz "
    "resampled onto the EPI grid. Without --b0 the field is modelled on the model's grid, its "
    "brain is the default --mask, and modelled_b0_hz.nii.gz holds the field used."
)


def configure(parser: argparse.ArgumentParser) -> None:
    add_field_options(parser, field_strength_help="the modelled field's strength (default 3T); with --b0, the "
                                                  "field strength of a map in ppm (default: its sidecar's "
                                                  "MagneticFieldStrength)")
    from .main import plausible

    parser.add_argument("--te", required=True, metavar="TIME",
                        help=f"echo time with its unit, e.g. 30ms ({plausible('te_s')})")
    parser.add_argument("--thickness", required=True, metavar="LENGTH",
                        help=f"slice thickness, e.g. 3mm ({plausible('thickness_mm')})")
    where = parser.add_mutually_exclusive_group()
    where.add_argument("--like", metavar="EPI", default=None,
                       help="EPI image whose grid gives the slice and phase-encode geometry (and sidecar timing)")
    where.add_argument("--slice-axis", metavar="AXIS", choices=("i", "j", "k"), default=None,
                       help="voxel axis of the B0 grid across slices: i, j or k (default k)")
    parser.add_argument("--tilt", metavar="ANGLE", default="0deg",
                        help="extra tilt about the left-right axis, e.g. 15deg (positive: anterior edge up; "
                             f"{plausible('tilt_deg')})")
    parser.add_argument("--phase-encoding", metavar="CODE", default=None,
                        help="BIDS phase-encode code (i, i-, j, j-, k, k-) on the --like grid or the B0 grid")
    parser.add_argument("--echo-spacing", metavar="TIME", default=None,
                        help=f"effective echo spacing, e.g. 0.5ms (needed for BOLD sensitivity; {plausible('echo_spacing_s')})")
    parser.add_argument("--partial-fourier", metavar="FRACTION", default=None,
                        help="fraction of k-space acquired along phase encoding, e.g. 6/8 or 0.75 (default: the "
                             "--like sidecar's PartialFourier, else 1)")
    parser.add_argument("--profile", choices=("rect", "gaussian", "rf"), default="rect",
                        help="slice profile: ideal slab, Gaussian, or windowed-sinc RF pulse (default rect)")
    parser.add_argument("--tbw", type=float, default=4.0, help="time-bandwidth product of the RF pulse (default 4)")
    parser.add_argument("--zshim", metavar="MOMENT", default=None,
                        help=f"z-shim moment along the slice normal, e.g. -0.5mT*ms/m ({plausible('zshim_mtms_per_m')})")
    parser.add_argument("--mask", metavar="MASK", default=None, help="brain mask (statistics; maps are 0 outside)")
    parser.add_argument("--threshold", type=float, default=0.5, help="level counted as lost (default 0.5)")


def parse_fraction(text: str) -> float:
    """'6/8' or '0.75' -> 0.75 (dimensionless)."""
    from fieldfix.errors import InputError

    try:
        if "/" in text:
            num, den = text.split("/")
            return float(num) / float(den)
        return float(text)
    except (ValueError, ZeroDivisionError):
        raise InputError(f"cannot read {text!r} as a fraction; write e.g. 6/8 or 0.75") from None


#: Library parameters -> the options that set them (for error messages).
FLAGS = {"te_s": "--te", "thickness_mm": "--thickness", "tilt_deg": "--tilt", "pe_code": "--phase-encoding",
         "echo_spacing_s": "--echo-spacing", "partial_fourier": "--partial-fourier", "profile": "--profile",
         "zshim_mtms_per_m": "--zshim", "threshold": "--threshold", "tag": "--tag", **MODEL_FLAGS}
#: Options whose values may start with '-' (e.g. --tilt -15deg, --zshim -0.5mT*ms/m).
DASH_VALUES = ("--tilt", "--zshim", "--phase-encoding", "--te", "--thickness", "--echo-spacing")


def run(args) -> dict:
    from fieldfix.units import parse_checked
    from fieldfix.workflows.dropout import DropoutSettings, run_dropout

    from ._field_model import field_strength_t, modelled_field_of
    from .main import job_options

    model = modelled_field_of(args)
    settings = DropoutSettings(
        te_s=parse_checked(args.te, "te_s"), thickness_mm=parse_checked(args.thickness, "thickness_mm"), like=args.like,
        slice_axis="ijk".index(args.slice_axis) if args.slice_axis else None,
        tilt_deg=parse_checked(args.tilt, "tilt_deg"), pe_code=args.phase_encoding,
        echo_spacing_s=parse_checked(args.echo_spacing, "echo_spacing_s") if args.echo_spacing else None,
        partial_fourier=parse_fraction(args.partial_fourier) if args.partial_fourier else None,
        profile=args.profile, tbw=args.tbw,
        zshim_mtms_per_m=parse_checked(args.zshim, "zshim_mtms_per_m") if args.zshim else 0.0, mask=args.mask,
        threshold=args.threshold, field_strength_t=field_strength_t(args, None) if model is None else None)
    job = job_options(args)
    summary = run_dropout(args.b0, job, settings, model=model)
    out = {"b0": summary.b0, "field_source": summary.field_source, "retention": summary.retention.to_json(),
           "outputs": {k: str(v) for k, v in summary.outputs.paths(job.out_dir).items()}}
    if summary.bold_sensitivity is not None:
        out["bold_sensitivity"] = summary.bold_sensitivity.to_json()
        out["phase_encoding"] = f"{summary.parameters.pe_code} ({summary.pe_direction_world})"
        out["percent_echo_lost"] = summary.percent_echo_lost
    out["caution"] = summary.caution
    return out
