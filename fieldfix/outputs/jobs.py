"""Output names and typed summaries of the field-map, unwarping and dropout jobs."""

from __future__ import annotations

from dataclasses import dataclass

from ..records import Record
from .base import CAUTION, JobFiles


@dataclass(frozen=True)
class FieldMapFiles(JobFiles):
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
        names = {"b0_hz": "b0_hz.nii.gz", "mask": "b0_mask.nii.gz", "magnitude": "b0_magnitude.nii.gz",
                 "summary": cls.SUMMARY_SUFFIX, "b0_rads": "b0_rads.nii.gz", "b0_ppm": "b0_ppm.nii.gz",
                 "confidence": "b0_confidence.nii.gz", "epi_corrected": "b0_epi_corrected.nii.gz"}
        return cls.prefixed(tag, names, {"b0_rads": "rad/s" in units, "b0_ppm": "ppm" in units,
                                         "confidence": epi_pair, "epi_corrected": epi_pair})


@dataclass(frozen=True)
class UnwarpFiles(JobFiles):
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
        names = {role: f"_{role}{suffix}" for role in cls.IMAGES}
        names.update(summary=cls.SUMMARY_SUFFIX, motion="_motion.tsv")
        return cls.prefixed(f"{tag}{run_stem}", names, {"motion": motion})


@dataclass(frozen=True)
class CombinedFiles(JobFiles):
    """Outputs of the joint restoration of runs of opposite polarity (named after the first run)."""

    corrected: str
    summary: str

    SUMMARY_SUFFIX = "_combination.json"
    IMAGES = ("corrected",)

    @classmethod
    def named(cls, run_stem: str, tag: str = "") -> "CombinedFiles":
        return cls.prefixed(f"{tag}{run_stem}", {"corrected": "_combined.nii.gz", "summary": cls.SUMMARY_SUFFIX})


@dataclass(frozen=True)
class DropoutFiles(JobFiles):
    """Outputs of the dropout job (the BOLD-sensitivity and EPI-grid maps when made;
    ``modelled_b0_hz``: the modelled field used when no B0 map was given)."""

    retention: str
    summary: str
    bold_sensitivity: str | None = None
    retention_on_epi: str | None = None
    bold_sensitivity_on_epi: str | None = None
    modelled_b0_hz: str | None = None

    SUMMARY_SUFFIX = "dropout.json"
    IMAGES = ("retention", "bold_sensitivity", "retention_on_epi", "bold_sensitivity_on_epi", "modelled_b0_hz")

    @classmethod
    def named(cls, tag: str = "", *, bold: bool = False, on_epi: bool = False,
              modelled: bool = False) -> "DropoutFiles":
        names = {role: f"{role}.nii.gz" for role in cls.IMAGES}
        names["summary"] = cls.SUMMARY_SUFFIX
        return cls.prefixed(tag, names, {"bold_sensitivity": bold, "retention_on_epi": on_epi,
                                         "bold_sensitivity_on_epi": bold and on_epi, "modelled_b0_hz": modelled})


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


@dataclass(frozen=True, kw_only=True)
class FieldMapNumbers(Record):
    """The numbers of a field map that its job's summary and the report both carry.

    ``unaliased_range_hz`` is the half-width: fields within +-that value are unambiguous.
    """

    input_kind: str
    echo_times_s: list[float] | None
    delta_te_s: float | None
    unaliased_range_hz: float | None
    mask_source: str
    mask_volume_ml: float
    field_percentiles_hz: dict[str, float]
    field_mean_hz: float
    voxels_offset_changed: int
    outlier_voxels: int
    smooth_fwhm_mm: float
    field_strength_t: float | None
    percent_mask_beyond_unaliased_range: float | None = None


@dataclass(frozen=True)
class FieldMapSummary(FieldMapNumbers):
    """What the field-map job reports (``<tag>b0_summary.json``): :class:`FieldMapNumbers` and
    how they were made."""

    KIND = "fieldmap"

    method: str
    echo_times_source: str | None
    phase_units: list[PhaseUnitsRecord]
    mask_voxels: int
    mask_fraction_of_grid: float
    mask_regions: int
    unwrap_method: str | None
    voxel_size_mm: list[float]
    outputs: FieldMapFiles
    field_percentiles_ppm: dict[str, float] | None = None
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
    ``signal_model``: what the magnitude was weighted by before the comparison (the signal the run
    keeps under the field, or nothing).
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
    signal_model: str = ""


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


@dataclass(frozen=True, kw_only=True)
class ShiftNumbers(Record):
    """The numbers of an unwarped run that its job's summary and the report both carry.

    Shift statistics ``max_abs_shift_*``, ``percent_shifted_over_1_voxel`` and ``folded_voxels``
    are over the statistics region (the field map's mask on the run grid).
    """

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


@dataclass(frozen=True)
class UnwarpSummary(ShiftNumbers):
    """What the unwarping job reports for one run (``<tag><stem>_unwarp.json``).

    :class:`ShiftNumbers`, and: ``voxels_in_mask`` (the statistics region's size);
    ``signal_*_abs_shift_vox`` over the voxels where the run has signal inside it, the region of
    the shift-size guard; ``large_shifts`` flags large but plausible shifts (see ``warnings``).
    """

    KIND = "unwarp"

    run: str
    b0_map: str
    b0_mask: str | None
    n_volumes: int
    jacobian: bool
    voxels_in_mask: int
    pe_voxel_size_mm: float
    folded_voxels_total: int
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
    """The protocol a dropout prediction was made for (``tbw``, ``window``: the windowed-sinc
    pulse of the 'rf' profile, None for the others; ``tbw`` as in the plan's parameters)."""

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
    tbw: float | None = None
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


@dataclass(frozen=True, kw_only=True)
class DropoutNumbers(Record):
    """The numbers of a dropout prediction that its job's summary and the report both carry
    (``field_source``: ``"measured"`` B0 map or ``"modelled"`` field)."""

    parameters: DropoutParameters
    mask: str
    retention: MapStatistics
    bold_sensitivity: MapStatistics | None = None
    percent_echo_lost: float | None = None
    pe_direction_world: str | None = None
    field_source: str = "measured"


@dataclass(frozen=True)
class DropoutSummary(DropoutNumbers):
    """What the dropout job reports (``<tag>dropout.json``); ``b0`` is the map's path, or for a
    modelled field (``field_source`` ``"modelled"``) how it was modelled, as in the plan's summary."""

    KIND = "dropout"

    b0: str
    geometry_from: str
    frame: FrameRecord
    outputs: DropoutFiles
    b0_units: str = "Hz"
    epi_placement: str | None = None
    caution: str = CAUTION
