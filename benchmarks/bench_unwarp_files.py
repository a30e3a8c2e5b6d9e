"""EPI unwarping as a user runs it: the command on a .nii.gz file, each run in a fresh process.

Data: a synthetic 104x104x72 run of 300 volumes (2.5 mm, an ellipsoidal head with texture and
noise everywhere, as EPI backgrounds have), written once into a temporary folder as float32
and as int16 ``.nii.gz`` (``--quick``: 30 volumes), and a smooth invented B0 map (shifts up to
about 5 voxels).

Every measurement is a fresh ``python`` process timed from the outside (interpreter start,
imports, numba cache loading, reading, correcting, writing); peak memory is the process's
VmHWM from /proc/self/status. The two sides run in turns (``ROUNDS`` times; medians).

* ``unwarp_file_<dtype>_<interp>_vs_nibabel``: ``fieldfix unwarp RUN --b0 B0 --no-report``
  (all outputs: corrected run, shift, Jacobian, fold mask, displacement, summary, provenance)
  with the default cubic B-spline, and with ``--interp linear``, against nibabel loading the
  same file and saving it again (``nib.save(nib.Nifti1Image(np.asarray(img.dataobj,
  np.float32), img.affine, img.header), out)``). Goals: ours at most 0.35x nibabel's time
  (cubic) and 0.25x (linear), peak RSS under 400 MiB. ``ratio`` = nibabel time / ours.
* ``unwarp_file_memory_<small>_vs_<large>``: peak RSS of the cubic command on a 100- and a
  300-volume float32 run (10 and 30 with ``--quick``); goal: flat (ratio <= 1.1) and < 400 MiB.
* ``unwarp_file_motion_vs_plain``: ``--motion`` (each volume's pose and one interpolation for motion
  and distortion) against the same command without it; goal: within 2.5x, peak RSS < 400 MiB.
* ``unwarp_simulated_nrmse_cubic_vs_linear``: accuracy rather than speed. A head-like object
  and field (``fieldfix.simulate.gradient_echo``) acquired line by line in k-space with the
  project's EPI simulator (``fieldfix.simulate.simulate_epi``, gradient echo) in both
  polarities (j and j-), unwarped with the true field; NRMSE inside the object against the
  object on the EPI grid, cubic and linear, and the distorted images' NRMSE for scale. The
  field is averaged through each slice (through-slice dephasing is dropout, not distortion).
"""

from __future__ import annotations

import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from _harness import main

SHAPE = (104, 104, 72)
ECHO_SPACING_S = 0.0005
ROUNDS = 1

_HWM = r"""
def hwm_mib():
    with open("/proc/self/status") as handle:
        for line in handle:
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024
"""

_OURS = _HWM + r"""
import json, sys
from fieldfix_cli.main import main
status = main(sys.argv[2:])
with open(sys.argv[1], "w") as handle:
    json.dump({"status": status, "peak_rss_mib": hwm_mib()}, handle)
"""

_NIBABEL = _HWM + r"""
import json, sys
import nibabel as nib
import numpy as np
img = nib.load(sys.argv[2])
nib.save(nib.Nifti1Image(np.asarray(img.dataobj, np.float32), img.affine, img.header), sys.argv[3])
with open(sys.argv[1], "w") as handle:
    json.dump({"status": 0, "peak_rss_mib": hwm_mib()}, handle)
"""


def _field_hz(shape):
    """A smooth invented B0 map with a strong frontal offset: shifts up to about 5 voxels."""
    x, y, z = np.meshgrid(*[np.linspace(-1, 1, n) for n in shape], indexing="ij")
    return 60.0 * np.exp(-((x / 0.4) ** 2 + ((y - 0.6) / 0.25) ** 2 + ((z + 0.3) / 0.3) ** 2)) + 15.0 * y


def _object(shape):
    grids = np.meshgrid(*[np.linspace(-1, 1, n) for n in shape], indexing="ij")
    r2 = sum((g / s) ** 2 for g, s in zip(grids, (0.75, 0.85, 0.8)))
    return (1000.0 * (r2 < 1) * (1 + 0.2 * np.cos(6 * grids[0]) * np.sin(5 * grids[1]))).astype(np.float32)


def _write_inputs(work: Path, n_volumes: int, dtype, rng) -> Path:
    from fieldfix.io import StreamingWriter

    name = f"run{n_volumes}_{np.dtype(dtype).name}_bold.nii.gz"
    base = _object(SHAPE)
    with StreamingWriter(work / name, SHAPE + (n_volumes,), np.diag([2.5, 2.5, 2.5, 1.0]), dtype=dtype) as writer:
        for _ in range(n_volumes):
            volume = base + rng.normal(0, 20.0, SHAPE).astype(np.float32) + 40.0
            writer.write(np.rint(volume) if np.dtype(dtype).kind == "i" else volume)
    (work / name.replace(".nii.gz", ".json")).write_text(json.dumps({"PhaseEncodingDirection": "j-",
                                                                      "EffectiveEchoSpacing": ECHO_SPACING_S}))
    return work / name


