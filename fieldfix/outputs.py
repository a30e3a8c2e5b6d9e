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
  :class:`PlanSummary`): what each job reports, units in the field names.
* :func:`find_summaries` lists the summaries in a folder by the registry's names.
* **The report** (:class:`ReportFiles`, :class:`ReportSummary`): the page, the figure for
  papers and ``report.json``, which holds every number the page shows.

Examples
--------
>>> files = FieldMapFiles.named(tag="sub-01_")
>>> files.b0_hz, files.summary
('sub-01_b0_hz.nii.gz', 'sub-01_b0_summary.json')
>>> UnwarpFiles.named("sub-01_task-rest_bold").corrected
'sub-01_task-rest_bold_corrected.nii.gz'
"""

from __future__ import annotations

import dataclasses
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterator

from .errors import InputError
from .outdir import check_name_prefix
from .records import Record, SummaryError

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
    "FieldMapSummary",
    "UnwarpSummary",
    "MapStatistics",
    "DropoutParameters",
    "FrameRecord",
    "DropoutSummary",
    "PlanChoice",
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
]

#: The caution every command, sidecar, summary and report carries (one text everywhere).
CAUTION = ("Research software, not a medical device: inspect corrected images, B0 maps and dropout "
           "predictions before they are used for any decision about a person.")


# ----------------------------------------------------------------------------------- options
@dataclass(frozen=True)
class JobOptions:
    """Where and how a file-level job writes.

    Attributes
    ----------
    out_dir : Path
        Output folder (created if missing).
    tag : str
        Put at the start of every output file name (``"sub-01_"`` gives
        ``sub-01_b0_hz.nii.gz``); a plain part of a file name, no folders.
    overwrite : bool
        Replace earlier outputs fieldfix wrote (never inputs, never other files).
    progress : bool
        Show progress bars on standard error.
    command : str, optional
        The command line or call recorded in the provenance sidecars.
    """

    out_dir: Path
    tag: str = ""
    overwrite: bool = False
    progress: bool = False
    command: str | None = None

    def __post_init__(self):
        object.__setattr__(self, "out_dir", Path(self.out_dir))
        check_name_prefix(self.tag, "tag")

    def path(self, name: str) -> Path:
        """Absolute-or-relative path of an output name inside the output folder."""
        return self.out_dir / name


def job_and_settings(job, settings_type, settings, changes: dict):
    """Build a job's :class:`JobOptions` and its settings dataclass from a call's arguments.

    `job` is a :class:`JobOptions` or an output folder; `settings` an instance of
    `settings_type` or None (its defaults); `changes` keyword arguments naming fields of
    either, applied on top (so ``run_unwarp(runs, b0, "out", pe_code="j-", overwrite=True)``
    works as well as passing the objects).

    Raises
    ------
    TypeError
        For a keyword that is a field of neither.
    """
    job = job if isinstance(job, JobOptions) else JobOptions(out_dir=job)
    settings = settings if settings is not None else settings_type()
    job_fields = {f.name for f in dataclasses.fields(JobOptions)}
    setting_fields = {f.name for f in dataclasses.fields(settings_type)}
    unknown = sorted(set(changes) - job_fields - setting_fields)
    if unknown:
        raise TypeError(f"unexpected keyword argument {unknown[0]!r}")
    job_changes = {k: v for k, v in changes.items() if k in job_fields}
    setting_changes = {k: v for k, v in changes.items() if k in setting_fields}
    if job_changes:
        job = dataclasses.replace(job, **job_changes)
    if setting_changes:
        settings = dataclasses.replace(settings, **setting_changes)
    return job, settings


# ----------------------------------------------------------------------------------- files
class _Files(Record):
    """A job's output names (relative to its folder); image roles get provenance sidecars."""

    SUMMARY_SUFFIX = ""
    IMAGES: tuple = ()

    def paths(self, folder: str | os.PathLike) -> dict[str, Path]:
        """Role -> path inside `folder`, for the outputs this job writes."""
        folder = Path(folder)
        return {f.name: folder / getattr(self, f.name) for f in dataclasses.fields(self)
                if getattr(self, f.name) is not None}

    def image_roles(self) -> list[str]:
        return [role for role in self.IMAGES if getattr(self, role) is not None]

    def guarded(self, folder: str | os.PathLike) -> list[Path]:
        """Every path the job will write: the outputs and their provenance sidecars."""
        from .io import sidecar_path

        paths = self.paths(folder)
        every = list(paths.values()) + [sidecar_path(paths[role]) for role in self.image_roles()]
        if len(set(every)) != len(every):  # a registry entry whose names collide is a bug, not user error
            raise AssertionError(f"{type(self).__name__}: two outputs share a name: {sorted(map(str, every))}")
        return every


