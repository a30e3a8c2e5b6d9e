"""``fieldfix batch``: correct a whole BIDS dataset, locally or on a dask cluster."""

from __future__ import annotations

import argparse
import logging
import re
import sys

from fieldfix.errors import FieldfixError, InputError
from fieldfix.units import parse_angle_deg, parse_length_mm, parse_time_s

HELP = "correct every run of a BIDS dataset into a derivatives dataset (local processes or dask)"

#: Shown after the options in --help.
EPILOG = (
    "Outputs form a BIDS derivatives dataset in --out; one batch at a time writes into it. Finished outputs "
    "whose inputs and parameters are unchanged are kept, so an interrupted batch resumes where it stopped; "
    "--overwrite redoes everything. Exit status: 0 every run with a field map corrected, 1 some run or task "
    "failed (listed at the end and in DIR/logs), 2 bad input or the folder is busy."
)

#: Library parameters -> the options that set them (for error messages).
FLAGS = {"jobs": "--jobs", "phase_units": "--phase-units", "smooth_mm": "--smooth", "unwrap_method": "--unwrap",
         "interp": "--interp", "dropout_te_s": "--dropout-te", "dropout_thickness_mm": "--dropout-thickness",
         "dropout_tilt_deg": "--dropout-tilt", "masks": "--masks", "allow_outside_inputs": "--allow-outside-inputs",
         "participant label": "--participant-label"}
DASH_VALUES = ("--dropout-tilt",)


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number of processes, got {text!r}")
    if value < 1:
        raise argparse.ArgumentTypeError(f"needs at least 1 process, got {value}")
    return value


def _processing_options(parser: argparse.ArgumentParser) -> None:
    opts = parser.add_argument_group("processing options (for every run; they win over --config)")
    opts.add_argument("--config", metavar="FILE", help="JSON or TOML file of the options below (keys phase_units, "
                                                       "smooth, unwrap, interp, dropout_te, dropout_thickness, "
                                                       "dropout_tilt, masks)")
    opts.add_argument("--phase-units", choices=("rad", "deg", "counts4096", "counts8192"), default=None,
                      help="phase convention of every phase image (default: detected; a sidecar Units the values "
                           "contradict is refused)")
    opts.add_argument("--smooth", metavar="FWHM", help="field-map smoothing width with unit (default 4mm)")
    opts.add_argument("--unwrap", choices=("quality", "laplacian"), default=None, help="spatial unwrapping")
    opts.add_argument("--interp", choices=("linear", "cubic", "sinc"), default=None,
                      help="interpolation of the unwarping (default cubic)")
    opts.add_argument("--no-align", action="store_true", default=None,
                      help="place each field map through the scanner coordinates alone (default: its magnitude is "
                           "aligned to each run, distortion in the loop)")
    opts.add_argument("--motion", action="store_true", default=None,
                      help="follow head motion through each run (per-volume poses, one interpolation, a motion "
                           "table per run)")
    opts.add_argument("--dropout-te", metavar="TIME", help="echo time of the dropout prediction (default: each "
                                                           "run's EchoTime)")
    opts.add_argument("--dropout-thickness", metavar="LENGTH", help="slice thickness of the dropout prediction "
                                                                    "(default: SliceThickness or the voxel size)")
    opts.add_argument("--dropout-tilt", metavar="ANGLE", help="extra slice tilt of the dropout prediction (0deg)")
    opts.add_argument("--masks", choices=("fieldmap", "none"), default=None,
                      help="use the field map's mask for statistics and dropout maps (default), or none")


def configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("bids_root", metavar="BIDS_ROOT", help="the raw BIDS dataset")
    parser.add_argument("--participant-label", nargs="+", metavar="LABEL", default=None,
                        help="subjects to process (01 or sub-01); all by default")
    parser.add_argument("--no-report", action="store_true",
                        help="skip the per-subject reports (the group summary is still written)")
    parser.add_argument("--dry-run", action="store_true",
                        help="list what would be done for each EPI run (no image is read, nothing is written)")
    parser.add_argument("--allow-outside-inputs", action="store_true",
                        help="use data files that resolve through links outside the dataset (refused by default)")
    where = parser.add_mutually_exclusive_group()
    where.add_argument("--jobs", type=_positive_int, default=1, metavar="N",
                       help="worker processes on this machine (default 1: in this process)")
    where.add_argument("--scheduler", metavar="ADDR", help="address of a dask.distributed scheduler, e.g. "
                                                           "tcp://node1:8786")
    where.add_argument("--scheduler-file", metavar="F",
                       help="dask scheduler file (from 'dask scheduler --scheduler-file F')")
    _processing_options(parser)


class _FailureLines(logging.Handler):
    """One line per failed task on standard error, the library's parameter names shown as options."""

    def emit(self, record):
        text = record.getMessage()
        for parameter, flag in FLAGS.items():
            text = re.sub(rf"(?<![\w-]){re.escape(parameter)}(?![\w-])", flag, text)
        print(f"fieldfix batch: {text}", file=sys.stderr)


def _quantity(text, parse, flag: str):
    if text is None:
        return None
    try:
        return parse(text)
    except FieldfixError as err:
        raise InputError(err.message, parameter=flag) from None


def _options(args, options_type):
    given = {"phase_units": args.phase_units, "unwrap_method": args.unwrap, "interp": args.interp,
             "masks": args.masks, "smooth_mm": _quantity(args.smooth, parse_length_mm, "--smooth"),
             "dropout_te_s": _quantity(args.dropout_te, parse_time_s, "--dropout-te"),
             "dropout_thickness_mm": _quantity(args.dropout_thickness, parse_length_mm, "--dropout-thickness"),
             "dropout_tilt_deg": _quantity(args.dropout_tilt, parse_angle_deg, "--dropout-tilt"),
             "align_fieldmap": False if args.no_align else None, "motion": True if args.motion else None}
    return options_type(**{k: v for k, v in given.items() if v is not None})


def run(args):
    # heavy (the workflows, numba, the report): imported when a batch runs, not for every command's start
    from fieldfix.batch import BatchOptions, run_batch

    if args.out is None:
        raise InputError("--out DIR is required")
    handler = None
    logger = logging.getLogger("fieldfix.batch")
    if not args.quiet:
        handler = _FailureLines(level=logging.WARNING)
        logger.addHandler(handler)
    try:
        result = run_batch(
            args.bids_root, args.out, participant_labels=args.participant_label, jobs=args.jobs,
            scheduler=args.scheduler, scheduler_file=args.scheduler_file,
            command=getattr(args, "command_line", None), progress=args.progress, redo=args.overwrite,
            reports=not args.no_report, options=_options(args, BatchOptions), config=args.config,
            allow_outside_inputs=args.allow_outside_inputs, dry_run=args.dry_run)
    finally:
        if handler is not None:
            logger.removeHandler(handler)
    if args.dry_run:  # one entry per EPI run
        return [entry.to_json() for entry in result.runs]
    return result
