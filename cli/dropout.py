"""``fieldfix dropout``: predict through-plane signal retention and BOLD sensitivity from a B0 map."""

from __future__ import annotations

import argparse
import re

HELP = "predict signal retention and BOLD sensitivity for one protocol from a B0 map (Hz)"


def configure(parser: argparse.ArgumentParser) -> None:
    # Let values such as -30deg:30deg:10deg or -0.5mT*ms/m follow an option (argparse would take
    # anything starting with '-' and not a plain number for an option name).
    parser._negative_number_matcher = re.compile(r"^-\.?\d")
    parser.add_argument("--b0", required=True, metavar="B0_HZ", help="B0 map in Hz (3D NIfTI)")
    parser.add_argument("--te", required=True, metavar="TIME", help="echo time with its unit, e.g. 30ms")
    parser.add_argument("--thickness", required=True, metavar="LENGTH", help="slice thickness, e.g. 3mm")
    where = parser.add_mutually_exclusive_group()
    where.add_argument("--like", metavar="EPI", default=None,
                       help="EPI image whose grid gives the slice and phase-encode geometry (and sidecar timing)")
    where.add_argument("--slice-axis", metavar="AXIS", choices=("i", "j", "k"), default=None,
                       help="voxel axis of the B0 grid across slices: i, j or k (default k)")
    parser.add_argument("--tilt", metavar="ANGLE", default="0deg",
                        help="extra tilt about the left-right axis, e.g. 15deg (positive: anterior edge up)")
    parser.add_argument("--phase-encoding", metavar="CODE", default=None,
                        help="BIDS phase-encode code (i, i-, j, j-, k, k-) on the --like grid or the B0 grid")
    parser.add_argument("--echo-spacing", metavar="TIME", default=None,
                        help="effective echo spacing, e.g. 0.5ms (needed for BOLD sensitivity)")
    parser.add_argument("--partial-fourier", metavar="FRACTION", default="1",
                        help="fraction of k-space acquired along phase encoding, e.g. 6/8 or 0.75 (default 1)")
    parser.add_argument("--profile", choices=("rect", "gaussian", "rf"), default="rect",
                        help="slice profile: ideal slab, Gaussian, or windowed-sinc RF pulse (default rect)")
    parser.add_argument("--tbw", type=float, default=4.0, help="time-bandwidth product of the RF pulse (default 4)")
    parser.add_argument("--zshim", metavar="MOMENT", default=None,
                        help="z-shim moment along the slice normal, e.g. -0.5mT*ms/m")
    parser.add_argument("--mask", metavar="MASK", default=None, help="brain mask (statistics; maps are 0 outside)")
    parser.add_argument("--threshold", type=float, default=0.5, help="level counted as lost (default 0.5)")
    parser.add_argument("--prefix", default="", help="prepended to every output file name")
    parser.epilog = ("Writes retention.nii.gz (through-plane retention at the nominal TE), bold_sensitivity.nii.gz "
                     "(with --phase-encoding and an echo spacing) and dropout.json, on the B0 map's grid; with "
                     "--like on another grid, also retention_on_epi.nii.gz and bold_sensitivity_on_epi.nii.gz "
                     "resampled onto the EPI grid.")


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


def run(args) -> dict:
    from fieldfix.units import parse_angle_deg, parse_length_mm, parse_quantity, parse_time_s
    from fieldfix.workflows.dropout import run_dropout

    summary = run_dropout(
        args.b0, args.out, te_s=parse_time_s(args.te), thickness_mm=parse_length_mm(args.thickness),
        like_path=args.like, slice_axis="ijk".index(args.slice_axis) if args.slice_axis else None,
        tilt_deg=parse_angle_deg(args.tilt), pe_code=args.phase_encoding,
        echo_spacing_s=parse_time_s(args.echo_spacing) if args.echo_spacing else None,
        partial_fourier=parse_fraction(args.partial_fourier), profile=args.profile, tbw=args.tbw,
        zshim_mtms_per_m=parse_quantity(args.zshim, "moment") if args.zshim else 0.0, mask_path=args.mask,
        threshold=args.threshold, prefix=args.prefix, overwrite=args.overwrite, progress=args.progress,
        command=getattr(args, "command_line", None),
    )
    out = {"retention": summary["retention"], "outputs": summary["outputs"]}
    if "bold_sensitivity" in summary:
        out["bold_sensitivity"] = summary["bold_sensitivity"]
        out["phase_encoding"] = f"{summary['parameters']['pe_code']} ({summary['pe_direction_world']})"
        out["percent_echo_lost"] = summary["percent_echo_lost"]
    out["caution"] = summary["caution"]
    return out