@dataclass(frozen=True)
class FieldMapFiles(_Files):
    """Outputs of the field-map job."""

    b0_hz: str
    mask: str
    magnitude: str
    summary: str
    b0_rads: str | None = None
    b0_ppm: str | None = None
    confidence: str | None = None
    epi_corrected: str | None = None

    SUMMARY_SUFFIX = "b0_summary.json"
    IMAGES = ("b0_hz", "mask", "magnitude", "b0_rads", "b0_ppm", "confidence", "epi_corrected")

    @classmethod
    def named(cls, tag: str = "", also_units=(), *, epi_pair: bool = False) -> "FieldMapFiles":
        """The names; a field map from reversed phase-encode images also has its confidence map
        and the input images corrected with it (``b0_epi_corrected``, 4D)."""
        units = set(also_units)
        return cls(b0_hz=f"{tag}b0_hz.nii.gz", mask=f"{tag}b0_mask.nii.gz",
                   magnitude=f"{tag}b0_magnitude.nii.gz", summary=f"{tag}{cls.SUMMARY_SUFFIX}",
                   b0_rads=f"{tag}b0_rads.nii.gz" if "rad/s" in units else None,
                   b0_ppm=f"{tag}b0_ppm.nii.gz" if "ppm" in units else None,
                   confidence=f"{tag}b0_confidence.nii.gz" if epi_pair else None,
                   epi_corrected=f"{tag}b0_epi_corrected.nii.gz" if epi_pair else None)


@dataclass(frozen=True)
class UnwarpFiles(_Files):
    """Outputs of the unwarping job for one run (``<tag><run stem>_...``)."""

    corrected: str
    shift_vox: str
    jacobian: str
    fold_mask: str
    displacement_mm: str
    summary: str
    motion: str | None = None

    SUMMARY_SUFFIX = "_unwarp.json"
    IMAGES = ("corrected", "shift_vox", "jacobian", "fold_mask", "displacement_mm")

    @classmethod
    def named(cls, run_stem: str, tag: str = "", suffix: str = ".nii.gz", *, motion: bool = False) -> "UnwarpFiles":
        """The outputs of one run; `suffix` ``'.nii.gz'`` (gzip) or ``'.nii'`` (uncompressed); with
        `motion`, the per-volume motion table ``<stem>_motion.tsv`` too."""
        if suffix not in (".nii.gz", ".nii"):
            raise ValueError(f"suffix must be '.nii.gz' or '.nii', got {suffix!r}")
        stem = f"{tag}{run_stem}"
        return cls(corrected=f"{stem}_corrected{suffix}", shift_vox=f"{stem}_shift_vox{suffix}",
                   jacobian=f"{stem}_jacobian{suffix}", fold_mask=f"{stem}_fold_mask{suffix}",
                   displacement_mm=f"{stem}_displacement_mm{suffix}", summary=f"{stem}{cls.SUMMARY_SUFFIX}",
                   motion=f"{stem}_motion.tsv" if motion else None)


@dataclass(frozen=True)
class CombinedFiles(_Files):
    """Outputs of the joint restoration of runs of opposite polarity (named after the first run)."""

    corrected: str
    summary: str

    SUMMARY_SUFFIX = "_combination.json"
    IMAGES = ("corrected",)

    @classmethod
    def named(cls, run_stem: str, tag: str = "") -> "CombinedFiles":
        stem = f"{tag}{run_stem}"
        return cls(corrected=f"{stem}_combined.nii.gz", summary=f"{stem}{cls.SUMMARY_SUFFIX}")


