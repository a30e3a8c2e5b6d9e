"""``fieldfix batch``: correct a whole BIDS dataset, locally or on a dask cluster."""

from __future__ import annotations

import argparse
import logging
import sys

from fieldfix.errors import InputError

HELP = "correct every run of a BIDS dataset into a derivatives dataset (local processes or dask)"


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number of processes, got {text!r}")
    if value < 1:
        raise argparse.ArgumentTypeError(f"needs at least 1 process, got {value}")
    return value


def configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("bids_root", metavar="BIDS_ROOT", help="the raw BIDS dataset")
    parser.add_argument("--participant-label", nargs="+", metavar="LABEL", default=None,
                        help="subjects to process (01 or sub-01); all by default")
    parser.add_argument("--no-report", action="store_true",
                        help="skip the per-subject reports (the group summary is still written)")
    where = parser.add_mutually_exclusive_group()
    where.add_argument("--jobs", type=_positive_int, default=1, metavar="N",
                       help="worker processes on this machine (default 1: in this process)")
    where.add_argument("--scheduler", metavar="ADDR",
                       help="address of a dask.distributed scheduler, e.g. tcp://node1:8786")
    where.add_argument("--scheduler-file", metavar="F",
                       help="dask scheduler file (from 'dask scheduler --scheduler-file F')")
    parser.epilog = (
        "Outputs form a BIDS derivatives dataset in --out. Finished outputs whose inputs and "
        "parameters are unchanged are kept, so an interrupted batch resumes where it stopped; "
        "--overwrite redoes everything. Exit status: 0 all good, 1 some task failed "
        "(listed at the end and in DIR/logs), 2 bad input."
    )


class _FailureLines(logging.Handler):
    def emit(self, record):
        print(f"fieldfix batch: {record.getMessage()}", file=sys.stderr)


def run(args) -> dict:
    from fieldfix.batch import run_batch

    if args.out is None:
        raise InputError("--out DIR is required")
    handler = None
    logger = logging.getLogger("fieldfix.batch")
    if not args.quiet:
        handler = _FailureLines(level=logging.WARNING)
        logger.addHandler(handler)
    try:
        return run_batch(
            args.bids_root, args.out, participant_labels=args.participant_label,
            jobs=args.jobs, scheduler=args.scheduler, scheduler_file=args.scheduler_file,
            command=getattr(args, "command_line", None), progress=args.progress,
            redo=args.overwrite, reports=not args.no_report,
        )
    finally:
        if handler is not None:
            logger.removeHandler(handler)
