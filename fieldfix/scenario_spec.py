"""The typed forms of a sample scenario: its definition and the manifest of what was generated.

:func:`parse_definition` turns a definition (defaults filled in, every quantity a string with
its unit) into a :class:`ScenarioSpec` (SI units); the generator reads only that. What the
generator wrote is a :class:`ScenarioManifest` (``derivatives/scenario-truth/manifest.json``,
paths relative to the dataset root), read back strictly by :func:`fieldfix.scenarios.load_manifest`.

Example
-------
>>> from fieldfix.scenarios import load_definition
>>> spec = parse_definition(load_definition("orbitofrontal-3t"))
>>> spec.field_strength_t, spec.fieldmap.kind
(3.0, 'phasediff')
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import InputError
from .geometry import parse_pe_code
from .records import Record
from .units import parse_angle_deg, parse_field_t, parse_length_mm, parse_time_s

__all__ = ["ScenarioSpec", "FieldmapSpec", "RunSpec", "RoiSpec", "parse_definition", "parse_labels",
           "ScenarioManifest", "ManifestEntry", "ManifestRun", "ManifestFieldmap", "FieldmapTruth"]


@dataclass(frozen=True)
class FieldmapSpec:
    """The gradient-echo field map: ``kind`` 'phasediff' or 'phase-pair', two echo times (s),
    the grid (voxel and centre in mm), SNR and T2* (s)."""

    kind: str
    echo_times_s: tuple
    voxel_mm: np.ndarray
    shape: tuple
    center_mm: np.ndarray
    snr: float
    t2star_s: float


@dataclass(frozen=True)
class RunSpec:
    """One EPI run: task, grid, phase-encode code, timing (s), acceleration, partial Fourier
    fraction, T2* (s), noise (fraction of brain signal) and the motion's standard deviations."""

    task: str
    voxel_mm: np.ndarray
    shape: tuple
    center_mm: np.ndarray
    pe_code: str
    echo_spacing_s: float
    te_s: float
    repetition_time_s: float
    volumes: int
    acceleration: int
    partial_fourier: float
    t2star_s: float
    noise: float
    motion_translation_mm: float
    motion_rotation_deg: float


@dataclass(frozen=True)
class RoiSpec:
    """An ellipsoidal region of interest (cut to the brain), centre and semi-axes in mm."""

    name: str
    center_mm: np.ndarray
    semi_axes_mm: np.ndarray


@dataclass(frozen=True)
class ScenarioSpec:
    """A whole scenario: field strength (T), subject and session labels, the head's mean pose
    (degrees) and size, the shim order, the model grid (mm), the field map, the runs and the ROI."""

    field_strength_t: float
    subjects: tuple
    sessions: tuple
    pitch_deg: float
    roll_deg: float
    pitch_jitter_deg: float
    scale: float
    scale_jitter: float
    shim_order: int
    model_voxel_mm: np.ndarray
    fieldmap: FieldmapSpec
    runs: tuple
    roi: RoiSpec | None = None


def _vec_mm(values, what) -> np.ndarray:
    if len(values) != 3:
        raise InputError(f"{what} needs three values")
    return np.array([parse_length_mm(v) for v in values], float)


def _shape(values, what) -> tuple[int, int, int]:
    if len(values) != 3 or any(int(v) != v or int(v) < 2 for v in values):
        raise InputError(f"{what} must be three integers >= 2")
    return tuple(int(v) for v in values)


def _voxel(value, what) -> np.ndarray:
    if isinstance(value, (list, tuple)):
        return _vec_mm(value, what)
    return np.full(3, parse_length_mm(value))


def parse_labels(spec, prefix_width: int = 2) -> tuple[str, ...]:
    """Subject or session labels from a count (``3`` -> ``('01', '02', '03')``) or a list."""
    if isinstance(spec, (list, tuple)):
        labels = tuple(str(s) for s in spec)
        if any(not s.isalnum() for s in labels):
            raise InputError("subject and session labels must be letters and digits")
        return labels
    n = int(spec)
    if n < 0:
        raise InputError("the number of subjects/sessions cannot be negative")
    return tuple(str(i + 1).zfill(prefix_width) for i in range(n))


def parse_definition(d: dict) -> ScenarioSpec:
    """The typed scenario of a definition with its defaults filled in.

    Raises
    ------
    InputError, UnitError
        Naming the bad key; a missing key or a value of the wrong type raises KeyError,
        TypeError or ValueError, which :func:`fieldfix.scenarios.load_definition` reports.
    """
    head = d["head"]
    spec = ScenarioSpec(
        field_strength_t=parse_field_t(d["field_strength"]),
        subjects=parse_labels(d["subjects"]),
        sessions=parse_labels(d["sessions"], 1) if d["sessions"] else (),
        pitch_deg=parse_angle_deg(head["pitch"]), roll_deg=parse_angle_deg(head["roll"]),
        pitch_jitter_deg=parse_angle_deg(head["pitch_jitter"]),
        scale=float(head["scale"]), scale_jitter=float(head["scale_jitter"]), shim_order=int(head["shim_order"]),
        model_voxel_mm=_voxel(d["model"]["voxel_size"], "model.voxel_size"),
        fieldmap=_fieldmap(d["fieldmap"]), runs=_runs(d["runs"]),
        roi=_roi(d["roi"]) if d.get("roi") else None)
    if not spec.subjects:
        raise InputError("a scenario needs at least one subject")
    if spec.shim_order not in (0, 1, 2):
        raise InputError("head.shim_order must be 0, 1 or 2")
    return spec