@dataclass(frozen=True)
class DropoutFiles(_Files):
    """Outputs of the dropout job (the BOLD-sensitivity and EPI-grid maps when made)."""

    retention: str
    summary: str
    bold_sensitivity: str | None = None
    retention_on_epi: str | None = None
    bold_sensitivity_on_epi: str | None = None

    SUMMARY_SUFFIX = "dropout.json"
    IMAGES = ("retention", "bold_sensitivity", "retention_on_epi", "bold_sensitivity_on_epi")

    @classmethod
    def named(cls, tag: str = "", *, bold: bool = False, on_epi: bool = False) -> "DropoutFiles":
        return cls(retention=f"{tag}retention.nii.gz", summary=f"{tag}{cls.SUMMARY_SUFFIX}",
                   bold_sensitivity=f"{tag}bold_sensitivity.nii.gz" if bold else None,
                   retention_on_epi=f"{tag}retention_on_epi.nii.gz" if on_epi else None,
                   bold_sensitivity_on_epi=f"{tag}bold_sensitivity_on_epi.nii.gz" if bold and on_epi else None)


@dataclass(frozen=True)
class PlanFiles(_Files):
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
        return cls(csv=f"{tag}plan.csv", json=f"{tag}{cls.SUMMARY_SUFFIX}", figure=f"{tag}plan.png",
                   modelled_b0_hz=f"{tag}plan_modelled_b0_hz.nii.gz" if modelled else None)


# ----------------------------------------------------------------------------------- summaries
@dataclass(frozen=True)
class PhaseUnitsRecord(Record):
    """How the units of one phase image were established."""

    path: str
    units: str
    how: str


@dataclass(frozen=True)
class PairRecord(Record):
    """How a field map from reversed phase-encode images came out.

    ``nrmsd_*``: normalised RMS difference between the images of the different codes, each
    unwarped with its own shift and Jacobian ("after") or as acquired ("before"), inside
    the mask, relative to their mean (0: identical); ``correlation_*``: their mean
    Pearson correlation there. This agreement is the field map's quality number.
    """

    pe_codes: list[str]
    volumes: int
    echo_spacing_s: list[float]
    nrmsd_before: float
    nrmsd_after: float
    correlation_before: float
    correlation_after: float
    iterations: list[int]
    converged: bool
    motion_mm_deg: list[list[float]]
    extended_percent: float
    method: str


@dataclass(frozen=True)
class FieldMapSummary(Record):
    """What the field-map job reports (``<tag>b0_summary.json``).

    ``unaliased_range_hz`` is the half-width: fields within +-that value are unambiguous.
    """

    KIND = "fieldmap"

    input_kind: str
    method: str
    echo_times_s: list[float] | None
    echo_times_source: str | None
    delta_te_s: float | None
    unaliased_range_hz: float | None
    phase_units: list[PhaseUnitsRecord]
    mask_source: str
    mask_voxels: int
    mask_volume_ml: float
    mask_fraction_of_grid: float
    field_percentiles_hz: dict[str, float]
    field_mean_hz: float
    voxels_offset_changed: int
    mask_regions: int
    outlier_voxels: int
    smooth_fwhm_mm: float
    unwrap_method: str | None
    voxel_size_mm: list[float]
    field_strength_t: float | None
    outputs: FieldMapFiles
    field_percentiles_ppm: dict[str, float] | None = None
    percent_mask_beyond_unaliased_range: float | None = None
    pair: PairRecord | None = None
    caution: str = CAUTION


@dataclass(frozen=True)
class TimingRecord(Record):
    """Readout timing as used (see :class:`fieldfix.shift.Timing`)."""

    echo_spacing_s: float
    readout_time_s: float
    n_pe_lines: int
    source: str


