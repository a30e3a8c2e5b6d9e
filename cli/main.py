"""The ``fieldfix`` command: a thin layer over the library.

Each subcommand is a module of this package defining ``HELP`` (one line),
``configure(parser)`` and ``run(args) -> dict``, and optionally ``EPILOG`` (text after the
options), ``TAGGED`` (takes ``--tag``), ``FLAGS``, ``DASH_VALUES``, ``OUT_REQUIRED``,
``ALL_OR_NOTHING`` and ``output_root(args)``. The frame adds the common options,
turns fieldfix errors into one line on standard error with exit status 2, prints the
summary (as JSON with ``--json``), and makes SIGTERM interrupt cleanly so that atomic
writers remove their temporary files.
"""

from __future__ import annotations

import argparse
import contextlib
import importlib
import logging
import signal
import sys
import traceback

from fieldfix import __version__
from fieldfix.errors import FieldfixError
from fieldfix.io import output_folder, output_transaction

#: Subcommands in the order shown by --help.
SUBCOMMANDS = ("fieldmap", "unwarp", "dropout", "plan", "report", "batch", "demo")

from fieldfix.outputs import CAUTION  # noqa: E402  (one caution text everywhere)

DESCRIPTION = f"""\
fieldfix: B0 field maps from dual-echo gradient-echo data, EPI distortion correction along the
phase-encode axis with Jacobian intensity correction, and susceptibility-dropout prediction for
choosing a protocol.

{CAUTION}

Quantities need their units: 4.92ms, 0.5ms, 2.5mm, 15deg, 3T.
"""

EXIT_OK, EXIT_FAILED, EXIT_BAD_INPUT, EXIT_INTERRUPTED = 0, 1, 2, 130


class _Parser(argparse.ArgumentParser):
    """argparse parser whose usage errors are one line and exit status 2."""

    def error(self, message):
        self.exit(EXIT_BAD_INPUT, f"{self.prog}: error: {message} (see {self.prog} --help)\n")


def _load_subcommands():
    modules = {}
    for name in SUBCOMMANDS:
        try:
            modules[name] = importlib.import_module(f"fieldfix_cli.{name}")
        except ModuleNotFoundError as err:
            if err.name != f"fieldfix_cli.{name}":
                raise
    return modules


def add_common_options(parser: argparse.ArgumentParser, *, out_required: bool = True, tagged: bool = False) -> None:
    """Options every subcommand takes (and ``--tag`` for those whose module sets ``TAGGED``)."""
    group = parser.add_argument_group("common options")
    group.add_argument("--out", metavar="DIR", required=out_required, help="output folder (created if missing)")
    if tagged:
        add_tag_option(group)
    group.add_argument("--overwrite", action="store_true",
                       help="replace earlier fieldfix outputs in DIR (input files are never replaced)")
    group.add_argument("--quiet", action="store_true", help="no progress bars and no summary text")
    group.add_argument("--json", action="store_true", help="print a machine-readable summary on stdout")
    group.add_argument("--debug", action="store_true", help="show the full traceback of an error")


def plausible(name: str) -> str:
    """The plausible range of a quantity, for --help texts (see fieldfix.units.PLAUSIBLE)."""
    from fieldfix.units import PLAUSIBLE

    return f"plausible {PLAUSIBLE[name].text()}"


def add_tag_option(parser: argparse.ArgumentParser) -> None:
    """The option that puts a tag at the start of every output file name."""
    parser.add_argument("--tag", default="", metavar="TEXT",
                        help="put TEXT at the start of every output file name (e.g. sub-01_)")


def job_options(args):
    """The library's :class:`fieldfix.outputs.JobOptions` from the common options."""
    from fieldfix.outputs import JobOptions

    return JobOptions(out_dir=args.out, tag=getattr(args, "tag", ""), overwrite=args.overwrite,
                      progress=args.progress, command=getattr(args, "command_line", None))


def _join_dash_values(argv: list[str], parser: argparse.ArgumentParser) -> list[str]:
    """``--tilt -30deg:30deg`` -> ``--tilt=-30deg:30deg`` for options whose values may start with '-'.

    A subcommand lists those options in ``DASH_VALUES``; argparse would take such a value for an
    option name otherwise.
    """
    if len(argv) < 2 or argv[0] not in SUBCOMMANDS:
        return argv
    module = _load_subcommands().get(argv[0])
    options = set(getattr(module, "DASH_VALUES", ()))
    out, i = [], 0
    while i < len(argv):
        token = argv[i]
        if token in options and i + 1 < len(argv) and argv[i + 1].startswith("-") and not argv[i + 1].startswith("--"):
            out.append(f"{token}={argv[i + 1]}")
            i += 2
            continue
        out.append(token)
        i += 1
    return out


