"""``fieldfix fieldmap``: gradient-echo field-map images -> B0 map in Hz."""

from __future__ import annotations

import argparse

HELP = "make a B0 map in Hz from dual-/multi-echo gradient-echo images, with 3D phase unwrapping"

#: Takes --tag (added by the frame with the common options).
TAGGED = True

#: Shown after the options in --help.
EPILOG = (
    "Field (Hz) = phase gained between the echoes / (2 pi x echo spacing), unambiguous within "
    "+-1/(2 x spacing) before unwrapping. With --epi-pair the field is the smooth one under which the "
    "images, each unwarped with its own shift and Jacobian, agree. --out receives b0_hz.nii.gz (extended "
    "beyond the mask), b0_mask.nii.gz, b0_magnitude.nii.gz and b0_summary.json; with --epi-pair also "
    "b0_confidence.nii.gz and b0_epi_corrected.nii.gz (the inputs corrected)."
)


def configure(parser: argparse.ArgumentParser) -> None:
    from .main import plausible

    src = parser.add_argument_group("inputs (one kind)")
    src.add_argument("--phase", nargs="+", metavar="P", default=[],
                     help="phase image per echo (radians, degrees or scanner integer counts)")
    src.add_argument("--magnitude", nargs="+", metavar="M", default=[],
                     help="magnitude image per echo, or one for all echoes")
    src.add_argument("--real", nargs="+", metavar="RE", default=[], help="real part per echo")
    src.add_argument("--imag", nargs="+", metavar="IM", default=[], help="imaginary part per echo")
    src.add_argument("--phase-diff", metavar="PD", default=None,
                     help="phase-difference image (echo 2 minus echo 1); needs --magnitude or --mask")
    src.add_argument("--b0", metavar="MAP", default=None, help="ready field map, converted to Hz and extended")
    src.add_argument("--b0-units", choices=("hz", "rad/s", "ppm", "T"), default=None,
                     help="units of --b0 (default: the sidecar's Units)")
    src.add_argument("--epi-pair", nargs="+", metavar="EPI", default=[],
                     help="EPI images (3D or 4D) acquired with reversed phase encoding (blip up / blip down, "
                          "e.g. the BIDS fmap/*_dir-*_epi images); codes and timing from their sidecars")
    opts = parser.add_argument_group("options")
    opts.add_argument("--echo-times", nargs="+", metavar="TIME", default=None,
                      help=f"echo times with units, e.g. 4.92ms 7.38ms (default: BIDS sidecars; {plausible('echo_times_s')})")
    opts.add_argument("--echo-times-win", choices=("arguments", "sidecar"), default=None,
                      help="which echo times win when --echo-times contradicts the sidecars "
                           "(default: stop with an error)")
    opts.add_argument("--phase-units", choices=("rad", "deg", "counts4096", "counts8192"), default=None,
                      help="phase convention (default: detected per image; ambiguous images are refused)")
    opts.add_argument("--mask", metavar="MASK", default=None,
                      help="mask on the field-map grid (default: from the magnitude)")
    opts.add_argument("--smooth", metavar="FWHM", default="4mm",
                      help="masked smoothing width (FWHM) with unit, 0mm for none (default: 4mm)")
    opts.add_argument("--unwrap", choices=("quality", "laplacian"), default="quality",
                      help="spatial unwrapping: quality-guided (default) or Laplacian (for very noisy data)")
    opts.add_argument("--field-strength", metavar="FIELD", default=None,
                      help=f"main field, e.g. 3T (needed for ppm; default: the sidecar's MagneticFieldStrength; "
                           f"{plausible('field_strength_t')})")
    opts.add_argument("--also", nargs="+", choices=("rad/s", "ppm"), default=[],
                      help="also write the map in these units")
    opts.add_argument("--keep-outliers", action="store_true", help="do not replace outlier voxels")
    pair = parser.add_argument_group("reversed phase-encode images (with --epi-pair)")
    pair.add_argument("--phase-encoding", nargs="+", metavar="CODE", default=None,
                      help="BIDS phase-encode code per image, or per volume (default: each sidecar's "
                           "PhaseEncodingDirection)")
    pair.add_argument("--readout-time", nargs="+", metavar="TIME", default=None,
                      help="total readout time per image, or per volume, with its unit, e.g. 45.6ms "
                           "(default: each sidecar's TotalReadoutTime / EffectiveEchoSpacing)")
    pair.add_argument("--timing-wins", choices=("arguments", "sidecar"), default=None,
                      help="which source wins when codes or timing given here contradict a sidecar "
                           "(default: stop with an error)")
    pair.add_argument("--pair-motion", action="store_true",
                      help="also estimate a rigid head motion between the polarities")


#: Library parameters -> the options that set them (for error messages).
FLAGS = {"echo_times_s": "--echo-times", "echo_times_win": "--echo-times-win", "phase_units": "--phase-units",
         "smooth_mm": "--smooth", "unwrap_method": "--unwrap", "field_strength_t": "--field-strength",
         "also_units": "--also", "b0_units": "--b0-units", "tag": "--tag", "epi_pe_codes": "--phase-encoding",
         "epi_readout_times_s": "--readout-time", "epi_win": "--timing-wins", "epi": "--epi-pair"}


def run(args) -> dict:
    from fieldfix.units import parse_checked
    from fieldfix.workflows.fieldmap import FieldMapSettings, run_fieldmap

    from .main import job_options

    settings = FieldMapSettings(
        phase=args.phase, magnitude=args.magnitude, real=args.real, imag=args.imag, phase_diff=args.phase_diff,
        b0=args.b0, b0_units=args.b0_units, mask=args.mask,
        echo_times_s=[parse_checked(t, "echo_times_s") for t in args.echo_times] if args.echo_times else None,
        echo_times_win=args.echo_times_win, phase_units=args.phase_units,
        smooth_mm=parse_checked(args.smooth, "smooth_mm"), unwrap_method=args.unwrap,
        field_strength_t=parse_checked(args.field_strength, "field_strength_t") if args.field_strength else None,
        also_units=args.also, reject_outliers=not args.keep_outliers, epi=args.epi_pair,
        epi_pe_codes=args.phase_encoding,
        epi_readout_times_s=[parse_checked(t, "readout_time_s", "epi_readout_times_s") for t in args.readout_time]
        if args.readout_time else None,
        epi_win=args.timing_wins, pair_motion=args.pair_motion)
    summary = run_fieldmap(job_options(args), settings)
    if getattr(args, "json", False):
        return summary
    pct = summary.field_percentiles_hz
    short = {
        "b0_map": str(args_path(args, summary.outputs.b0_hz)),
        "input": summary.input_kind,
        "echo_times_ms": [round(t * 1e3, 4) for t in summary.echo_times_s] if summary.echo_times_s else None,
        "echo_times_from": summary.echo_times_source,
        "unaliased_range_hz": summary.unaliased_range_hz,
        "phase_units": [f"{p.units} ({p.how})" for p in summary.phase_units],
        "mask_volume_ml": summary.mask_volume_ml,
        "field_hz_p5_p50_p95": [pct["p5"], pct["p50"], pct["p95"]],
        "voxels_offset_changed": summary.voxels_offset_changed,
        "outlier_voxels": summary.outlier_voxels,
        "images_agree": (f"normalised RMS difference {summary.pair.nrmsd_before:.3f} as acquired -> "
                         f"{summary.pair.nrmsd_after:.3f} corrected" if summary.pair else None),
        "caution": summary.caution,
    }
    return {k: v for k, v in short.items() if v is not None}


def args_path(args, name: str):
    from pathlib import Path

    return Path(args.out) / name
