"""Field-map alignment and per-volume motion correction: speed against baselines, memory against run length.

* ``align_fieldmap_64x64x40``: :func:`fieldfix.align.align_fieldmap` of a 64x64x40 run (3.5 mm)
  to a 56x60x44 field map (invented smooth head, distorted by its field with the forward model,
  moved 2 deg / 3 mm). Baseline: scipy.optimize.minimize (Powell, no gradients) on the same
  NGF cost at the finest level, the prediction made with scipy.ndimage.map_coordinates and
  :func:`fieldfix.unwarp.distort`. Goal: ours under 5 s on 2 cores; ratio = baseline / ours.
* ``motion_per_volume_104x104x72``: per volume, pose estimation plus the single-interpolation
  correction (:func:`fieldfix.motion.align_run_volumes`) of 10 volumes of an invented head moved
  at random (0.3 mm / 0.3 deg standard deviation per axis), against the current unwarp alone
  (``build_tables`` once + ``apply_tables`` with ``interp='cubic'`` per volume); best of three
  calls per side. Goal: ours within 2.5x of the unwarp's time per volume (ratio = unwarp / ours
  >= 0.4). Also printed: the pose estimation alone per volume and the largest recovery errors
  of the poses (mm, deg) against the simulated ones.
* ``motion_memory_20_vs_60``: peak memory of going through a 20- and a 60-volume run held in a
  memory-mapped file, each in a fresh process; goal: nearly the same (ratio <= 1.2).

``--quick`` uses smaller sizes (48x48x30 runs, 4 and 12 volumes).
"""

from __future__ import annotations

import json
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from _harness import compare, timed, main  # noqa: E402


def _grid(shape, voxel_mm):
    affine = np.diag([voxel_mm, voxel_mm, voxel_mm, 1.0])
    affine[:3, 3] = -voxel_mm * (np.asarray(shape) - 1) / 2.0
    return affine


def _head(points):
    x, y, z = points[..., 0], points[..., 1], points[..., 2]
    r2 = (x / 70.0) ** 2 + (y / 88.0) ** 2 + (z / 80.0) ** 2
    inner = 1.0 / (1.0 + np.exp((r2 - 0.8) * 40.0))
    outer = 1.0 / (1.0 + np.exp((r2 - 1.0) * 40.0))
    return 0.6 * outer + inner * (0.5 + 0.2 * np.cos(x / 8.0) * np.sin(y / 9.0) * np.cos(z / 7.0))


def _field(points):
    x, y, z = points[..., 0], points[..., 1], points[..., 2]
    return 120.0 * np.exp(-((x / 25.0) ** 2 + ((y - 55.0) / 20.0) ** 2 + ((z + 30.0) / 20.0) ** 2)) + 0.15 * y


def _points(shape, affine, pose=np.eye(4)):
    ijk = np.stack(np.meshgrid(*[np.arange(n, dtype=float) for n in shape], indexing="ij"), axis=-1)
    world = ijk @ affine[:3, :3].T + affine[:3, 3]
    inverse = np.linalg.inv(pose)
    return world @ inverse[:3, :3].T + inverse[:3, 3]


def _epi(shape, affine, pose, esp):
    from fieldfix.unwarp import distort_with_field

    points = _points(shape, affine, pose)
    return distort_with_field(_head(points), _field(points), "j-", esp)