@dataclass(frozen=True)
class AlignmentRecord(Record):
    """The rigid transform that put the field map where the head was in the run.

    Conventions of :mod:`fieldfix.align`: world mm (RAS+) and degrees about world x, y, z through
    ``centre_mm`` (the run grid's centre), ``R = Rz Ry Rx``; ``matrix`` maps field-map world to run
    world. ``measure_*``: normalised mutual information of the forward-distorted field-map
    magnitude and the run (1 independent, 2 identical) at the affine placement and after.
    """

    translation_mm: list[float]
    rotation_deg: list[float]
    centre_mm: list[float]
    matrix: list[list[float]]
    measure_before: float
    measure_after: float
    iterations: int
    converged: bool
    coverage: float
    warnings: list[str]
    method: str


@dataclass(frozen=True)
class MotionRecord(Record):
    """Head motion through a run (per-volume rigid poses against the first volume).

    Framewise displacement after Power et al. 2012 (NeuroImage), rotations as arcs on a 50 mm
    sphere; the table is ``outputs.motion``. First order: the field moves with the head; its
    change with the head's orientation to B0 is neglected.
    """

    volumes: int
    mean_framewise_displacement_mm: float
    max_framewise_displacement_mm: float
    max_translation_mm: float
    max_rotation_deg: float
    converged_volumes: int
    warnings: list[str]
    method: str


@dataclass(frozen=True)
class UnwarpSummary(Record):
    """What the unwarping job reports for one run (``<tag><stem>_unwarp.json``).

    Shift statistics ``max_abs_shift_*``, ``percent_shifted_over_1_voxel``, ``folded_voxels`` and
    ``voxels_in_mask`` are over the statistics region (the field map's mask on the run grid);
    ``signal_*_abs_shift_vox`` over the voxels where the run has signal inside it, the region of
    the shift-size guard; ``large_shifts`` flags large but plausible shifts (see ``warnings``).
    """

    KIND = "unwarp"

    run: str
    b0_map: str
    b0_mask: str | None
    statistics_region: str
    n_volumes: int
    pe_code: str
    pe_axis: int
    pe_direction_world: str
    timing: TimingRecord
    interp: str
    jacobian: bool
    max_abs_shift_vox: float
    max_abs_shift_mm: float
    percent_shifted_over_1_voxel: float
    folded_voxels: int
    voxels_in_mask: int
    pe_voxel_size_mm: float
    jacobian_floor: float
    folded_voxels_total: int
    coverage_percent: float
    partial_coverage: bool
    warnings: list[str]
    signal_max_abs_shift_vox: float
    signal_p99_abs_shift_vox: float
    large_shifts: bool
    voxel_size_mm: list[float]
    displacement_convention: str
    folded_voxel_rule: str
    outputs: UnwarpFiles
    b0_units: str = "Hz"
    field_placement: str = "affines only"
    alignment: AlignmentRecord | None = None
    motion: MotionRecord | None = None
    caution: str = CAUTION


@dataclass(frozen=True)
class CombinedSummary(Record):
    """What the joint restoration of runs of opposite polarity reports."""

    KIND = "combined"

    runs: list[str]
    pe_codes: list[str]
    n_volumes: int
    penalty: float
    method: str
    outputs: CombinedFiles
    caution: str = CAUTION


@dataclass(frozen=True)
class MapStatistics(Record):
    """A predicted map inside the statistics mask: median, share below the threshold."""

    median: float | None
    percent_below_threshold: float | None
    voxels: int


@dataclass(frozen=True)
class DropoutParameters(Record):
    """The protocol a dropout prediction was made for."""

    te_s: float
    thickness_mm: float
    tilt_deg: float
    slice_axis: str
    pe_code: str | None
    echo_spacing_s: float | None
    partial_fourier: float
    zshim_mtms_per_m: float
    threshold: float
    profile: str
    time_bandwidth: float | None = None
    window: str | None = None


@dataclass(frozen=True)
class FrameRecord(Record):
    """The slice frame of a dropout prediction (see :class:`fieldfix.dropout.SliceFrame`)."""

    slice_normal_world: list[float]
    tilt_deg: float
    pe_step_world_mm: list[float] | None = None
    readout_step_world_mm: list[float] | None = None
    pe_lines: int | None = None
    description: str | None = None


