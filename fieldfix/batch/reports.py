"""The per-subject report, built from the subject's derivative job summaries, and what the group
table reads back from it (the report's typed numbers, :class:`fieldfix.outputs.ReportSummary`).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from ..outputs import ReportFiles, ReportSummary
from ..records import Record
from ..report import build_report

__all__ = ["SubjectReport", "subject_report", "report_alignment"]


@dataclass(frozen=True)
class SubjectReport(Record):
    """What the report task made (names inside its folder)."""

    outputs: ReportFiles


def subject_report(summaries: list[Path], out_dir: Path, *, title: str) -> SubjectReport:
    """Build one subject's report from its derivative job summaries into `out_dir`.

    The summaries name their outputs relative to their own folders and are vouched for by the
    derivatives' ledger, so the report opens them (and the distorted runs) directly.
    """
    html = build_report(list(summaries), out_path=out_dir, title=title)
    return SubjectReport(outputs=ReportFiles.named(Path(html).stem))


def report_alignment(numbers_path: Path) -> dict[str, float]:
    """Run stem -> alignment gain: edge agreement after - before where the correction moved voxels
    (over the whole mask when no moved region was measured), from a report's ``report.json``."""
    gains = {}
    for run in ReportSummary.read(numbers_path).runs:
        before, after = run.edge_agreement_shifted_before, run.edge_agreement_shifted_after
        if before is None or after is None:
            before, after = run.edge_agreement_before, run.edge_agreement_after
        if before is not None and after is not None:
            gains[run.stem] = after - before
    return gains
