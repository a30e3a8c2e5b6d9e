"""Output names and the typed summary of the quality report (every number the page shows)."""

from __future__ import annotations

from dataclasses import dataclass, field

from ..records import Record
from .base import CAUTION, JobFiles
from .jobs import DropoutParameters, MapStatistics, TimingRecord
from .plan import PlanChoice


@dataclass(frozen=True)
class ReportFiles(JobFiles):
    """Outputs of the report: the page, the figure for papers and the numbers."""

    html: str
    png: str
    json: str

    SUMMARY_SUFFIX = "report.json"

    @classmethod
    def named(cls, stem: str = "report") -> "ReportFiles":
        return cls(html=f"{stem}.html", png=f"{stem}_summary.png", json=f"{stem}.json")


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
class ReportFieldMap(Record):
    """A field map as the report shows it (the job's numbers, plus what the images add)."""

    name: str
    subject: str | None
    b0_hz: str | None
    input_kind: str
    field_percentiles_hz: dict[str, float]
    field_mean_hz: float
    unaliased_range_hz: float | None
    percent_mask_beyond_unaliased_range: float | None
    echo_times_s: list[float] | None
    delta_te_s: float | None
    phase_units: list[str]
    mask_source: str
    mask_volume_ml: float
    voxels_offset_changed: int
    outlier_voxels: int
    smooth_fwhm_mm: float
    field_strength_t: float | None
    mask_coverage: float | None
    display_limit_hz: float | None
    notes: list[str] = field(default_factory=list)


@dataclass(frozen=True)
class ReportRun(Record):
    """An unwarped run: the job's numbers and the report's edge agreements (NGF, 0 to 1)."""

    stem: str
    name: str
    subject: str | None
    field_map: str | None
    pe_code: str
    pe_axis: int
    pe_direction_world: str
    timing: TimingRecord
    interp: str
    jacobian_floor: float
    max_abs_shift_vox: float
    max_abs_shift_mm: float
    percent_shifted_over_1_voxel: float
    folded_voxels: int
    statistics_region: str
    coverage_percent: float
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


@dataclass(frozen=True)
class ReportDropout(Record):
    """A dropout prediction: its protocol, the job's mask and statistics."""

    name: str
    subject: str | None
    parameters: DropoutParameters
    mask: str
    retention: MapStatistics
    bold_sensitivity: MapStatistics | None
    percent_echo_lost: float | None
    pe_direction_world: str | None
    notes: list[str] = field(default_factory=list)


@dataclass(frozen=True)
class ReportPlan(Record):
    """A protocol plan: masks, the protocol held fixed, the recommendation and the best rows."""

    name: str
    subject: str | None
    roi: str
    brain_mask: str
    roi_voxels: int
    protocols: int
    metric: str
    recommended: PlanChoice
    reason: str
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
