"""The per-subject report: an adapter to the report builder, and what the group table reads back.

The report package being written takes the job summaries themselves
(``build_report(summaries, out_path=..., title=...)``; the outputs a summary names are
file names relative to its folder). Until it lands, :func:`subject_report` feeds today's
folder-based :func:`fieldfix.report.build_report` by linking each summary's outputs under
the workflows' own names into a private folder beside the staging folder; switching is the
one line marked below, and :func:`_through_folder` then goes.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

from ..io import image_stem, sidecar_path
from ..jsonfile import read_json
from ..outputs import DropoutFiles, DropoutSummary, FieldMapFiles, FieldMapSummary, UnwarpFiles, UnwarpSummary
from ..records import Record
from ..report import build_report
from .bids import parse_bids_name

__all__ = ["ReportFiles", "SubjectReport", "subject_report", "report_alignment"]

_SUMMARIES = {"fieldmap": FieldMapSummary, "unwarp": UnwarpSummary, "dropout": DropoutSummary}


@dataclass(frozen=True)
class ReportFiles(Record):
    """A subject report's files (names inside its folder)."""

    html: str
    numbers: str
    figure: str | None = None


@dataclass(frozen=True)
class SubjectReport(Record):
    """What the report task made."""

    outputs: ReportFiles


def subject_report(summaries: list[Path], out_dir: Path, *, title: str) -> SubjectReport:
    """Build one subject's report from its derivative job summaries into `out_dir`."""
    html = _through_folder(summaries, out_dir, title)
    # when the report package lands: html = build_report(summaries, out_path=out_dir, title=title)
    html = Path(html)
    figure = html.with_name("report_summary.png")
    return SubjectReport(outputs=ReportFiles(html=html.name, numbers="report.json",
                                             figure=figure.name if figure.is_file() else None))


def _native_files(record, summary_path: Path):
    """The names the workflow itself gives this summary's outputs (today's report finds them so)."""
    files = record.outputs
    if isinstance(record, FieldMapSummary):
        parsed = parse_bids_name(summary_path.name)
        tag = parsed.stem(drop=("desc",)) + "_"
        units = [u for u, role in (("rad/s", files.b0_rads), ("ppm", files.b0_ppm)) if role is not None]
        return FieldMapFiles.named(tag, units)
    if isinstance(record, UnwarpSummary):
        return UnwarpFiles.named(image_stem(record.run))
    return DropoutFiles.named(image_stem(record.geometry_from) + "_", bold=files.bold_sensitivity is not None,
                              on_epi=files.retention_on_epi is not None)


def _links_for(summary_path: Path) -> list[tuple[Path, str]]:
    data = read_json(summary_path)
    record = _SUMMARIES[data.get("kind")].from_json(data, summary_path)
    native, files = _native_files(record, summary_path), record.outputs
    links = []
    for role, name in native.paths(".").items():
        derived = getattr(files, role)
        if derived is None:
            continue
        links.append((summary_path.parent / derived, name.name))
        if role in files.IMAGES and sidecar_path(summary_path.parent / derived).is_file():
            links.append((sidecar_path(summary_path.parent / derived), sidecar_path(name).name))
    return links


def _through_folder(summaries: list[Path], out_dir: Path, title: str) -> Path:
    gather = out_dir.with_name(out_dir.name + "-in")
    gather.mkdir()
    made = []
    try:
        for summary in summaries:
            for target, name in _links_for(summary):
                os.symlink(target, gather / name)
                made.append(gather / name)
        return build_report(gather, out_path=out_dir, title=title)
    finally:
        for link in made:
            if link.is_symlink():
                link.unlink()
        gather.rmdir()


def report_alignment(numbers_path: Path) -> dict[str, float]:
    """Run stem -> alignment gain (edge agreement after - before) from a report's ``report.json``.

    Read by the report's own keys (``runs`` entries with ``stem``,
    ``edge_agreement_before`` and ``edge_agreement_after``) until the report has a record.
    """
    gains = {}
    for run in read_json(numbers_path).get("runs") or []:
        before, after = run.get("edge_agreement_before"), run.get("edge_agreement_after")
        if isinstance(before, (int, float)) and isinstance(after, (int, float)) and isinstance(run.get("stem"), str):
            gains[run["stem"]] = float(after) - float(before)
    return gains
