"""Output names and the typed summary of the quality report (every number the page shows)."""

from __future__ import annotations

from dataclasses import dataclass, field

from ..records import Record
from .base import CAUTION, JobFiles
from .jobs import DropoutNumbers, FieldMapNumbers, ShiftNumbers
from .plan import PlanChoice, PlanNumbers


@dataclass(frozen=True)
class ReportFiles(JobFiles):
    """Outputs of the report: the page, the figure for papers and the numbers."""

    html: str
    png: str
    json: str

    SUMMARY_SUFFIX = "report.json"
    SUMMARY_ROLE = "json"

    @classmethod
    def named(cls, stem: str = "report") -> "ReportFiles":
        return cls.prefixed(stem, {"html": ".html", "png": "_summary.png", "json": ".json"})


@dataclass(frozen=True)
class ReportWarning(Record):
    """One finding a reader should see before the figures (``code`` is stable)."""

    code: str
    where: str
    message: str


@dataclass(frozen=True)
class HeadlineMeasure(Record):
    """A number of the page's headline: before and after correction, or one value (``after``)."""

    item: str
    kind: str
    label: str
    region: str
    unit: str
    before: float | None
    after: float | None
    higher_is_better: bool
    voxels: int | None = None
    change: float | None = None


@dataclass(frozen=True)
class ReportFieldMap(FieldMapNumbers):
    """A field map as the report shows it: the job's :class:`FieldMapNumbers`, plus what the
    images add."""

    name: str
    subject: str | None
    b0_hz: str | None
    phase_units: list[str]
    mask_coverage: float | None
    display_limit_hz: float | None
    notes: list[str] = field(default_factory=list)


@dataclass(frozen=True)
class ReportRun(ShiftNumbers):
    """An unwarped run: the job's :class:`ShiftNumbers` and the report's edge agreements (NGF, 0 to 1)."""

    stem: str
    name: str
    subject: str | None
    field_map: str | None
    before_view: bool
    edge_region: str | None
    edge_agreement_before: float | None
    edge_agreement_after: float | None
    edge_agreement_shifted_before: float | None
    edge_agreement_shifted_after: float | None
    shifted_region_voxels: int | None
    slices_worse_mm: list[float]
    profile_point_mm: list[float] | None
    job_warnings: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)

    def edge_agreement_gain(self) -> float | None:
        """Edge agreement after minus before correction where it moved voxels (over the whole
        mask when no moved region was measured); None when not measured."""
        before, after = self.edge_agreement_shifted_before, self.edge_agreement_shifted_after
        if before is None or after is None:
            before, after = self.edge_agreement_before, self.edge_agreement_after
        return after - before if before is not None and after is not None else None


@dataclass(frozen=True)
class ReportDropout(DropoutNumbers):
    """A dropout prediction: the job's :class:`DropoutNumbers` (its protocol, mask and statistics)."""

    name: str
    subject: str | None
    notes: list[str] = field(default_factory=list)


@dataclass(frozen=True)
class ReportPlan(PlanNumbers):
    """A protocol plan: the job's :class:`PlanNumbers`, the protocol held fixed and the best rows."""

    name: str
    subject: str | None
    fixed: dict[str, object]
    top: list[PlanChoice]


@dataclass(frozen=True)
class ReportSummary(Record):
    """What the report writes as ``report.json``: every number its page shows."""

    KIND = "report"

    title: str
    created: str
    fieldfix_version: str
    origin: str
    sources: list[str]
    headline: list[HeadlineMeasure]
    field_maps: list[ReportFieldMap]
    runs: list[ReportRun]
    dropout: list[ReportDropout]
    plans: list[ReportPlan]
    warnings: list[ReportWarning]
    notes: list[str]
    figure_dpi: int
    html_bytes: int
    outputs: ReportFiles
    edge_agreement_method: str
    caution: str = CAUTION
