"""``fieldfix report``: build the quality report of an output folder or of job summaries."""

from __future__ import annotations

import argparse

HELP = ("build a self-contained HTML quality report (plus a summary PNG and JSON) from an output folder "
        "or from job summary files")

#: Shown after the options in --help.
EPILOG = (
    "Writes report.html (one file, everything inline, no network requests), report_summary.png "
    "and report.json into --out (default: the folder, or the folder holding all the summaries). --out may "
    "also name the page itself, e.g. --out qc/sub-01.html."
)

#: The report goes into FOLDER itself unless --out is given.
OUT_REQUIRED = False


def _source(args):
    return args.sources[0] if len(args.sources) == 1 else list(args.sources)


def _default_folder(args):
    from fieldfix.report import report_files

    return report_files(_source(args))[0]


def output_root(args):
    """The folder the report is written in: --out (or the folder of the page it names), else
    the source folder (or the folder of the first summary)."""
    from pathlib import Path

    if args.out is None:
        return _default_folder(args)
    out = Path(args.out)
    return out.parent if out.suffix.lower() in (".html", ".htm") else out


def configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("sources", nargs="+", metavar="SOURCE",
                        help="a folder written by fieldfix fieldmap, unwarp, dropout or plan, or job summary files "
                             "(b0_summary.json, <run>_unwarp.json, dropout.json, plan.json)")
    parser.add_argument("--title", default=None, help="page title (default: the folder name)")


def run(args) -> dict:
    from fieldfix.outputs import ReportSummary
    from fieldfix.report import build_report

    out = args.out if args.out is not None else _default_folder(args)
    page = build_report(_source(args), out, title=args.title, overwrite=args.overwrite)
    record = ReportSummary.read(page.with_name(page.stem + ".json"))
    return {"report": str(page), "summary_figure": str(page.with_name(record.outputs.png)),
            "numbers": str(page.with_name(record.outputs.json)),
            "warnings": [f"{w.where}: {w.message}" for w in record.warnings]}
