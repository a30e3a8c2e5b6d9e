"""The group summary: one row per EPI run across subjects (CSV, JSON) and a figure.

Columns come from typed fields of the job summaries, one name per quantity:
``max_abs_shift_vox`` and ``max_abs_shift_mm`` (:class:`~fieldfix.outputs.UnwarpSummary`),
``retention_percent_below_threshold`` (:class:`~fieldfix.outputs.DropoutSummary`
``retention.percent_below_threshold``), and ``alignment_gain`` (edge agreement after minus
before, from the subject's report).
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
from .inventory import Inventory
from .plan import TaskResult
from .reports import report_alignment

__all__ = ["COLUMNS", "group_rows", "write_group_summary", "group_figure"]

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
                gains[subject] = report_alignment(deriv / report.summary)
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
            alignment_gain=gains.get(run.subject, {}).get(run.stem)))
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
    figure = group_figure(rows)
    if figure is None:
        return dataclasses.replace(files, group_figure=None)
    with atomic_output(deriv / files.group_figure, overwrite=True) as temporary:
        temporary.write_bytes(figure)
    return files


_PANELS = (("max_abs_shift_vox", "maximum shift (voxels)"),
           ("retention_percent_below_threshold", "predicted dropout (% of voxels)"),
           ("alignment_gain", "alignment gain (edge agreement after - before)"))


def group_figure(rows: Sequence[GroupRow]) -> bytes | None:
    """Strip plots of each column across subjects (one dot per run), PNG bytes; None when empty.

    To move to the report package's figures when it lands.
    """
    panels = [(c, t) for c, t in _PANELS if any(getattr(r, c) is not None for r in rows)]
    if not panels:
        return None
    from matplotlib.figure import Figure  # heavy: imported when a figure is made

    subjects = sorted({r.subject for r in rows})
    fig = Figure(figsize=(3.6 * len(panels), 3.2), layout="constrained")
    for i, (column, title) in enumerate(panels):
        ax = fig.add_subplot(1, len(panels), i + 1)
        for x, subject in enumerate(subjects):
            values = [getattr(r, column) for r in rows if r.subject == subject and getattr(r, column) is not None]
            offsets = [x + 0.08 * (k - (len(values) - 1) / 2) for k in range(len(values))]
            ax.plot(offsets, values, "o", color="#2f6f8f", markersize=6)
            if any(r.subject == subject and r.status == "failed" for r in rows):
                ax.annotate("failed", (x, 0.02), xycoords=("data", "axes fraction"), ha="center", fontsize=7,
                            color="#a03030")
        if column != "alignment_gain":  # shifts and percentages: from zero
            top = max([getattr(r, column) for r in rows if getattr(r, column) is not None] + [0.0])
            ax.set_ylim(bottom=0.0, top=top * 1.15 if top > 0 else 1.0)
        ax.set_xticks(range(len(subjects)), [f"sub-{s}" for s in subjects], rotation=45, ha="right", fontsize=8)
        ax.set_xlim(-0.6, len(subjects) - 0.4)
        ax.set_title(title, fontsize=9)
        ax.grid(axis="y", alpha=0.3)
    fig.suptitle("fieldfix batch: runs across subjects (research use only)", fontsize=10)
    out = io.BytesIO()
    fig.savefig(out, format="png", dpi=100)
    return out.getvalue()