@dataclass(frozen=True)
class DropoutSummary(Record):
    """What the dropout job reports (``<tag>dropout.json``)."""

    KIND = "dropout"

    b0: str
    geometry_from: str
    frame: FrameRecord
    parameters: DropoutParameters
    mask: str
    retention: MapStatistics
    outputs: DropoutFiles
    bold_sensitivity: MapStatistics | None = None
    pe_direction_world: str | None = None
    percent_echo_lost: float | None = None
    b0_units: str = "Hz"
    epi_placement: str | None = None
    caution: str = CAUTION


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


@dataclass(frozen=True)
class PlanSummary(Record):
    """What the planning job reports (``<tag>plan.json`` holds it with the full table)."""

    KIND = "plan"

    b0: str
    roi: str
    brain_mask: str
    roi_voxels: int
    protocols: int
    metric: str
    recommended: PlanChoice
    reason: str
    outputs: PlanFiles
    ranking: str = "retention"
    field_source: str = "measured"
    warnings: list[str] = field(default_factory=list)
    columns: dict[str, str] = field(default_factory=dict)
    parameters: dict[str, object] = field(default_factory=dict)
    provenance: dict[str, object] = field(default_factory=dict)
    rows: list[dict[str, object]] = field(default_factory=list)
    caution: str = CAUTION


# ----------------------------------------------------------------------------------- discovery
@dataclass(frozen=True)
class FolderSummaries:
    """The summaries found in one folder, each with the path it was read from."""

    field_maps: list[tuple[Path, FieldMapSummary]]
    runs: list[tuple[Path, UnwarpSummary]]
    dropout: list[tuple[Path, DropoutSummary]]
    plans: list[tuple[Path, PlanSummary]]

    @property
    def empty(self) -> bool:
        return not (self.field_maps or self.runs or self.dropout or self.plans)


def _matching(folder: Path, suffix: str) -> Iterator[Path]:
    for path in sorted(folder.glob(f"*{suffix}")):
        if path.is_file() and not path.name.startswith("."):
            yield path


def find_summaries(folder: str | os.PathLike) -> FolderSummaries:
    """Read every job summary in `folder` (not its subfolders), by the registry's names.

    Raises
    ------
    InputError
        When `folder` is not a folder; :class:`SummaryError` for a summary that does not
        match its record (naming the file and the key).
    """
    folder = Path(folder)
    if not folder.is_dir():
        raise InputError("not a folder", folder)
    plans = [(p, PlanSummary.read(p)) for p in _matching(folder, PlanFiles.SUMMARY_SUFFIX)]
    return FolderSummaries(
        field_maps=[(p, FieldMapSummary.read(p)) for p in _matching(folder, FieldMapFiles.SUMMARY_SUFFIX)],
        runs=[(p, UnwarpSummary.read(p)) for p in _matching(folder, UnwarpFiles.SUMMARY_SUFFIX)],
        dropout=[(p, DropoutSummary.read(p)) for p in _matching(folder, DropoutFiles.SUMMARY_SUFFIX)],
        plans=plans,
    )


# ----------------------------------------------------------------------------------- report
@dataclass(frozen=True)
class ReportFiles(_Files):
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


# ----------------------------------------------------------------------------------- demo
@dataclass(frozen=True)
class DemoStep(Record):
    """One step of the demo: what happened, how long it took, its main output."""

    status: str
    seconds: float | None = None
    outputs: list[str] = field(default_factory=list)
    reason: str | None = None
    path: str | None = None


@dataclass(frozen=True)
class DemoChecks(Record):
    """The demo's results checked against the scenario's ground truth (None: not measured).

    Edge agreements are normalised-gradient-field agreements with the undistorted
    simulation (1: every edge in place), over the head and where the correction moved
    voxels by more than half a voxel.
    """

    b0_brain_p1_p99_hz: list[float] | None = None
    b0_error_vs_truth_median_hz: float | None = None
    b0_error_vs_truth_p95_hz: float | None = None
    max_abs_shift_vox: float | None = None
    percent_shifted_over_1_voxel: float | None = None
    edge_agreement_before: float | None = None
    edge_agreement_after: float | None = None
    edge_agreement_shifted_before: float | None = None
    edge_agreement_shifted_after: float | None = None
    roi_signal_kept: float | None = None
    dropout_brain_median_retention: float | None = None
    dropout_brain_percent_below_threshold: float | None = None
    dropout_roi_mean_retention: float | None = None
    plan_protocols_compared: int | None = None
    plan_recommended: str | None = None
    plan_recommended_roi_median: float | None = None
    plan_reason: str | None = None


