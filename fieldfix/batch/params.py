"""Typed parameters of the batch's tasks: what the planner decides and the runners read.

Each task kind has its record; :func:`fieldfix.batch.task_hash` hashes its JSON form and the
task's marker keeps it, so a value the planner renames or forgets is a ``TypeError`` when
the task is planned, never a default a runner silently falls back to. SI units throughout;
None where a sidecar did not say.

Examples
--------
>>> UnwarpParams(pe_code="j-", readout_time_s=0.03, echo_spacing_s=None, te_s=0.03, interp="cubic",
...              masks="fieldmap", align_fieldmap=True, motion=False).to_json()["readout_time_s"]
0.03
"""

from __future__ import annotations

from dataclasses import dataclass

from ..records import Record

__all__ = ["FieldmapKind", "GradientEchoParams", "ScannerMapParams", "EpiGroupParams", "RunTiming",
           "UnwarpParams", "DropoutParams"]


@dataclass(frozen=True)
class FieldmapKind(Record):
    """A field-map task of a kind fieldfix cannot make (it fails with the acquisition's problems)."""

    kind: str


@dataclass(frozen=True)
class GradientEchoParams(FieldmapKind):
    """A dual-echo acquisition ('phasediff' or 'phase-pair'): the sidecars' echo times and
    declared phase units, the phase units the user chose (None: detected), and the processing."""

    echo_times_s: list[float | None]
    declared_phase_units: str | None
    phase_units: str | None
    smooth_mm: float
    unwrap_method: str


@dataclass(frozen=True)
class ScannerMapParams(FieldmapKind):
    """A scanner's ready field map ('fieldmap'): its sidecar's units and field strength (T)."""

    units: str | None
    field_strength_t: float | None
    smooth_mm: float


@dataclass(frozen=True)
class EpiGroupParams(FieldmapKind):
    """Reversed phase-encode EPI images ('epi'): per image role (sorted), its code and timing."""

    roles: list[str]
    pe_codes: list[str | None]
    readout_times_s: list[float | None]
    echo_spacings_s: list[float | None]


@dataclass(frozen=True)
class RunTiming(Record):
    """A run's phase-encode code (None when its sidecar's is unusable) and readout timing (s)."""

    pe_code: str | None
    readout_time_s: float | None
    echo_spacing_s: float | None


@dataclass(frozen=True)
class UnwarpParams(RunTiming):
    """Unwarping a run: interpolation, which masks, field-map alignment, motion; the run's echo time
    (its sidecar's ``EchoTime``, inherited; None without one) for the alignment's signal model."""

    te_s: float | None
    interp: str
    masks: str
    align_fieldmap: bool
    motion: bool


@dataclass(frozen=True)
class DropoutParams(RunTiming):
    """Predicting a run's dropout: the echo time used (the option, else the sidecar's), the
    sidecar's slice thickness and slice axis, the options as given, the slice tilt and masks."""

    te_s: float | None
    slice_thickness_mm: float | None
    slice_encoding_direction: str | None
    te_s_option: float | None
    thickness_mm_option: float | None
    tilt_deg: float
    masks: str
