"""The typed summary of the demo (steps run and checks against the ground truth)."""

from __future__ import annotations

from dataclasses import dataclass, field

from ..records import Record
from .base import CAUTION


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

    Shift errors: the unwarping's shift map against the true field's shift, in the brain
    (voxels). Edge agreements are normalised-gradient-field agreements with the undistorted
    simulation (1: every edge in place), over the brain and in the brain where the correction
    moved voxels by more than half a voxel: before, after, and for the run unwarped by the
    scenario's true field (``*_true_field``, the best a field map can give).
    """

    b0_brain_p1_p99_hz: list[float] | None = None
    b0_error_vs_truth_median_hz: float | None = None
    b0_error_vs_truth_p95_hz: float | None = None
    max_abs_shift_vox: float | None = None
    percent_shifted_over_1_voxel: float | None = None
    shift_error_vs_truth_median_vox: float | None = None
    shift_error_vs_truth_p95_vox: float | None = None
    edge_agreement_before: float | None = None
    edge_agreement_after: float | None = None
    edge_agreement_true_field: float | None = None
    edge_agreement_shifted_before: float | None = None
    edge_agreement_shifted_after: float | None = None
    edge_agreement_shifted_true_field: float | None = None
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