@dataclass(frozen=True)
class DemoSummary(Record):
    """What the demo reports (``demo_summary.json``)."""

    KIND = "demo"

    scenario: str
    title: str
    field_strength_t: float
    subject: str
    dataset: str
    out_dir: str
    steps: dict[str, DemoStep]
    checks_against_truth: DemoChecks
    report: str | None
    seconds: float
    warnings: list[str] = field(default_factory=list)
    caution: str = CAUTION + " The demo's study and data are invented."


# ----------------------------------------------------------------------------------- batch
class _ByName:
    """Read access by field name (``summary["tasks"]``), as callers of the dict ``run_batch``
    returned before this record read it; new code reads the attributes."""

    def __getitem__(self, name: str):
        if name in {f.name for f in dataclasses.fields(self)}:
            return getattr(self, name)
        raise KeyError(name)


@dataclass(frozen=True)
class ConfigRecord(Record):
    """A batch config file as used: where it was, the SHA-256 of its bytes, the options it set."""

    path: str
    sha256: str
    values: dict[str, object] = field(default_factory=dict)


@dataclass(frozen=True)
class BatchFiles(_Files):
    """The batch's own files, relative to the derivatives folder (the job outputs have their own)."""

    description: str
    ignore: str
    group_csv: str
    group_json: str
    log: str
    group_figure: str | None = None

    @classmethod
    def named(cls, stamp: str, *, figure: bool = True) -> "BatchFiles":
        return cls(description="dataset_description.json", ignore=".bidsignore", group_csv="group/group_runs.csv",
                   group_json="group/group_runs.json", log=f"logs/batch_{stamp}.json",
                   group_figure="group/group_runs.png" if figure else None)


@dataclass(frozen=True)
class TaskFailure(_ByName, Record):
    """A task that failed or was skipped because a task it needs did not finish."""

    task: str
    subject: str
    status: str
    reason: str


@dataclass(frozen=True)
class RunPlanEntry(_ByName, Record):
    """What a batch does with one EPI run: ``correct`` it with a field map, or ``skip`` it (why)."""

    run: str
    fieldmap: list[str]
    action: str
    reason: str


@dataclass(frozen=True)
class GroupRow(Record):
    """One EPI run in the group table; numbers from the runs' typed summaries (None: not made)."""

    subject: str
    session: str
    run: str
    fieldmap: str
    status: str
    reason: str
    max_abs_shift_vox: float | None = None
    max_abs_shift_mm: float | None = None
    retention_percent_below_threshold: float | None = None
    alignment_gain: float | None = None


@dataclass(frozen=True)
class BatchPlan(_ByName, Record):
    """What a batch would do (``dry_run``): one entry per EPI run and the planned task ids."""

    KIND = "batch-plan"

    dataset: str
    derivatives: str
    runs: list[RunPlanEntry]
    tasks: list[str]
    dataset_remarks: list[str]
    options: dict[str, object]
    config: ConfigRecord | None = None


@dataclass(frozen=True)
class BatchSummary(_ByName, Record):
    """What a batch reports (also in its log, ``logs/batch_<UTC time>.json``).

    ``exit_status`` is 0 when every run with a field map was corrected and every task
    finished, 1 otherwise; ``runs`` says for each EPI run what was done and why.
    """

    KIND = "batch"

    dataset: str
    derivatives: str
    execution: str
    subjects: list[str]
    tasks: dict[str, int]
    failures: list[TaskFailure]
    runs: list[RunPlanEntry]
    fieldmaps_without_target: list[str]
    dataset_remarks: list[str]
    warnings: list[str]
    notices: list[str]
    options: dict[str, object]
    outputs: BatchFiles
    log: str
    exit_status: int
    config: ConfigRecord | None = None
    caution: str = CAUTION