def _align_record(quick: bool) -> dict:
    from scipy import ndimage, optimize

    from fieldfix import _pose
    from fieldfix.align import align_fieldmap, align_rigid_matrix
    from fieldfix.shift import Readout

    shape = (48, 48, 30) if quick else (64, 64, 40)
    run_affine, fm_affine = _grid(shape, 3.5), _grid((56, 60, 44), 3.8)
    pose = align_rigid_matrix((0.0, 3.0, 0.0), (2.0, 0.0, 0.0), (0.0, 0.0, 0.0))
    esp = 5e-4
    reference = _epi(shape, run_affine, pose, esp)
    points = _points((56, 60, 44), fm_affine)
    magnitude, b0_hz = _head(points), _field(points)
    readout = Readout("j-", esp)

    def ours():
        return align_fieldmap(magnitude, b0_hz, fm_affine, reference, run_affine, readout)

    centre = np.zeros(3)
    world = _points(shape, run_affine)
    spacing = (3.5, 3.5, 3.5)
    from fieldfix.unwarp import distort

    def predict(x):
        m = np.linalg.inv(fm_affine) @ np.linalg.inv(_pose.pose_matrix(x[:3], np.deg2rad(x[3:]), centre))
        coords = np.moveaxis(world @ m[:3, :3].T + m[:3, 3], -1, 0)
        u = ndimage.map_coordinates(magnitude, coords, order=1, mode="constant")
        f = ndimage.map_coordinates(b0_hz, coords, order=1, mode="nearest")
        return distort(u, readout.shift_per_hz(shape) * f, 1)

    ngf = _pose.make_ngf(reference, spacing, predict(np.zeros(6)), 0.3)

    def baseline():
        return optimize.minimize(lambda x: ngf(predict(x))[0], np.zeros(6), method="Powell",
                                 options={"xtol": 0.01, "ftol": 1e-7, "maxfev": 3000})

    record = compare(f"align_fieldmap_{'x'.join(map(str, shape))}", ours, baseline,
                     baseline_name="scipy.optimize Powell on the same NGF cost, scipy.ndimage resampling",
                     goal="ours < 5 s on 2 cores", repeat=1, warmup=1, extra={"grid": "x".join(map(str, shape))})
    result, base = record["_results"]
    record["met"] = bool(record["ours_s"] < 5.0)
    record["ours_error_mm"] = float(np.abs(np.subtract(result.translation_mm, (0, 3, 0))).max())
    record["ours_error_deg"] = float(np.abs(np.subtract(result.rotation_deg, (2, 0, 0))).max())
    record["baseline_error_mm"] = float(np.abs(base.x[:3] - (0, 3, 0)).max())
    return record


def _run_volumes(shape, n_volumes, rng, poses=None):
    from fieldfix.align import align_rigid_matrix

    affine = _grid(shape, 2.5)
    volumes, matrices = [], []
    for _ in range(n_volumes):
        pose = align_rigid_matrix(rng.normal(0, 0.3, 3), rng.normal(0, 0.3, 3), (0.0, 0.0, 0.0))
        matrices.append(pose)
        volumes.append(_epi(shape, affine, pose, 5e-4).astype(np.float32))
    if poses is not None:
        poses.extend(matrices)
    return affine, np.stack(volumes, axis=-1)


def _recovery_errors(result, matrices):
    """Largest errors (mm, deg) of the estimated poses against the simulated ones, relative to volume 0."""
    from fieldfix.align import align_rigid_parameters

    errors_mm, errors_deg = [], []
    for t, matrix in enumerate(matrices):
        translation, rotation = align_rigid_parameters(matrix @ np.linalg.inv(matrices[0]), (0.0, 0.0, 0.0))
        errors_mm.append(np.abs(result.translation_mm[t] - translation).max())
        errors_deg.append(np.abs(result.rotation_deg[t] - rotation).max())
    return float(max(errors_mm)), float(max(errors_deg))


