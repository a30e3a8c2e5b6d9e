"""The contract between layers: each job's output files and its typed summary.

Workflows (``fieldfix.workflows``) write these records; the CLI, the report and the batch
read them back with :meth:`~fieldfix.records.Record.read`, never by guessing keys. One
name per quantity holds everywhere: in the library, in the JSON files, in the CSV tables
and in the report.

* **Job options** (:class:`JobOptions`): output folder, the tag put at the start of every
  output file name, overwrite, progress, the command line for provenance.
* **File lists** (:class:`FieldMapFiles`, :class:`UnwarpFiles`, :class:`DropoutFiles`,
  :class:`PlanFiles`): the registry of output names. A summary stores its outputs as names
  relative to its own folder, so a folder can be moved and nothing outside it is ever
  referred to as an output.
* **Summaries** (:class:`FieldMapSummary`, :class:`UnwarpSummary`, :class:`DropoutSummary`,
  :class:`PlanSummary`): what each job reports, units in the field names. The part of each
  that the report carries too is a base of both (:class:`FieldMapNumbers`,
  :class:`ShiftNumbers`, :class:`DropoutNumbers`, :class:`PlanNumbers`), defined once.
* :func:`find_summaries` lists the summaries in a folder by the registry's names.
* **The report** (:class:`ReportFiles`, :class:`ReportSummary`): the page, the figure for
  papers and ``report.json``, which holds every number the page shows.

Modules: :mod:`.base` (the caution, job options, the output-name base), :mod:`.jobs`
(field map, unwarping, dropout), :mod:`.plan`, :mod:`.folders`, :mod:`.report`,
:mod:`.demo`, :mod:`.batch`; everything is imported from ``fieldfix.outputs``.

Examples
--------
>>> files = FieldMapFiles.named(tag="sub-01_")
>>> files.b0_hz, files.summary
('sub-01_b0_hz.nii.gz', 'sub-01_b0_summary.json')
>>> UnwarpFiles.named("sub-01_task-rest_bold").corrected
'sub-01_task-rest_bold_corrected.nii.gz'
"""

from __future__ import annotations

from ..records import SummaryError
from .base import CAUTION, JobOptions, job_and_settings, JobFiles
from .jobs import (
    FieldMapFiles,
    UnwarpFiles,
    DropoutFiles,
    CombinedFiles,
    CombinedSummary,
    PhaseUnitsRecord,
    PairRecord,
    TimingRecord,
    AlignmentRecord,
    MotionRecord,
    FieldMapNumbers,
    FieldMapSummary,
    ShiftNumbers,
    UnwarpSummary,
    MapStatistics,
    DropoutParameters,
    FrameRecord,
    DropoutNumbers,
    DropoutSummary,
)
from .plan import PlanFiles, PlanChoice, PlanRow, PlanNumbers, PlanSummary
from .folders import FolderSummaries, find_summaries
from .report import (
    ReportFiles,
    ReportWarning,
    HeadlineMeasure,
    ReportFieldMap,
    ReportRun,
    ReportDropout,
    ReportPlan,
    ReportSummary,
)
from .batch import ConfigRecord, BatchFiles, TaskFailure, RunPlanEntry, GroupRow, BatchPlan, BatchSummary, ByName
from .demo import DemoStep, DemoChecks, DemoSummary

__all__ = [
    "CAUTION",
    "JobOptions",
    "job_and_settings",
    "FieldMapFiles",
    "UnwarpFiles",
    "DropoutFiles",
    "PlanFiles",
    "CombinedFiles",
    "CombinedSummary",
    "PhaseUnitsRecord",
    "PairRecord",
    "TimingRecord",
    "AlignmentRecord",
    "MotionRecord",
    "FieldMapNumbers",
    "FieldMapSummary",
    "ShiftNumbers",
    "UnwarpSummary",
    "MapStatistics",
    "DropoutParameters",
    "FrameRecord",
    "DropoutNumbers",
    "DropoutSummary",
    "PlanChoice",
    "PlanRow",
    "PlanNumbers",
    "PlanSummary",
    "FolderSummaries",
    "find_summaries",
    "ReportFiles",
    "ReportWarning",
    "HeadlineMeasure",
    "ReportFieldMap",
    "ReportRun",
    "ReportDropout",
    "ReportPlan",
    "ReportSummary",
    "ConfigRecord",
    "BatchFiles",
    "TaskFailure",
    "RunPlanEntry",
    "GroupRow",
    "BatchPlan",
    "BatchSummary",
    "SummaryError",
    "JobFiles",
    "DemoStep",
    "DemoChecks",
    "DemoSummary",
    "ByName",
]