def _fieldmap(fm: dict) -> FieldmapSpec:
    if fm["kind"] not in ("phasediff", "phase-pair"):
        raise InputError("fieldmap.kind must be 'phasediff' or 'phase-pair'")
    tes = tuple(parse_time_s(t) for t in fm["echo_times"])
    if len(tes) != 2 or not 0 < tes[0] < tes[1]:
        raise InputError("fieldmap.echo_times must be two increasing echo times")
    return FieldmapSpec(kind=fm["kind"], echo_times_s=tes, voxel_mm=_voxel(fm["voxel_size"], "fieldmap.voxel_size"),
                        shape=_shape(fm["shape"], "fieldmap.shape"), center_mm=_vec_mm(fm["center"], "fieldmap.center"),
                        snr=float(fm["snr"]), t2star_s=parse_time_s(fm["t2star"]))


def _runs(runs: list) -> tuple[RunSpec, ...]:
    parsed = tuple(_run(r, f"runs[{i}]") for i, r in enumerate(runs))
    tasks = [run.task for run in parsed]
    for i, task in enumerate(tasks):
        if task in tasks[:i]:
            raise InputError(f"runs[{i}].task must be a unique word of letters and digits")
    return parsed


def _run(r: dict, where: str) -> RunSpec:
    task = str(r["task"])
    if not task.isalnum():
        raise InputError(f"{where}.task must be a unique word of letters and digits")
    parse_pe_code(r["phase_encoding_direction"])
    if int(r["volumes"]) < 1:
        raise InputError(f"{where}.volumes must be at least 1")
    return RunSpec(
        task=task, voxel_mm=_voxel(r["voxel_size"], f"{where}.voxel_size"), shape=_shape(r["shape"], f"{where}.shape"),
        center_mm=_vec_mm(r["center"], f"{where}.center"), pe_code=str(r["phase_encoding_direction"]),
        echo_spacing_s=parse_time_s(r["echo_spacing"]), te_s=parse_time_s(r["echo_time"]),
        repetition_time_s=parse_time_s(r["repetition_time"]), volumes=int(r["volumes"]),
        acceleration=int(r["acceleration"]), partial_fourier=float(r["partial_fourier"]),
        t2star_s=parse_time_s(r["t2star"]), noise=float(r["noise"]),
        motion_translation_mm=parse_length_mm(r["motion_translation"]),
        motion_rotation_deg=parse_angle_deg(r["motion_rotation"]))


def _roi(roi: dict) -> RoiSpec:
    name = str(roi.get("name", "roi"))
    if not name.isalnum():
        raise InputError("roi.name must be letters and digits")
    return RoiSpec(name=name, center_mm=_vec_mm(roi["center"], "roi.center"),
                   semi_axes_mm=_vec_mm(roi["semi_axes"], "roi.semi_axes"))


@dataclass(frozen=True)
class ManifestRun(Record):
    """One generated EPI run: the image, its timing, the simulated motion (per volume:
    translation in voxels and rotation in degrees) and its truth on the run grid (B0 in Hz,
    brain mask, undistorted reference; the ROI mask when the scenario names one)."""

    task: str
    bold: str
    pe_code: str
    total_readout_time_s: float
    effective_echo_spacing_s: float
    te_s: float
    slice_thickness_mm: float
    motion: list[list[float]]
    truth_b0_hz: str
    brain_mask: str
    undistorted: str
    roi_mask: str | None = None


@dataclass(frozen=True)
class ManifestFieldmap(Record):
    """The generated gradient-echo field map: its kind, echo times (s) and files by BIDS suffix."""

    kind: str
    echo_times_s: list[float]
    files: dict[str, str]


@dataclass(frozen=True)
class FieldmapTruth(Record):
    """The truth on the field-map grid: B0 (Hz), brain mask, brain B0 percentiles (p1, p50, p99)."""

    b0_hz: str
    brain_mask: str
    brain_b0_hz_percentiles: dict[str, float]
    roi_mask: str | None = None


@dataclass(frozen=True)
class ManifestEntry(Record):
    """One subject (and session): the head's pitch (degrees) and size, runs, field map and truth."""

    subject: str
    session: str
    pitch_deg: float
    head_scale: float
    runs: list[ManifestRun]
    fieldmap: ManifestFieldmap
    truth: FieldmapTruth


@dataclass(frozen=True)
class ScenarioManifest(Record):
    """Everything a generation wrote, with the definition, its hash and the seed."""

    scenario: str
    title: str
    generator_version: int
    definition_sha256: str
    definition: dict[str, object]
    seed: int
    field_strength_t: float
    roi_name: str | None
    entries: list[ManifestEntry]