def _motion_record(quick: bool, rng) -> dict:
    from fieldfix.shift import Readout
    from fieldfix.motion import align_motion, align_motion_model, align_run_volumes
    from fieldfix.unwarp import apply_tables, build_tables

    shape = (48, 48, 30) if quick else (104, 104, 72)
    n_volumes = 4 if quick else 10
    matrices = []
    affine, run = _run_volumes(shape, n_volumes, rng, matrices)
    b0_hz = _field(_points(shape, affine, matrices[0]))  # the field where the head is in volume 0
    model = align_motion_model(run[..., 0], affine, b0_hz, Readout("j-", 5e-4))

    def ours():
        for _ in align_run_volumes(run, model):
            pass

    def baseline():
        tables = build_tables(model.shift_vox, 1, interp="cubic")
        for t in range(n_volumes):
            apply_tables(tables, run[..., t])

    record = compare(f"motion_per_volume_{'x'.join(map(str, shape))}", ours, baseline,
                     baseline_name="fieldfix.unwarp build_tables + apply_tables (cubic), no motion",
                     goal="ours within 2.5x of the unwarp's time per volume (ratio >= 0.4)", goal_ratio=0.4,
                     repeat=3, warmup=1, extra={"grid": "x".join(map(str, shape)), "volumes": n_volumes})
    record["ours_per_volume_s"] = record["ours_s"] / n_volumes
    record["baseline_per_volume_s"] = record["baseline_s"] / n_volumes
    pose_s, result, _ = timed(lambda: align_motion(run, model), repeat=3, warmup=0)
    record["ours_pose_only_per_volume_s"] = pose_s / n_volumes
    record["recovery_error_mm"], record["recovery_error_deg"] = _recovery_errors(result, matrices)
    return record


_MEMORY_SCRIPT = r"""
import json, sys
import numpy as np
sys.path.insert(0, sys.argv[4])
import bench_align as b
from fieldfix.shift import Readout
from fieldfix.motion import align_motion_model, align_run_volumes
path, shape, n = sys.argv[1], tuple(json.loads(sys.argv[2])), int(sys.argv[3])
run = np.memmap(path, dtype=np.float32, mode="r", shape=shape + (n,))
affine = b._grid(shape, 2.5)
model = align_motion_model(np.asarray(run[..., 0]), affine, b._field(b._points(shape, affine)), Readout("j-", 5e-4))
for _ in align_run_volumes(run[..., :1], model):
    pass
def status_mib(key):
    with open("/proc/self/status") as handle:
        for line in handle:
            if line.startswith(key + ":"):
                return int(line.split()[1]) / 1024
try:
    open("/proc/self/clear_refs", "w").write("5")
except OSError:
    pass
before = status_mib("VmRSS")
for _ in align_run_volumes(run, model):
    pass
print(json.dumps({"rss_rise_mib": status_mib("VmHWM") - before}))
"""


def _memory_record(quick: bool, rng) -> dict:
    shape = (48, 48, 30) if quick else (104, 104, 72)
    lengths = (4, 12) if quick else (20, 60)
    work = Path(tempfile.mkdtemp(prefix="fieldfix-bench-align-"))
    _, volumes = _run_volumes(shape, 3, rng)
    rise = {}
    for n in lengths:
        path = work / f"run{n}.f32"
        mm = np.memmap(path, dtype=np.float32, mode="w+", shape=shape + (n,))
        for t in range(n):
            mm[..., t] = volumes[..., t % 3]
        mm.flush()
        del mm
        done = subprocess.run([sys.executable, "-c", _MEMORY_SCRIPT, str(path), json.dumps(shape), str(n), str(HERE)],
                              capture_output=True, text=True, check=True)
        rise[n] = json.loads(done.stdout.strip().splitlines()[-1])["rss_rise_mib"]
        path.unlink()
    small, large = lengths
    return {"benchmark": f"motion_memory_{small}_vs_{large}", f"rss_rise_mib_{small}": rise[small],
            f"rss_rise_mib_{large}": rise[large], "ratio": rise[large] / max(rise[small], 1e-9),
            "one_volume_mib": float(np.prod(shape) * 4 / 2**20),
            "goal": "peak memory nearly independent of the number of volumes (ratio <= 1.2)",
            "met": bool(rise[large] <= 1.2 * rise[small] + 8.0)}


def run(quick: bool) -> list[dict]:
    rng = np.random.default_rng(2027)
    return [_align_record(quick), _motion_record(quick, rng), _memory_record(quick, rng)]


if __name__ == "__main__":
    main(run, __doc__, "smaller sizes")
