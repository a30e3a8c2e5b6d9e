"""Following head motion through a run while it is unwarped (an unwarping option).

For each volume in turn (as the run streams) the rigid pose against the first volume is
estimated with the field moving with the head (:func:`fieldfix.motion.align_volume_pose`,
starting from the previous volume's pose), and motion and distortion are undone in one cubic
B-spline interpolation (:func:`fieldfix.motion.align_resample_volume`), so the data are not
blurred twice. The poses go into a TSV table (six columns with units, framewise displacement).
First order: the field moves with the head; its change with the head's orientation to B0, spin
history and through-slice motion are neglected.
"""

from __future__ import annotations

import numpy as np

from ..shift import Readout
from ..motion import (
    MotionOptions,
    MotionResult,
    align_motion_model,
    align_motion_result,
    align_motion_tsv,
    align_resample_volume,
    align_volume_pose,
)
from ..outdir import atomic_output
from ..outputs import MotionRecord

__all__ = ["MotionFollower", "MOTION_METHOD"]

MOTION_METHOD = ("per-volume rigid pose against the first volume (least squares, the field moving with the head, "
                 "Gauss-Newton over a 4-2-1 pyramid), motion and distortion undone in one cubic B-spline "
                 "interpolation with the Jacobian; framewise displacement after Power et al. 2012 (NeuroImage)")


class MotionFollower:
    """Estimates each volume's pose and corrects it; keeps the poses for the motion table."""

    def __init__(self, plan, jacobian_floor: float):
        readout = Readout(plan.pe_code, plan.timing.echo_spacing_s, plan.timing.n_pe_lines)
        options = MotionOptions(jacobian_floor=jacobian_floor, parallel=False)  # beside the reader and writer
        self.model = align_motion_model(plan.reference, plan.image.affine, plan.field_hz, readout, options)
        self.poses = []

    def correct(self, volume: np.ndarray) -> np.ndarray:
        """The volume in the first volume's position, undistorted (one interpolation)."""
        volume = np.asarray(volume, np.float64)
        pose = align_volume_pose(self.model, volume, self.poses[-1] if self.poses else None)
        self.poses.append(pose)
        return align_resample_volume(self.model, volume, pose)

    def result(self) -> MotionResult:
        return align_motion_result(self.poses)

    def write_table(self, path, inputs, overwrite: bool) -> MotionRecord:
        """Write the motion table (TSV) and return the run's motion record."""
        result = self.result()
        with atomic_output(path, inputs, overwrite) as temporary:
            temporary.write_text(align_motion_tsv(result), encoding="utf-8")
        fd = result.framewise_displacement_mm
        return MotionRecord(
            volumes=len(self.poses), mean_framewise_displacement_mm=float(fd.mean()) if fd.size else 0.0,
            max_framewise_displacement_mm=float(fd.max()) if fd.size else 0.0,
            max_translation_mm=float(np.abs(result.translation_mm).max()) if fd.size else 0.0,
            max_rotation_deg=float(np.abs(result.rotation_deg).max()) if fd.size else 0.0,
            converged_volumes=int(result.converged.sum()), warnings=list(result.warnings), method=MOTION_METHOD)
