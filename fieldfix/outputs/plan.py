"""Output names and the typed summary of the protocol planner."""

from __future__ import annotations

from dataclasses import dataclass, field

from ..records import Record, fields_of
from .base import CAUTION, JobFiles


@dataclass(frozen=True)
class PlanFiles(JobFiles):
    """Outputs of the planning job (``modelled_b0_hz``: the modelled field, when no map was given,
    for ``dropout --b0`` before the study)."""

    csv: str
    json: str
    figure: str
    modelled_b0_hz: str | None = None

    SUMMARY_SUFFIX = "plan.json"
    IMAGES = ("modelled_b0_hz",)

    @classmethod
    def named(cls, tag: str = "", modelled: bool = False) -> "PlanFiles":
        return cls.prefixed(tag, {"csv": "plan.csv", "json": cls.SUMMARY_SUFFIX, "figure": "plan.png",
                                  "modelled_b0_hz": "plan_modelled_b0_hz.nii.gz"}, {"modelled_b0_hz": modelled})


@dataclass(frozen=True)
class PlanChoice(Record):
    """The recommended protocol of a plan, with its predicted signal."""

    protocol: str
    thickness_mm: float
    te_s: float
    tilt_deg: float
    pe_polarity: str | None
    pe_direction: str | None
    zshim_mtms_per_m: float
    roi_median: float
    roi_percent_below: float
    brain_median: float | None
    brain_percent_below: float | None
    n_slices: int
    tr_s: float
    rank: int
    merit: float | None = None
    tsnr: float | None = None
    slice_time_s: float | None = None


@dataclass(frozen=True, kw_only=True)
class PlanRow(PlanChoice):
    """One protocol of a sweep (:func:`fieldfix.plan.sweep`): a row of ``plan.csv`` and of the
    summary's ``rows``. Besides the :class:`PlanChoice` numbers: ``pe_sign`` (+1, -1, or 0 when
    polarity is not swept), ``metric`` ('retention' or 'bold_sensitivity'), ``coverage_mm`` (the
    covered mask's extent along the slice normal), ``fits_tr`` (TR within the limit) and
    ``readout_s`` (the EPI readout). ``rank`` is 0 until the rows are ranked."""

    pe_sign: int
    metric: str
    coverage_mm: float
    fits_tr: bool
    readout_s: float

    def choice(self) -> PlanChoice:
        """The row's :class:`PlanChoice` part (what a summary keeps of a recommended protocol)."""
        return PlanChoice(**fields_of(self, PlanChoice))


@dataclass(frozen=True, kw_only=True)
class PlanNumbers(Record):
    """The outcome of a plan that its job's summary and the report both carry."""

    roi: str
    brain_mask: str
    roi_voxels: int
    protocols: int
    metric: str
    recommended: PlanChoice
    reason: str


@dataclass(frozen=True)
class PlanSummary(PlanNumbers):
    """What the planning job reports (``<tag>plan.json`` holds it with the full table)."""

    KIND = "plan"

    b0: str
    outputs: PlanFiles
    ranking: str = "retention"
    field_source: str = "measured"
    warnings: list[str] = field(default_factory=list)
    columns: dict[str, str] = field(default_factory=dict)
    parameters: dict[str, object] = field(default_factory=dict)
    provenance: dict[str, object] = field(default_factory=dict)
    rows: list[PlanRow] = field(default_factory=list)
    caution: str = CAUTION
