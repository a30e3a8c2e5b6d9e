"""``fieldfix report``: build the quality report of an output folder."""

from __future__ import annotations

import argparse

HELP = "build a self-contained HTML quality report (plus a summary PNG and JSON) from an output folder"

#: The report goes into FOLDER itself unless --out is given.
OUT_REQUIRED = False


def output_root(args):
    """The folder the report is written in: --out (or the folder of the page it names), else FOLDER."""
    from pathlib import Path

    if args.out is None:
        return args.folder
    out = Path(args.out)
    return out.parent if out.suffix.lower() in (".html", ".htm") else out


def configure(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("folder", metavar="FOLDER",
                        help="a folder written by fieldfix fieldmap, unwarp, dropout or plan")
    parser.add_argument("--title", default=None, help="page title (default: the folder name)")
    parser.epilog = (
        "Writes report.html (one file, everything inline, no network requests), report_summary.png "
        "and report.json into --out (default: FOLDER). --out may also name the page itself, "
        "e.g. --out qc/sub-01.html."
    )


def run(args) -> dict:
    from fieldfix.report import build_report

    page = build_report(args.folder, out_path=args.out, title=args.title, overwrite=args.overwrite)
    summary = {"report": str(page),
               "summary_figure": str(page.with_name(page.stem + "_summary.png")),
               "numbers": str(page.with_name(page.stem + ".json"))}
    import json

    data = json.loads(page.with_name(page.stem + ".json").read_text(encoding="utf-8"))
    summary["warnings"] = [f"{w['where']}: {w['message']}" for w in data.get("warnings", [])]
    return summary
