"""The per-subject report, built from the subject's derivative job summaries, and what the group
table reads back from it (the report's typed numbers, :class:`fieldfix.outputs.ReportSummary`).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from ..outputs import ReportFiles, ReportSummary
from ..records import Record
from ..report import build_report

__all__ = ["SubjectReport", "subject_report", "report_edge_gains"]


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


def report_edge_gains(numbers_path: Path) -> dict[str, float]:
    """Run stem -> :meth:`fieldfix.outputs.ReportRun.edge_agreement_gain`, from a report's ``report.json``."""
    gains = {run.stem: run.edge_agreement_gain() for run in ReportSummary.read(numbers_path).runs}
    return {stem: gain for stem, gain in gains.items() if gain is not None}