def _fresh(script: str, args: list[str], work: Path) -> dict:
    report = work / "fresh.json"
    report.unlink(missing_ok=True)
    start = time.perf_counter()
    done = subprocess.run([sys.executable, "-c", script, str(report), *args], capture_output=True, text=True)
    seconds = time.perf_counter() - start
    if done.returncode != 0:
        raise RuntimeError(f"benchmark process failed ({done.returncode}): {done.stderr[-2000:]}")
    return {"seconds": seconds, **json.loads(report.read_text())}


def _ours(run: Path, b0: Path, work: Path, interp: str, *extra: str) -> dict:
    out = work / "out"
    result = _fresh(_OURS, ["unwarp", str(run), "--b0", str(b0), "--out", str(out), "--no-report", "--quiet",
                            "--interp", interp, *extra], work)
    shutil.rmtree(out)
    return result


def _nibabel(run: Path, work: Path) -> dict:
    target = work / "nibabel_copy.nii.gz"
    result = _fresh(_NIBABEL, [str(run), str(target)], work)
    target.unlink()
    return result


def _file_records(work: Path, runs: dict, b0: Path) -> list[dict]:
    records = []
    for dtype, run in runs.items():
        times = {"nibabel": [], "cubic": [], "linear": []}
        peaks = {key: [] for key in times}
        for _ in range(ROUNDS):  # in turns, so that a busy moment of the machine hits every side
            for side in times:
                result = _nibabel(run, work) if side == "nibabel" else _ours(run, b0, work, side)
                times[side].append(result["seconds"])
                peaks[side].append(result["peak_rss_mib"])
        base = statistics.median(times["nibabel"])
        for interp, goal in (("cubic", 0.35), ("linear", 0.25)):
            ours = statistics.median(times[interp])
            peak = max(peaks[interp])
            records.append({
                "benchmark": f"unwarp_file_{dtype}_{interp}_vs_nibabel", "ours_s": ours,
                "baseline": "nibabel load + save of the same .nii.gz (fresh process)", "baseline_s": base,
                "ratio": base / ours, "ours_over_baseline": ours / base, "ours_peak_mib": peak,
                "baseline_peak_mib": max(peaks["nibabel"]), "file_mib": run.stat().st_size / 2**20,
                "volumes": int(run.name.split("_")[0][3:]), "rounds": ROUNDS,
                "load_average_1min": os.getloadavg()[0],
                "goal": f"ours <= {goal}x nibabel's time and peak RSS < 400 MiB",
                "met": bool(ours <= goal * base and peak < 400.0),
            })
    return records


def _memory_record(work: Path, small_run: Path, large_run: Path, b0: Path) -> dict:
    small = _ours(small_run, b0, work, "cubic")["peak_rss_mib"]
    large = _ours(large_run, b0, work, "cubic")["peak_rss_mib"]
    n_small, n_large = (int(p.name.split("_")[0][3:]) for p in (small_run, large_run))
    return {"benchmark": f"unwarp_file_memory_{n_small}_vs_{n_large}", f"peak_rss_mib_{n_small}": small,
            f"peak_rss_mib_{n_large}": large, "ratio": large / small,
            "whole_run_mib": float(np.prod(SHAPE) * 4 * n_large / 2**20),
            "goal": "peak RSS flat in the number of volumes (ratio <= 1.1) and < 400 MiB",
            "met": bool(large <= 1.1 * small and large < 400.0)}


def _motion_record(work: Path, run: Path, b0: Path) -> dict:
    """``unwarp --motion`` (per-volume poses, one interpolation) against the plain cubic unwarp."""
    times, peaks = {"plain": [], "motion": []}, {"plain": [], "motion": []}
    for _ in range(ROUNDS):
        for side in times:
            result = _ours(run, b0, work, "cubic", *(["--motion"] if side == "motion" else []))
            times[side].append(result["seconds"])
            peaks[side].append(result["peak_rss_mib"])
    plain, motion = statistics.median(times["plain"]), statistics.median(times["motion"])
    return {"benchmark": "unwarp_file_motion_vs_plain", "ours_s": motion, "baseline": "the same command without "
            "--motion (fresh process)", "baseline_s": plain, "ratio": plain / motion,
            "ours_over_baseline": motion / plain, "ours_peak_mib": max(peaks["motion"]),
            "baseline_peak_mib": max(peaks["plain"]), "volumes": int(run.name.split("_")[0][3:]),
            "goal": "per-volume motion + unwarp within 2.5x the time of unwarp alone, peak RSS < 400 MiB",
            "met": bool(motion <= 2.5 * plain and max(peaks["motion"]) < 400.0)}


