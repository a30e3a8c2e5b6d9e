"""Building a report: read the summaries, measure once, draw, render, write three files.

The page must stay under :data:`MAX_PAGE_BYTES`; when it does not, only the pictures are
drawn again at a lower resolution (the numbers were measured once, before).
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import os
from dataclasses import dataclass
from pathlib import Path

from ..errors import OutputError
from ..outputs import CAUTION, DemoChecks, GroupRow, ReportFiles, ReportSummary
from .checks import collect_warnings
from .figures import style
from .figures.charts import group_figure
from .headline import headline
from .measure import measure_dropout, measure_field_map, measure_plan
from .page import EDGE_METHOD, render_page
from .render import (
    Picture,
    dropout_grid,
    field_grid,
    field_picture,
    paper_panels,
    paper_png,
    plan_picture,
    profile_picture,
    run_grid,
)
from .runs import measure_run
from .sources import Sources, gather

__all__ = ["build_report", "report_files", "MAX_PAGE_BYTES", "MAX_RUN_FIGURES", "RESOLUTIONS_DPI"]

#: Largest page written (bytes); pictures are redrawn at a lower resolution to stay under it.
MAX_PAGE_BYTES = 5 * 1024 * 1024
#: Runs beyond this many get their numbers only, keeping the page small.
MAX_RUN_FIGURES = 8
#: Resolutions tried in turn for the page's pictures.
RESOLUTIONS_DPI = (100, 80, 60, 45)


def report_files(source, out_path=None) -> tuple[Path, ReportFiles]:
    """(folder, file names) of a report: ``report.html`` in `out_path` (a folder), or the
    page `out_path` names (``x.html`` -> ``x_summary.png``, ``x.json``); by default in the
    source folder (or the folder of the summaries given).

    Examples
    --------
    >>> folder, files = report_files("out")
    >>> folder.name, files.html, files.png, files.json
    ('out', 'report.html', 'report_summary.png', 'report.json')
    """
    if out_path is None:
        if isinstance(source, (str, os.PathLike)):
            target = Path(source) if Path(source).is_dir() or not Path(source).suffix else Path(source).parent
        else:
            target = Path(os.path.commonpath([os.path.abspath(p) for p in source])) if len(source) else Path(".")
            target = target if target.is_dir() else target.parent
    else:
        target = Path(out_path)
    if target.suffix.lower() in (".html", ".htm"):
        return target.parent, ReportFiles(html=target.name, png=f"{target.stem}_summary.png",
                                          json=f"{target.stem}.json")
    return target, ReportFiles.named()


@dataclass
class _Measured:
    field_maps: list
    runs: list
    dropout: list
    plans: list


def _measure(sources: Sources) -> _Measured:
    runs = [measure_run(run, sources.field_map_of(run)) for run in sources.runs]
    return _Measured(field_maps=[measure_field_map(f) for f in sources.field_maps], runs=runs,
                     dropout=[measure_dropout(d) for d in sources.dropout],
                     plans=[measure_plan(p) for p in sources.plans])


@dataclass
class Pictures:
    """Every picture of a page at one resolution (None where there is nothing to draw)."""

    field_grids: list
    histograms: list
    run_grids: list
    profiles: list
    dropout_grids: list
    plans: list
    group: Picture | None
    summary: bytes | None


def _group_picture(record: ReportSummary, dpi: int) -> Picture | None:
    subjects = {r.subject for r in [*record.runs, *record.dropout] if r.subject}
    if len(subjects) < 2:
        return None
    common = dict(session="", fieldmap="", status="ok", reason="")
    rows = [GroupRow(subject=r.subject or "?", run=r.stem, max_abs_shift_vox=r.max_abs_shift_vox,
                     max_abs_shift_mm=r.max_abs_shift_mm, edge_agreement_gain=r.edge_agreement_gain(), **common)
            for r in record.runs]
    rows += [GroupRow(subject=d.subject or "?", run=d.name, **common,
                      retention_percent_below_threshold=d.retention.percent_below_threshold) for d in record.dropout]
    fig = group_figure(rows)
    if fig is None:
        return None
    return Picture(id="group", png=style.figure_png(fig, dpi=dpi), alt="runs across subjects",
                   caption="One dot per run (dropout: per prediction), by subject.")


def _draw(measured: _Measured, record: ReportSummary, dpi: int) -> Pictures:
    fviews = [v for _, v in measured.field_maps]
    rviews = [v for _, v in measured.runs]
    dviews = [v for _, v in measured.dropout]
    runs = [run_grid(v, i, r.stem, dpi) if v is not None and i < MAX_RUN_FIGURES else None
            for i, (r, v) in enumerate(measured.runs)]
    plans = [plan_picture(v, r, i, dpi) for i, (r, v) in enumerate(measured.plans)]
    summary = paper_png(paper_panels([v for v in fviews if v is not None], [v for v in rviews if v is not None],
                                     [v for v in dviews if v is not None]), record.title, dpi)
    if summary is None:  # a plan alone: its trade-offs are the figure for papers
        summary = next((p.png for p in plans if p is not None), None)
    return Pictures(
        field_grids=[field_grid(v, i, r.name, dpi) if v is not None else None
                     for i, (r, v) in enumerate(measured.field_maps)],
        histograms=[field_picture(v, i, dpi) if v is not None else None for i, v in enumerate(fviews)],
        run_grids=runs,
        profiles=[profile_picture(v, i, dpi) if v is not None and i < MAX_RUN_FIGURES else None
                  for i, v in enumerate(rviews)],
        dropout_grids=[dropout_grid(v, i, r.name, dpi) if v is not None else None
                       for i, (r, v) in enumerate(measured.dropout)],
        plans=plans, group=_group_picture(record, dpi), summary=summary)


def _record(sources: Sources, measured: _Measured, files: ReportFiles, title: str, truth) -> ReportSummary:
    from .. import __version__

    field_maps = [r for r, _ in measured.field_maps]
    runs = [r for r, _ in measured.runs]
    dropout = [r for r, _ in measured.dropout]
    pairs = {}
    for run in sources.runs:
        fm = sources.field_map_of(run)
        stem = next(r.stem for r, _ in measured.runs if r.name == run.name)
        pairs[stem] = getattr(fm.record, "pair_agreement", None) if fm is not None else None
    return ReportSummary(
        title=title, created=_dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        fieldfix_version=__version__, origin=sources.origin, sources=[str(p) for p in sources.paths],
        headline=headline(runs, pairs, truth, field_maps[0].name if field_maps else None),
        field_maps=field_maps, runs=runs, dropout=dropout, plans=[r for r, _ in measured.plans],
        warnings=collect_warnings(field_maps, runs, dropout), notes=[], figure_dpi=RESOLUTIONS_DPI[0],
        html_bytes=0, outputs=files, edge_agreement_method=EDGE_METHOD, caution=CAUTION)


def _default_title(source, sources: Sources) -> str:
    if isinstance(source, (str, os.PathLike)) and Path(source).is_dir():
        return f"fieldfix report: {Path(source).resolve().name}"
    return f"fieldfix report: {Path(sources.origin).name or 'summaries'}"


def _write(folder: Path, files: ReportFiles, page: bytes, png: bytes | None, record: ReportSummary,
           inputs, overwrite: bool) -> Path:
    from ..jsonfile import write_json
    from ..outdir import atomic_output

    with atomic_output(folder / files.html, inputs, overwrite) as temporary:
        temporary.write_bytes(page)
    if png is not None:
        with atomic_output(folder / files.png, inputs, overwrite) as temporary:
            temporary.write_bytes(png)
    write_json(folder / files.json, record.to_json(), inputs=inputs, overwrite=overwrite)
    return folder / files.html


def build_report(source, out_path=None, *, title: str | None = None, overwrite: bool = False,
                 truth: DemoChecks | None = None) -> Path:
    """Build the quality report of fieldfix job summaries.

    Parameters
    ----------
    source : path or sequence of paths
        A folder written by the fieldmap, unwarp, dropout and/or plan jobs (its summaries
        are found by the registry's names), or the summary JSON files themselves (for
        example the derivative summaries of one subject). A job's outputs are read by the
        names its summary gives, relative to the summary's folder.
    out_path : path, optional
        Folder for ``report.html`` (default: the source folder), or the page's own name
        (``qc/sub-01.html`` gives ``qc/sub-01_summary.png`` and ``qc/sub-01.json``).
    title : str, optional
        Page title (default: "fieldfix report: <folder name>").
    overwrite : bool
        Replace a report fieldfix wrote earlier (never any other file).
    truth : DemoChecks, optional
        Checks against a scenario's ground truth, for the headline (the demo passes its
        own; a folder holding ``demo_summary.json`` provides them too).

    Returns
    -------
    Path
        The page; ``report_summary.png`` (the figure for papers) and ``report.json`` (every
        number of the page, :class:`fieldfix.outputs.ReportSummary`) are written beside it.

    Raises
    ------
    InputError
        When the source holds no job summaries, or a summary or an image it names is damaged.
    OutputError
        When a report exists and `overwrite` is False, or a file that fieldfix did not
        write has one of the report's names.

    Examples
    --------
    >>> import tempfile
    >>> build_report(tempfile.mkdtemp())  # doctest: +IGNORE_EXCEPTION_DETAIL
    Traceback (most recent call last):
    fieldfix.errors.InputError: no fieldfix job summaries found
    """
    from ..outdir import output_paths_guard

    sources = gather(source)
    folder, files = report_files(source, out_path)
    inputs = sources.inputs()
    output_paths_guard(files.paths(folder).values(), inputs, overwrite)
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise OutputError(f"cannot create the report folder ({err.strerror or err})", folder) from None
    measured = _measure(sources)
    record = _record(sources, measured, files, title or _default_title(source, sources),
                     truth if truth is not None else sources.truth)
    for dpi in RESOLUTIONS_DPI:
        pictures = _draw(measured, record, dpi)
        record = dataclasses.replace(record, figure_dpi=dpi)
        page = render_page(record.to_json(), pictures).encode("utf-8")
        if len(page) <= MAX_PAGE_BYTES:
            break
    record = dataclasses.replace(record, html_bytes=len(page))
    return _write(folder, files, page, pictures.summary, record, inputs, overwrite)