def error_text(err: FieldfixError, module) -> str:
    """An error's one line, with the library's parameter names shown as the command's options."""
    import re

    flags = getattr(module, "FLAGS", {})
    text = str(err)
    if err.path is None and err.parameter is not None:
        text = f"{flags.get(err.parameter, err.parameter)}: {err.message}"
    for parameter, flag in flags.items():
        text = re.sub(rf"(?<![\w-]){re.escape(parameter)}(?![\w-])", flag, text)
    return text


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="fieldfix", description=DESCRIPTION, formatter_class=argparse.RawDescriptionHelpFormatter,
                     epilog="Run 'fieldfix COMMAND --help' for the options of a command.")
    parser.add_argument("--version", action="version", version=f"fieldfix {__version__}")
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for name, module in _load_subcommands().items():
        sub = subparsers.add_parser(name, help=module.HELP, description=f"{module.HELP}\n\n{CAUTION}",
                                    epilog=getattr(module, "EPILOG", None),
                                    formatter_class=argparse.RawDescriptionHelpFormatter)
        module.configure(sub)
        add_common_options(sub, out_required=getattr(module, "OUT_REQUIRED", True),
                           tagged=getattr(module, "TAGGED", False))
        sub.set_defaults(_module=module)
    return parser


def format_summary(summary, indent: str = "") -> str:
    """Readable multi-line text of a (nested) summary dict."""
    lines = []
    if isinstance(summary, dict):
        for key, value in summary.items():
            if isinstance(value, (dict, list)) and value:
                lines.append(f"{indent}{key}:")
                lines.append(format_summary(value, indent + "  "))
            else:
                lines.append(f"{indent}{key}: {_short(value)}")
    elif isinstance(summary, list):
        for item in summary:
            if isinstance(item, dict):
                lines.append(f"{indent}-")
                lines.append(format_summary(item, indent + "  "))
            else:
                lines.append(f"{indent}- {_short(item)}")
    return "\n".join(lines)


def _short(value) -> str:
    if isinstance(value, float):
        return f"{value:.4g}"
    return str(value)


def _raise_interrupt(signum, frame):
    raise KeyboardInterrupt


def main(argv=None) -> int:
    """Entry point of the ``fieldfix`` console script; returns the exit status."""
    parser = build_parser()
    args = parser.parse_args(_join_dash_values(list(sys.argv[1:] if argv is None else argv), parser))
    if args.command is None:
        parser.print_help()
        return EXIT_BAD_INPUT
    args.progress = (not args.quiet) and sys.stderr.isatty()
    args.command_line = "fieldfix " + " ".join(sys.argv[1:] if argv is None else list(argv))
    previous = signal.signal(signal.SIGTERM, _raise_interrupt)
    # nibabel logs header fix-ups of damaged files ("sizeof_hdr should be 348 ...") to stderr;
    # the error line names the problem, so keep stderr to that one line unless --debug.
    nibabel_logger = logging.getLogger("nibabel.global")
    nibabel_level = nibabel_logger.level
    if not args.debug:
        nibabel_logger.setLevel(logging.CRITICAL)
    # All or nothing: when a command fails or is interrupted half-way, the outputs it already
    # put in place are removed again (and files it replaced restored). batch keeps finished
    # jobs of a failed batch on purpose (it resumes), so it opts out.
    all_or_nothing = getattr(args._module, "ALL_OR_NOTHING", args.command != "batch")
    try:
        # Everything the command writes, replaces or deletes must lie inside its output folder.
        root = getattr(args._module, "output_root", lambda a: a.out)(args)
        with output_folder(root) if root else contextlib.nullcontext(), \
                output_transaction() if all_or_nothing else contextlib.nullcontext():
            summary = args._module.run(args)
    except FieldfixError as err:
        if args.debug:
            traceback.print_exc()
        print(f"fieldfix {args.command}: error: {error_text(err, args._module)}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except MemoryError:
        if args.debug:
            traceback.print_exc()
        print(f"fieldfix {args.command}: error: out of memory: the job needed more memory than this machine or "
              "process could give; unfinished outputs were removed (inputs are not damaged)", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        print(f"fieldfix {args.command}: interrupted; unfinished outputs were removed", file=sys.stderr)
        return EXIT_INTERRUPTED
    finally:
        signal.signal(signal.SIGTERM, previous)
        nibabel_logger.setLevel(nibabel_level)
    status = EXIT_OK
    if hasattr(summary, "to_json"):
        summary = summary.to_json()
    if isinstance(summary, dict) and summary.get("exit_status") is not None:
        status = int(summary.pop("exit_status"))
    if args.json:
        from fieldfix.jsonfile import json_text

        print(json_text(summary), end="")
    elif not args.quiet and summary:
        print(format_summary(summary))
    return status


def entry() -> None:  # pragma: no cover - thin wrapper for python -m
    sys.exit(main())


if __name__ == "__main__":  # pragma: no cover
    entry()