def _nrmse_record(quick: bool) -> dict:
    """Accuracy of default (cubic) and linear unwarping on the k-space EPI simulator, both polarities."""
    from fieldfix.simulate.epi import simulate_epi
    from fieldfix.simulate.gradient_echo import ellipsoid_magnitude, head_field_hz
    from fieldfix.unwarp import shift_maps, unwarp_volume

    shape = (32, 48, 4) if quick else (48, 64, 8)
    oversample = (3, 3, 2)
    fine_shape = tuple(n * o for n, o in zip(shape, oversample))
    from scipy import ndimage

    # smooth edges (about one EPI voxel): a sharp-edged object rings in any k-space acquisition,
    # an error no unwarping can remove
    y = np.linspace(0, 1, fine_shape[1])[None, :, None]
    sharp = ellipsoid_magnitude(fine_shape) * (1 + 0.25 * np.cos(2 * np.pi * 6 * y))  # texture along PE
    obj = ndimage.gaussian_filter(sharp, sigma=[0.8 * o for o in oversample])
    # the head field averaged through each slice: through-slice dephasing (signal dropout, 20 %
    # of the signal here otherwise) is no distortion, and no unwarping restores it
    field = head_field_hz(fine_shape, amplitude_hz=150.0)
    field = np.repeat(field.reshape(shape[0] * oversample[0], shape[1] * oversample[1], shape[2], oversample[2])
                      .mean(axis=3), oversample[2], axis=2)

    def block_mean(fine):
        a, b, c = oversample
        return fine.reshape(shape[0], a, shape[1], b, shape[2], c).mean(axis=(1, 3, 5))

    truth, field_grid = block_mean(obj), block_mean(field)
    inside = truth > 0.05

    def nrmse(image):
        return float(np.sqrt(np.mean((image - truth)[inside] ** 2)) / np.sqrt(np.mean(truth[inside] ** 2)))

    record = {"benchmark": "unwarp_simulated_nrmse_cubic_vs_linear", "grid": "x".join(map(str, shape)),
              "simulator": "fieldfix.simulate.simulate_epi, gradient echo, TE 30 ms, echo spacing 0.5 ms"}
    for code in ("j", "j-"):
        image = simulate_epi(obj, field, pe_code=code, echo_spacing_s=ECHO_SPACING_S, te_s=0.03,
                             oversample=oversample)
        maps = shift_maps(field_grid, code, ECHO_SPACING_S)
        key = code.replace("-", "minus")
        record[f"nrmse_distorted_{key}"] = nrmse(image)
        record[f"max_abs_shift_vox_{key}"] = float(np.abs(maps.shift_vox[inside]).max())
        for interp in ("cubic", "linear"):
            record[f"nrmse_{interp}_{key}"] = nrmse(unwarp_volume(image, maps.shift_vox, 1, interp=interp))
    record["ratio"] = (record["nrmse_linear_j"] + record["nrmse_linear_jminus"]) / (
        record["nrmse_cubic_j"] + record["nrmse_cubic_jminus"])
    record["goal"] = "cubic (the default) no less accurate than linear in both polarities (ratio >= 1)"
    record["met"] = bool(all(record[f"nrmse_cubic_{k}"] <= record[f"nrmse_linear_{k}"] for k in ("j", "jminus")))
    return record


def run(quick: bool) -> list[dict]:
    from fieldfix.io import save_image

    rng = np.random.default_rng(2026)
    n_volumes, small = (30, 10) if quick else (300, 100)
    work = Path(tempfile.mkdtemp(prefix="fieldfix-bench-files-"))
    try:
        b0 = save_image(work / "b0_hz.nii.gz", _field_hz(SHAPE), np.diag([2.5, 2.5, 2.5, 1.0]))
        runs = {"float32": _write_inputs(work, n_volumes, np.float32, rng),
                "int16": _write_inputs(work, n_volumes, np.int16, rng)}
        small_run = _write_inputs(work, small, np.float32, rng)
        for interp in ("cubic", "linear"):  # fill numba's cache (each kernel compiles once) and the page cache
            _ours(small_run, b0, work, interp)
        records = _file_records(work, runs, b0)
        records.append(_memory_record(work, small_run, runs["float32"], b0))
        records.append(_motion_record(work, runs["float32"], b0))
        records.append(_nrmse_record(quick))
        return records
    finally:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main(run, __doc__, "30 volumes")
