"""The group summary: one row per EPI run across subjects (CSV, JSON) and a figure.

Columns come from typed fields of the job summaries, one name per quantity:
``max_abs_shift_vox`` and ``max_abs_shift_mm`` (:class:`~fieldfix.outputs.UnwarpSummary`),
``retention_percent_below_threshold`` (:class:`~fieldfix.outputs.DropoutSummary`
``retention.percent_below_threshold``), and ``edge_agreement_gain``
(:meth:`~fieldfix.outputs.ReportRun.edge_agreement_gain`, from the subject's report). The figure is
:func:`fieldfix.report.figures.group_figure`, the one the report draws for several subjects.
"""

from __future__ import annotations

import csv
import dataclasses
import io
from pathlib import Path
from typing import Mapping, Sequence

from ..errors import FieldfixError
from ..jsonfile import write_json
from ..outdir import atomic_output
from ..outputs import BatchFiles, DropoutSummary, GroupRow, UnwarpSummary
from ..report.figures import figure_png, group_figure
from .inventory import Inventory
from .plan import TaskResult
from .reports import report_edge_gains

__all__ = ["COLUMNS", "group_rows", "write_group_summary"]

COLUMNS = tuple(f.name for f in dataclasses.fields(GroupRow))


def _summary(result: TaskResult | None, deriv: Path, record_type):
    if result is None or not result.ok or result.summary is None:
        return None
    try:
        return record_type.read(deriv / result.summary)
    except FieldfixError:
        return None


def _status(run, unwarp: TaskResult | None, dropout: TaskResult | None) -> tuple[str, str]:
    if run.fieldmap is None and unwarp is None:
        return "no field map", run.note
    done = [r for r in (unwarp, dropout) if r is not None]
    if done and all(r.ok for r in done):
        return "ok", ""
    reasons = [f"{r.task_id}: {r.reason}" for r in done if not r.ok]
    return "failed", "; ".join(reasons) or "not run"


def group_rows(inventory: Inventory, results: Mapping[str, TaskResult], deriv: Path) -> list[GroupRow]:
    """One row per EPI run of the included subjects (also runs with no field map)."""
    gains: dict[str, dict[str, float]] = {}
    for subject in inventory.subjects:
        report = results.get(f"report:sub-{subject}")
        if report is not None and report.ok and report.summary is not None:
            try:
                gains[subject] = report_edge_gains(deriv / report.summary)
            except FieldfixError:
                gains[subject] = {}
    rows = []
    for run in inventory.runs:
        unwarp, dropout = results.get(f"unwarp:{run.stem}"), results.get(f"dropout:{run.stem}")
        status, reason = _status(run, unwarp, dropout)
        shifts = _summary(unwarp, deriv, UnwarpSummary)
        drop = _summary(dropout, deriv, DropoutSummary)
        rows.append(GroupRow(
            subject=run.subject, session=run.session, run=run.stem, fieldmap=run.fieldmap or "", status=status,
            reason=reason, max_abs_shift_vox=shifts.max_abs_shift_vox if shifts else None,
            max_abs_shift_mm=shifts.max_abs_shift_mm if shifts else None,
            retention_percent_below_threshold=drop.retention.percent_below_threshold if drop else None,
            edge_agreement_gain=gains.get(run.subject, {}).get(run.stem)))
    return rows


def write_group_summary(deriv: Path, rows: Sequence[GroupRow], files: BatchFiles) -> BatchFiles:
    """Write the group table (CSV and JSON) and a figure across subjects; returns the files written."""
    buffer = io.StringIO()
    writer = csv.DictWriter(buffer, fieldnames=COLUMNS, lineterminator="\n")
    writer.writeheader()
    for row in rows:
        writer.writerow({k: "" if v is None else v for k, v in row.to_json().items()})
    (deriv / files.group_csv).parent.mkdir(parents=True, exist_ok=True)
    with atomic_output(deriv / files.group_csv, overwrite=True) as temporary:
        temporary.write_text(buffer.getvalue(), encoding="utf-8")
    write_json(deriv / files.group_json, {"columns": list(COLUMNS), "rows": [r.to_json() for r in rows]},
               overwrite=True)
    figure = group_figure(rows, title="fieldfix batch: runs across subjects")
    if figure is None:
        return dataclasses.replace(files, group_figure=None)
    with atomic_output(deriv / files.group_figure, overwrite=True) as temporary:
        temporary.write_bytes(figure_png(figure, dpi=100))
    return files
