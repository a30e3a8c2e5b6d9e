"""Bad input through the real console script: one clear line, exit status 2, nothing written.

Every refusal case runs ``fieldfix <command> ... --out DIR`` (in this process through
``fieldfix_cli.main.main`` with captured streams and every warning shown; a handful of cases,
``CONSOLE_CASES``, also through the installed console script) and checks

* exit status 2 and exactly one line on stderr, which names the problem (a regular
  expression per case) and the offending file (or option);
* nothing written: DIR is absent or empty afterwards;
* inputs untouched: every input file is byte-identical to before.

Each case is its own test. Cases that a subcommand does not
refuse properly yet are marked ``xfail(strict=True)`` with the reason and the place to fix.
"""

from __future__ import annotations

import contextlib
import dataclasses
import io
import json
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path
from typing import Callable
import warnings

import nibabel as nib
import numpy as np
import pytest

SCRIPT = shutil.which("fieldfix", path=str(Path(sys.executable).parent)) or shutil.which("fieldfix")

# ---------------------------------------------------------------------------------------------
# A small consistent dataset: EPI run, B0 map (Hz) and dual-echo field-map images on one grid.
# ---------------------------------------------------------------------------------------------
SHAPE = (16, 16, 8)
VOXEL_MM = 2.5
N_VOLUMES = 3
READOUT_S = 0.03  # total readout time; 16 lines -> echo spacing 2 ms
TE1_S, TE2_S = 0.00492, 0.00738


def grid_affine(shape=SHAPE, offset_mm=(0.0, 0.0, 0.0)) -> np.ndarray:
    affine = np.diag([VOXEL_MM, VOXEL_MM, VOXEL_MM, 1.0])
    affine[:3, 3] = -(np.array(shape[:3]) - 1) / 2 * VOXEL_MM + np.asarray(offset_mm)
    return affine


def field_hz(shape=SHAPE, peak_hz=30.0) -> np.ndarray:
    i, j, k = np.meshgrid(*[np.linspace(-1, 1, n) for n in shape], indexing="ij")
    return peak_hz * np.exp(-2 * ((i - 0.2) ** 2 + (j + 0.1) ** 2 + k ** 2))


def head(shape=SHAPE) -> np.ndarray:
    """An ellipsoid of signal 1000 inside a zero background."""
    i, j, k = np.meshgrid(*[np.linspace(-1, 1, n) for n in shape], indexing="ij")
    return np.where(i ** 2 / 0.7 + j ** 2 / 0.8 + k ** 2 / 0.9 < 1, 1000.0, 0.0)


def write_image(path: Path, data, affine=None, *, dtype=np.float32, slope_inter=None, sidecar=None,
                tr_s=None) -> Path:
    data = np.asarray(data)
    image = nib.Nifti1Image(data.astype(dtype), grid_affine() if affine is None else affine)
    image.header.set_xyzt_units("mm", "sec")
    if tr_s is not None and data.ndim == 4:
        image.header.set_zooms(image.header.get_zooms()[:3] + (tr_s,))
    if slope_inter is not None:
        image.header.set_slope_inter(*slope_inter)
    path.parent.mkdir(parents=True, exist_ok=True)
    nib.save(image, path)
    if sidecar is not None:
        name = path.name.replace(".nii.gz", "").replace(".nii", "") + ".json"
        (path.parent / name).write_text(json.dumps(sidecar))
    return path


def run_data(n_volumes=N_VOLUMES, shape=SHAPE) -> np.ndarray:
    base = head(shape)
    return np.stack([base * (1 + 0.01 * t) for t in range(n_volumes)], axis=-1)


RUN_SIDECAR = {"PhaseEncodingDirection": "j-", "TotalReadoutTime": READOUT_S, "RepetitionTime": 2.0}


def make_run(folder: Path, name="sub-01_task-rest_bold.nii.gz", sidecar=None, data=None, **kw) -> Path:
    return write_image(folder / name, run_data() if data is None else data,
                       sidecar=RUN_SIDECAR if sidecar is None else sidecar, tr_s=2.0, **kw)


def make_b0(folder: Path, name="b0_hz.nii.gz", values=None, affine=None, **kw) -> Path:
    return write_image(folder / name, field_hz() if values is None else values, affine, **kw)


def phasediff_rad() -> np.ndarray:
    """Phase difference (rad) of the field inside the head; uniform noise in the background."""
    noise = np.random.default_rng(7).uniform(-np.pi, np.pi, SHAPE)
    return np.where(head() > 0, 2 * np.pi * field_hz() * (TE2_S - TE1_S), noise)


def make_phasediff(folder: Path, values=None, sidecar=None, **kw) -> Path:
    dphi = phasediff_rad() if values is None else values
    return write_image(folder / "sub-01_phasediff.nii.gz", dphi,
                       sidecar={"EchoTime1": TE1_S, "EchoTime2": TE2_S} if sidecar is None else sidecar, **kw)


def make_magnitude(folder: Path, values=None, **kw) -> Path:
    return write_image(folder / "sub-01_magnitude1.nii.gz", head() if values is None else values, **kw)


def with_nan(data: np.ndarray, value=np.nan) -> np.ndarray:
    data = np.array(data, dtype=np.float32)
    data[8, 8, 4, ...] = value
    return data


# ---------------------------------------------------------------------------------------------
# Running the console script and checking the outcome.
# ---------------------------------------------------------------------------------------------
@dataclasses.dataclass
class Outcome:
    returncode: int
    stdout: str
    stderr: str


def run_console(argv, timeout=120) -> Outcome:
    """Run the installed ``fieldfix`` console script in a subprocess (warnings shown)."""
    assert SCRIPT, "the fieldfix console script is not installed"
    env = dict(os.environ, PYTHONWARNINGS="default")
    result = subprocess.run([SCRIPT, *map(str, argv)], capture_output=True, text=True, timeout=timeout, env=env)
    return Outcome(result.returncode, result.stdout, result.stderr)


def run_cli(argv) -> Outcome:
    """Run ``fieldfix argv`` in this process: exit status and captured streams, every warning shown."""
    from fieldfix_cli.main import main

    out, err = io.StringIO(), io.StringIO()
    with warnings.catch_warnings(), contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        warnings.simplefilter("always")
        try:
            code = main([str(a) for a in argv])
        except SystemExit as stop:  # argparse's usage errors
            code = stop.code if isinstance(stop.code, int) else 2
    return Outcome(code, out.getvalue(), err.getvalue())


def snapshot(paths) -> dict:
    return {Path(p): Path(p).read_bytes() for p in paths if Path(p).is_file()}


def assert_refused(outcome: Outcome, pattern: str, names, out_dir: Path, before: dict) -> None:
    """Exit 2, one stderr line matching `pattern` and naming `names`, nothing written, inputs intact."""
    lines = [line for line in outcome.stderr.splitlines() if line.strip()]
    assert outcome.returncode == 2, f"exit {outcome.returncode}; stderr:\n{outcome.stderr}"
    assert len(lines) == 1, f"expected one line on stderr, got:\n{outcome.stderr}"
    assert re.search(pattern, lines[0], flags=re.IGNORECASE), f"{pattern!r} not in: {lines[0]}"
    for name in ([names] if isinstance(names, (str, Path)) else names or []):
        assert str(name) in lines[0], f"{name} not named in: {lines[0]}"
    assert "Traceback" not in outcome.stderr
    assert not out_dir.exists() or sorted(p.name for p in out_dir.iterdir()) == [], \
        f"output written: {sorted(p.name for p in out_dir.iterdir())}"
    for path, content in before.items():
        assert path.is_file() and path.read_bytes() == content, f"input changed: {path}"


# ---------------------------------------------------------------------------------------------
# The refusal matrix. Each builder gets an empty folder and returns (argv, pattern, names, inputs).
# ---------------------------------------------------------------------------------------------
@dataclasses.dataclass
class Case:
    argv: list
    pattern: str
    names: object
    inputs: list


def _unwarp(run, b0, out, *extra, report=False) -> list:
    """An unwarp command line; the quality report is skipped unless asked for (it costs a second)."""
    return ["unwarp", run, "--b0", b0, "--out", out, *extra, *([] if report else ["--no-report"])]


def _fieldmap(pd, mag, out, *extra) -> list:
    return ["fieldmap", "--phase-diff", pd, "--magnitude", mag, "--out", out, *extra]


def _files_case(pattern, names, make_paths: Callable, argv_of: Callable, before: Callable | None):
    """A case on input files: `make_paths(folder)` -> {key: path}, `before` mutates them,
    `argv_of(paths, out)` the command line; `names` are keys (or literal text) to be named."""
    def build(folder: Path) -> Case:
        paths = make_paths(folder)
        if before is not None:
            before(folder, paths)
        named = [paths.get(n, n) for n in ([names] if isinstance(names, str) else names)]
        return Case(argv_of(paths, folder / "out"), pattern, named, [*paths.values(), *folder.glob("*.json")])
    return build


def unwarp_case(pattern, names="run", run_kw=None, b0_kw=None, extra=(), before: Callable | None = None):
    return _files_case(pattern, names,
                       lambda f: {"run": make_run(f, **(run_kw or {})), "b0": make_b0(f, **(b0_kw or {}))},
                       lambda paths, out: _unwarp(paths["run"], paths["b0"], out, *extra), before)


def fieldmap_case(pattern, names="pd", pd_kw=None, mag_kw=None, extra=(), before: Callable | None = None):
    return _files_case(pattern, names,
                       lambda f: {"pd": make_phasediff(f, **(pd_kw or {})), "mag": make_magnitude(f, **(mag_kw or {}))},
                       lambda paths, out: _fieldmap(paths["pd"], paths["mag"], out, *extra), before)


def report_case(pattern, names, make_folder: Callable):
    def build(folder: Path) -> Case:
        target = folder / "results"
        inputs = make_folder(target) or []
        named = [target / n if n else target for n in names]
        return Case(["report", target, "--out", folder / "out"], pattern, named, inputs)
    return build


def _truncated_b0_folder(target: Path):
    """A field-map job's folder (the report reads its summary) whose B0 map was damaged since."""
    from fieldfix.workflows.fieldmap import run_fieldmap

    b0 = make_b0(target.parent / "inputs")
    run_fieldmap(target, b0=b0, b0_units="hz", mask=b0, smooth_mm=0.0)
    path = target / "b0_hz.nii.gz"
    path.write_bytes(_truncate(path.read_bytes()))
    return [path]


def dropout_case(pattern, names="b0", b0_kw=None, extra=(), before: Callable | None = None,
                 te="30ms", thickness="3mm"):
    def argv_of(paths, out):
        return ["dropout", "--b0", paths["b0"], "--te", te, "--thickness", thickness, "--out", out,
                *[str(paths.get(a, a)) if isinstance(a, str) else a for a in extra]]
    return _files_case(pattern, names, lambda f: {"b0": make_b0(f, **(b0_kw or {}))}, argv_of, before)


def plan_case(pattern, names="roi", b0_kw=None, roi=None, roi_affine=None, extra=(), te="25ms,30ms",
              thickness="2mm,3mm"):
    def build(folder: Path) -> Case:
        paths = {"b0": make_b0(folder, **(b0_kw or {})),
                 "roi": write_image(folder / "roi.nii.gz", (head() > 0) & (field_hz() > 20) if roi is None else roi,
                                    roi_affine, dtype=np.uint8)}
        named = [paths.get(n, n) for n in ([names] if isinstance(names, str) else names)]
        argv = ["plan", "--b0", paths["b0"], "--roi", paths["roi"], "--te", te, "--thickness", thickness,
                "--out", folder / "out", *extra]
        return Case(argv, pattern, named, list(paths.values()))
    return build


def model_case(pattern, names="labels", table="0=0.36,4=-9.04,5=0.36", brain="4", extra=()):
    """dropout without --b0, its field modelled from a label image (0 air, 4 brain, 5 a sinus)."""
    def make(folder):
        labels = np.where(head() > 0, 4, 0)
        labels[6:9, 10:13, 3:5] = 5
        return {"labels": write_image(folder / "labels.nii.gz", labels)}

    def argv_of(paths, out):
        return ["dropout", "--model-labels", paths["labels"], "--model-table", table, "--model-brain", brain,
                "--te", "30ms", "--thickness", "3mm", "--out", out, *extra]
    return _files_case(pattern, names, make, argv_of, None)


def _add_like(data=None, affine=None, sidecar=None):
    def mutate(folder, paths):
        paths["like"] = make_run(folder, name="like_bold.nii.gz", data=data, affine=affine, sidecar=sidecar)
    return mutate


def simple_case(argv_of, pattern, names_of, make=None):
    """A command given only paths inside the case folder (demo, batch)."""
    def build(folder: Path) -> Case:
        inputs = make(folder) if make else []
        return Case(argv_of(folder), pattern, names_of(folder), inputs or [])
    return build


def _replace(key, content: bytes | None = None, *, directory=False, remove=False):
    def mutate(folder, paths):
        path = paths[key]
        if remove:
            path.unlink()
        elif directory:
            path.unlink()
            path.mkdir()
        else:
            path.write_bytes(content(path.read_bytes()) if callable(content) else content)
    return mutate


def _truncate(raw: bytes) -> bytes:
    return raw[: len(raw) // 2]


def _sidecar(key, update: dict, name="sub-01_task-rest_bold.json"):
    def mutate(folder, paths):
        side = folder / name
        record = json.loads(side.read_text()) if side.exists() else {}
        record.update(update)
        record = {k: v for k, v in record.items() if v is not None}
        side.write_text(json.dumps(record))
    return mutate


def _add_mask(values):
    def mutate(folder, paths):
        paths["mask"] = write_image(folder / "mask.nii.gz", values)
    return mutate


def _xfail(reason):
    return pytest.mark.xfail(strict=True, reason=reason)


NO_SIDECAR_TIMING = {"PhaseEncodingDirection": "j-"}

REFUSALS = [
    # ---- world-space overlap --------------------------------------------------------------
    pytest.param(unwarp_case(r"does not overlap", b0_kw={"affine": grid_affine(offset_mm=(1000, 0, 0))}),
                 id="unwarp-no-overlap"),
    # ---- NaN / inf / empty ------------------------------------------------------------------
    pytest.param(unwarp_case(r"NaN or infinite", names="b0", b0_kw={"values": with_nan(field_hz())}),
                 id="unwarp-b0-nan"),
    pytest.param(unwarp_case(r"NaN or infinite", names="b0", b0_kw={"values": with_nan(field_hz(), np.inf)}),
                 id="unwarp-b0-inf"),
    pytest.param(unwarp_case(r"NaN|infinite|not finite", run_kw={"data": with_nan(run_data())}),
                 id="unwarp-run-nan"),
    pytest.param(fieldmap_case(r"NaN or infinite", pd_kw={"values": with_nan(phasediff_rad())}),
                 id="fieldmap-phase-nan"),
    pytest.param(fieldmap_case(r"NaN or infinite", names="mag", mag_kw={"values": with_nan(head(), -np.inf)}),
                 id="fieldmap-magnitude-inf"),
    pytest.param(fieldmap_case(r"mask is empty|no voxel|constant", names="mag", mag_kw={"values": np.zeros(SHAPE)}),
                 id="fieldmap-all-zero-magnitude"),
    pytest.param(fieldmap_case(r"mask is empty", names="mask.nii.gz", before=_add_mask(np.zeros(SHAPE)),
                               extra=("--mask", "{mask}")), id="fieldmap-empty-mask"),
    # ---- phase range, echo times -------------------------------------------------------------
    pytest.param(fieldmap_case(r"cannot tell the phase units", pd_kw={"values": 50.0 + 8.0 * phasediff_rad()}),
                 id="fieldmap-phase-unrecognised-range"),
    pytest.param(fieldmap_case(r"echo times must differ", names="sub-01_phasediff",
                               pd_kw={"sidecar": {"EchoTime1": TE1_S, "EchoTime2": TE1_S}}),
                 id="fieldmap-echo-times-equal-sidecar"),
    pytest.param(fieldmap_case(r"echo times must differ", names=[], pd_kw={"sidecar": {}},
                               extra=("--echo-times", "5ms", "5ms")),
                 id="fieldmap-echo-times-equal-cli"),
    pytest.param(fieldmap_case(r"EchoTime1.*positive", names="sub-01_phasediff.json",
                               pd_kw={"sidecar": {"EchoTime1": -TE1_S, "EchoTime2": TE2_S}}),
                 id="fieldmap-echo-time-negative-sidecar"),
    # A leading space keeps argparse from reading the negative value as an option.
    pytest.param(fieldmap_case(r"-7.38ms is not plausible as a field-map echo time", names=[], pd_kw={"sidecar": {}},
                               extra=("--echo-times", "4.92ms", " -7.38ms")),
                 id="fieldmap-echo-time-negative-cli"),
    pytest.param(fieldmap_case(r"over one second|milliseconds", names="sub-01_phasediff.json",
                               pd_kw={"sidecar": {"EchoTime1": 4.92, "EchoTime2": 7.38}}),
                 id="fieldmap-echo-times-ms-in-sidecar"),
    pytest.param(fieldmap_case(r"4920|echo time", names=[], pd_kw={"sidecar": {}},
                               extra=("--echo-times", "4920ms", "7380ms")),
                 id="fieldmap-echo-times-seconds-given-as-ms"),
    pytest.param(fieldmap_case(r"no echo times", pd_kw={"sidecar": {}}), id="fieldmap-echo-times-missing"),
    pytest.param(fieldmap_case(r"no unit", names=[], pd_kw={"sidecar": {}}, extra=("--echo-times", "4.92", "7.38")),
                 id="fieldmap-echo-times-bare-numbers"),
    pytest.param(fieldmap_case(r"contradict.*say which one wins", names="sub-01_phasediff.json",
                               extra=("--echo-times", "4ms", "6ms")),
                 id="fieldmap-echo-times-contradict-sidecar"),
    # ---- readout timing ----------------------------------------------------------------------
    pytest.param(unwarp_case(r"no readout timing", run_kw={"sidecar": NO_SIDECAR_TIMING}),
                 id="unwarp-readout-missing"),
    pytest.param(unwarp_case(r"--readout-time: 500ms is not plausible as a total readout time",
                             run_kw={"sidecar": NO_SIDECAR_TIMING}, extra=("--readout-time", "500ms"), names=[]),
                 id="unwarp-readout-too-long"),
    pytest.param(unwarp_case(r"--readout-time: 0.5ms is not plausible as a total readout time",
                             run_kw={"sidecar": NO_SIDECAR_TIMING}, extra=("--readout-time", "0.5ms"), names=[]),
                 id="unwarp-readout-too-short"),
    pytest.param(unwarp_case(r"outside the plausible range",
                             run_kw={"sidecar": {**RUN_SIDECAR, "TotalReadoutTime": 30.0}}),
                 id="unwarp-readout-ms-in-sidecar"),
    pytest.param(unwarp_case(r"disagree", run_kw={"sidecar": {**RUN_SIDECAR, "EffectiveEchoSpacing": 0.0005}}),
                 id="unwarp-spacing-contradicts-readout"),
    pytest.param(unwarp_case(r"contradicts the sidecar.*say which one wins", extra=("--readout-time", "45ms")),
                 id="unwarp-readout-contradicts-sidecar"),
    pytest.param(unwarp_case(r"no unit", names=[], extra=("--readout-time", "30")), id="unwarp-readout-no-unit"),
    pytest.param(unwarp_case(r"not allowed with", names=["--echo-spacing"],
                             extra=("--readout-time", "30ms", "--echo-spacing", "2ms")),
                 id="unwarp-readout-and-spacing-both-given"),
    # ---- phase-encode codes ---------------------------------------------------------------------
    pytest.param(unwarp_case(r"unknown phase-encode code", names=["'y'"], extra=("--phase-encoding", "y")),
                 id="unwarp-pe-code-unknown-cli"),
    pytest.param(unwarp_case(r"PhaseEncodingDirection.*not a BIDS code", names=["sub-01_task-rest_bold.json"],
                             run_kw={"sidecar": {**RUN_SIDECAR, "PhaseEncodingDirection": "AP"}}),
                 id="unwarp-pe-code-unknown-sidecar"),
    pytest.param(unwarp_case(r"contradicts the sidecar.*say which one wins", extra=("--phase-encoding", "j")),
                 id="unwarp-pe-code-contradicts-sidecar"),
    # ---- dimensions ----------------------------------------------------------------------------
    pytest.param(unwarp_case(r"2D", run_kw={"data": head()[..., 4]}), id="unwarp-run-2d"),
    pytest.param(unwarp_case(r"5D", run_kw={"data": run_data()[..., None].repeat(2, axis=4)}), id="unwarp-run-5d"),
    pytest.param(unwarp_case(r"4D", names="b0", b0_kw={"values": np.stack([field_hz()] * 2, axis=-1)}),
                 id="unwarp-b0-4d"),
    pytest.param(fieldmap_case(r"2D", pd_kw={"values": phasediff_rad()[..., 3]}),
                 id="fieldmap-phase-2d"),
    pytest.param(fieldmap_case(r"differs from .*share one grid", names="mag",
                               mag_kw={"affine": grid_affine(offset_mm=(5, 0, 0))}), id="fieldmap-grids-differ"),
    # ---- broken files and paths ----------------------------------------------------------------
    pytest.param(unwarp_case(r"truncated or corrupt", before=_replace("run", _truncate)), id="unwarp-run-truncated"),
    pytest.param(unwarp_case(r"truncated or corrupt|not a readable", names="b0", before=_replace("b0", _truncate)),
                 id="unwarp-b0-truncated"),
    pytest.param(unwarp_case(r"not a readable NIfTI", before=_replace("run", b"subject,age\n1,23\n" * 30)),
                 id="unwarp-run-not-nifti"),
    pytest.param(unwarp_case(r"not a readable NIfTI", names="b0", before=_replace("b0", b"\x1f\x8b\x08\x00junk")),
                 id="unwarp-b0-corrupt-gzip"),
    pytest.param(fieldmap_case(r"not a readable NIfTI", names="mag", before=_replace("mag", b"")),
                 id="fieldmap-magnitude-empty-file"),
    pytest.param(unwarp_case(r"file not found", before=_replace("run", remove=True)), id="unwarp-run-missing"),
    pytest.param(unwarp_case(r"not a file", names="b0", before=_replace("b0", directory=True)),
                 id="unwarp-b0-is-a-directory"),
    pytest.param(fieldmap_case(r"file not found", before=_replace("pd", remove=True)), id="fieldmap-phase-missing"),
    pytest.param(unwarp_case(r"not valid JSON", names=["sub-01_task-rest_bold.json"],
                             before=lambda folder, paths: (folder / "sub-01_task-rest_bold.json").write_text("{oops")),
                 id="unwarp-sidecar-not-json"),
    pytest.param(report_case(r"not found", [""], lambda target: None), id="report-folder-missing"),
    pytest.param(report_case(r"truncated or corrupt", ["b0_hz.nii.gz"], _truncated_b0_folder),
                 id="report-truncated-b0"),
    # ---- dropout and plan ----------------------------------------------------------------------
    # NaN outside the brain mask is background by design (dropout.py); inside the mask it is refused.
    pytest.param(dropout_case(r"non-finite values inside the mask", b0_kw={"values": with_nan(field_hz())},
                              before=_add_mask(head() > 0), extra=("--mask", "mask")), id="dropout-b0-nan-in-mask"),
    pytest.param(dropout_case(r"2D", b0_kw={"values": field_hz()[..., 3]}), id="dropout-b0-2d"),
    pytest.param(dropout_case(r"not a readable NIfTI", before=_replace("b0", b"GIF89a" + bytes(400))),
                 id="dropout-b0-not-nifti"),
    pytest.param(dropout_case(r"no unit", names=[], te="30"), id="dropout-te-no-unit"),
    pytest.param(dropout_case(r"echo time|TE|positive", names=[], te=" -30ms"), id="dropout-te-negative"),
    pytest.param(dropout_case(r"echo time|TE|implausible|plausible", names=[], te="30000ms"),
                 id="dropout-te-seconds-given-as-ms"),
    pytest.param(dropout_case(r"thickness|positive", names=[], thickness="0mm"), id="dropout-thickness-zero"),
    pytest.param(dropout_case(r"does not overlap|overlap", names="like",
                              before=_add_like(affine=grid_affine(offset_mm=(0, 0, 1000))),
                              extra=("--like", "like", "--echo-spacing", "0.5ms")),
                 id="dropout-like-no-overlap"),
    pytest.param(dropout_case(r"unknown phase-encode code", names=["'x'"], extra=("--phase-encoding", "x",
                                                                               "--echo-spacing", "0.5ms")),
                 id="dropout-pe-code-unknown"),
    pytest.param(dropout_case(r"empty", names="mask", before=_add_mask(np.zeros(SHAPE)), extra=("--mask", "mask")),
                 id="dropout-mask-empty"),
    # the modelled field (no --b0): its options refused beside a B0 map, a label image checked
    pytest.param(dropout_case(r"for a modelled field, used only without --b0", names=["--pitch"],
                              extra=("--pitch", "10deg")), id="dropout-model-option-with-b0"),
    pytest.param(dropout_case(r"used only without --b0", names=["--model-labels, --model-table, --model-brain"],
                              extra=("--model-labels", "b0", "--model-table", "0=0.36", "--model-brain", "4")),
                 id="dropout-model-labels-with-b0"),
    pytest.param(model_case(r"labels \[5\] of the label image have no susceptibility",
                            names=["labels", "--model-table"], table="0=0.36,4=-9.04"),
                 id="dropout-model-table-lacks-a-label"),
    pytest.param(model_case(r"\[9\] not present in the label image", names=["labels", "--model-brain"], brain="9"),
                 id="dropout-model-brain-not-in-image"),
    pytest.param(model_case(r"cannot read .* label=ppm pairs", names=["--model-table"], table="0:0.36"),
                 id="dropout-model-table-unreadable"),
    pytest.param(simple_case(lambda f: ["dropout", "--model-table", "0=0.36", "--te", "30ms", "--thickness", "3mm",
                                        "--out", f / "out"], r"--model-labels, which is missing",
                             lambda f: ["--model-table"]), id="dropout-model-table-without-labels"),
    pytest.param(plan_case(r"for a modelled field, used only without --b0", names=["--pitch"],
                           extra=("--pitch", "10deg")), id="plan-model-option-with-b0"),
    pytest.param(plan_case(r"empty", roi=np.zeros(SHAPE)), id="plan-roi-empty"),
    pytest.param(plan_case(r"NaN|infinite|finite", names="b0", b0_kw={"values": with_nan(field_hz())}),
                 id="plan-b0-nan"),
    pytest.param(plan_case(r"does not overlap", roi=np.ones(SHAPE),
                           roi_affine=grid_affine(offset_mm=(1000, 0, 0))), id="plan-roi-no-overlap"),
    pytest.param(plan_case(r"no unit", names=[], te="25,30"), id="plan-te-no-unit"),
    pytest.param(simple_case(lambda f: ["demo", "--scenario", "no-such-scenario", "--out", f / "out"],
                             r"no scenario named 'no-such-scenario'", lambda f: []), id="demo-unknown-scenario"),
    pytest.param(simple_case(lambda f: ["batch", f / "dataset", "--out", f / "out"], r"not a BIDS dataset",
                             lambda f: [f / "dataset"], make=lambda f: (f / "dataset").mkdir()),
                 id="batch-not-bids"),
    pytest.param(simple_case(lambda f: ["batch", f / "missing", "--out", f / "out"], r"not a folder",
                             lambda f: [f / "missing"]), id="batch-root-missing"),
    # ---- implausible shifts --------------------------------------------------------------------
    pytest.param(unwarp_case(r"exceed half the field of view.*unit or timing mistake", b0_kw={"values": field_hz(peak_hz=300.0)}),
                 id="unwarp-shift-over-half-fov"),
]


def _build(builder, folder: Path) -> Case:
    case = builder(folder)
    extra_paths = {p.name: p for p in folder.iterdir()}
    case.argv = [str(a).format(mask=extra_paths.get("mask.nii.gz", "")) for a in case.argv]
    return case


#: Cases also run through the installed console script (one per command and kind of defect).
CONSOLE_CASES = ("unwarp-b0-nan", "fieldmap-echo-times-missing", "unwarp-run-truncated", "dropout-te-no-unit",
                 "plan-roi-empty", "batch-not-bids", "unwarp-pe-code-unknown-cli")


@pytest.mark.parametrize("case_param", REFUSALS)
def test_refused_with_one_line_exit_2_and_nothing_written(tmp_path, case_param):
    case = _build(case_param, tmp_path)
    before = snapshot(case.inputs)
    assert_refused(run_cli(case.argv), case.pattern, case.names, tmp_path / "out", before)


@pytest.mark.parametrize("case_param", [p for p in REFUSALS if p.id in CONSOLE_CASES])
def test_refused_by_the_console_script(tmp_path, case_param):
    case = _build(case_param, tmp_path)
    before = snapshot(case.inputs)
    assert_refused(run_console(case.argv), case.pattern, case.names, tmp_path / "out", before)


# ---------------------------------------------------------------------------------------------
# Cases that must not be refused, or only in part.
# ---------------------------------------------------------------------------------------------
def test_baseline_unwarp_and_fieldmap_succeed(tmp_path):
    """The unmutated dataset works, so every refusal above is caused by its one defect."""
    run, b0 = make_run(tmp_path), make_b0(tmp_path)
    outcome = run_cli(_unwarp(run, b0, tmp_path / "out", "--json"))
    assert outcome.returncode == 0, outcome.stderr
    assert (tmp_path / "out" / "sub-01_task-rest_bold_corrected.nii.gz").is_file()
    pd, mag = make_phasediff(tmp_path), make_magnitude(tmp_path)
    outcome = run_cli(_fieldmap(pd, mag, tmp_path / "fm", "--json"))
    assert outcome.returncode == 0, outcome.stderr
    b0_made = nib.load(tmp_path / "fm" / "b0_hz.nii.gz").get_fdata()
    inside = head() > 0
    # The map reproduces the field the phase difference was made from (mask interior).
    assert np.median(np.abs(b0_made - field_hz())[inside]) < 1.0


def test_partial_overlap_warns_and_flags(tmp_path):
    # The B0 map covers only half of the run along x: the run is corrected (exit 0), with a
    # warning on stderr and a flag in the summary.
    run = make_run(tmp_path)
    b0 = make_b0(tmp_path, affine=grid_affine(offset_mm=(8 * VOXEL_MM, 0, 0)))
    outcome = run_cli(_unwarp(run, b0, tmp_path / "out", "--json"))
    assert outcome.returncode == 0, outcome.stderr
    summary = json.loads((tmp_path / "out" / "sub-01_task-rest_bold_unwarp.json").read_text())
    assert summary["coverage_percent"] == pytest.approx(50.0, abs=7)
    assert re.search(r"warn.*(cover|overlap)", outcome.stderr, re.IGNORECASE | re.DOTALL), outcome.stderr
    assert _flagged(summary) or _flagged(json.loads(outcome.stdout)), summary.keys()


def _flagged(record) -> bool:
    """True when some key naming a warning/flag/partial coverage holds a truthy value about coverage."""
    if isinstance(record, list):
        return any(_flagged(item) for item in record)
    if not isinstance(record, dict):
        return False
    for key, value in record.items():
        if re.search(r"warn|flag|partial", key, re.IGNORECASE) and value:
            if re.search(r"cover|overlap|partial", key + json.dumps(value), re.IGNORECASE):
                return True
        if isinstance(value, (dict, list)) and _flagged(value):
            return True
    return False


def test_contradiction_resolved_when_the_user_says_which_wins(tmp_path):
    run, b0 = make_run(tmp_path), make_b0(tmp_path)
    for wins, expected_ms in (("arguments", 45.0), ("sidecar", READOUT_S * 1e3)):
        out = tmp_path / f"out-{wins}"
        outcome = run_cli(_unwarp(run, b0, out, "--readout-time", "45ms", "--timing-wins", wins, "--json"))
        assert outcome.returncode == 0, outcome.stderr
        summary = json.loads((out / "sub-01_task-rest_bold_unwarp.json").read_text())
        assert summary["timing"]["readout_time_s"] * 1e3 == pytest.approx(expected_ms)
    out = tmp_path / "out-pe"
    outcome = run_cli(_unwarp(run, b0, out, "--phase-encoding", "j", "--timing-wins", "arguments", "--json"))
    assert outcome.returncode == 0, outcome.stderr
    assert json.loads((out / "sub-01_task-rest_bold_unwarp.json").read_text())["pe_code"] == "j"
    pd, mag = make_phasediff(tmp_path), make_magnitude(tmp_path)
    outcome = run_cli(_fieldmap(pd, mag, tmp_path / "fm", "--echo-times", "4ms", "6ms", "--echo-times-win", "sidecar",
                                "--json"))
    assert outcome.returncode == 0, outcome.stderr
    summary = json.loads((tmp_path / "fm" / "b0_summary.json").read_text())
    assert summary["echo_times_s"] == pytest.approx([TE1_S, TE2_S])


def test_integer_images_with_scaling_give_the_same_result(tmp_path):
    """int16 run and B0 map with scl_slope/scl_inter are read with their scaling applied."""
    floats, ints = tmp_path / "float", tmp_path / "int"
    make_run(floats), make_b0(floats)
    # run stored as round((value - 10) / 0.5); B0 map as round((hz + 100) / 0.01)
    make_run(ints, data=np.round((run_data() - 10.0) / 0.5), dtype=np.int16, slope_inter=(0.5, 10.0))
    make_b0(ints, values=np.round((field_hz() + 100.0) / 0.01), dtype=np.int16, slope_inter=(0.01, -100.0))
    results = {}
    for folder in (floats, ints):
        run = folder / "sub-01_task-rest_bold.nii.gz"
        outcome = run_cli(_unwarp(run, folder / "b0_hz.nii.gz", folder / "out", "--json"))
        assert outcome.returncode == 0, outcome.stderr
        results[folder.name] = (
            nib.load(folder / "out" / "sub-01_task-rest_bold_corrected.nii.gz").get_fdata(),
            nib.load(folder / "out" / "sub-01_task-rest_bold_shift_vox.nii.gz").get_fdata(),
        )
    (corrected_f, shift_f), (corrected_i, shift_i) = results["float"], results["int"]
    assert np.abs(shift_f).max() > 0.3  # a real correction happened
    assert np.allclose(shift_i, shift_f, atol=0.01 * 0.002 * 16)  # quantisation of 0.01 Hz
    assert np.allclose(corrected_i, corrected_f, atol=0.5, rtol=1e-3)  # quantisation of 0.5 in the run
    # The scaled integer phase difference gives the same B0 map as the float one.
    pd_float = make_phasediff(floats)
    mag = make_magnitude(floats)
    step = np.pi / 4096
    pd_int = make_phasediff(ints, values=np.round(phasediff_rad() / step),
                            dtype=np.int16, slope_inter=(step, 0.0))
    maps = []
    for folder, pd in ((floats, pd_float), (ints, pd_int)):
        outcome = run_cli(_fieldmap(pd, mag, folder / "fm", "--json"))
        assert outcome.returncode == 0, outcome.stderr
        maps.append(nib.load(folder / "fm" / "b0_hz.nii.gz").get_fdata())
    assert np.allclose(maps[0], maps[1], atol=0.1)


def test_output_folder_holding_an_input_of_the_same_name(tmp_path):
    """An input whose name is one of our output names is never replaced, not even with --overwrite."""
    run = make_run(tmp_path)
    # The B0 map is named like the run's shift output, in the output folder itself.
    b0 = make_b0(tmp_path, name="sub-01_task-rest_bold_shift_vox.nii.gz")
    before = snapshot([run, b0, tmp_path / "sub-01_task-rest_bold.json"])
    listing = sorted(p.name for p in tmp_path.iterdir())
    for extra in ((), ("--overwrite",)):
        outcome = run_cli(_unwarp(run, b0, tmp_path, *extra))
        lines = outcome.stderr.strip().splitlines()
        assert outcome.returncode == 2 and len(lines) == 1, outcome.stderr
        assert "inputs are never overwritten" in lines[0] and str(b0) in lines[0]
        assert sorted(p.name for p in tmp_path.iterdir()) == listing
        for path, content in before.items():
            assert path.read_bytes() == content


def test_overwrite_replaces_only_our_outputs(tmp_path):
    run, b0 = make_run(tmp_path), make_b0(tmp_path)
    out = tmp_path / "out"
    out.mkdir()
    (out / "notes.txt").write_text("the user's own file")
    assert run_cli(_unwarp(run, b0, out, report=True)).returncode == 0
    first = snapshot(out.iterdir())
    assert out / "report.html" in first
    # A second run without --overwrite is refused and changes nothing.
    outcome = run_cli(_unwarp(run, b0, out, report=True))
    assert outcome.returncode == 2 and "output exists" in outcome.stderr and "--overwrite" in outcome.stderr
    assert snapshot(out.iterdir()) == first
    # With --overwrite and another timing the outputs are replaced; the user's file is kept.
    outcome = run_cli(_unwarp(run, b0, out, "--overwrite", "--readout-time", "20ms", "--timing-wins", "arguments",
                              report=True))
    assert outcome.returncode == 0, outcome.stderr
    after = snapshot(out.iterdir())
    assert set(after) == set(first)
    assert after[out / "notes.txt"] == b"the user's own file"
    assert after[out / "sub-01_task-rest_bold_shift_vox.nii.gz"] != first[out / "sub-01_task-rest_bold_shift_vox.nii.gz"]
    # no temporary files left (only fieldfix's state folder: the signed record of what it wrote)
    assert [p.name for p in out.iterdir() if p.name.startswith(".")] == [".fieldfix"]


def test_large_shift_is_corrected_when_forced(tmp_path):
    run, b0 = make_run(tmp_path), make_b0(tmp_path, values=field_hz(peak_hz=300.0))
    outcome = run_cli(_unwarp(run, b0, tmp_path / "out", "--force", "--json"))
    assert outcome.returncode == 0, outcome.stderr
    summary = json.loads((tmp_path / "out" / "sub-01_task-rest_bold_unwarp.json").read_text())
    assert summary["max_abs_shift_vox"] > 0.25 * SHAPE[1]


def test_bad_second_run_writes_nothing(tmp_path):
    good = make_run(tmp_path)
    far = make_run(tmp_path, name="sub-01_task-far_bold.nii.gz",
                   data=run_data(), affine=grid_affine(offset_mm=(1000, 0, 0)))
    b0 = make_b0(tmp_path)
    before = snapshot([good, far, b0])
    outcome = run_cli(["unwarp", good, far, "--b0", b0, "--out", tmp_path / "out", "--no-report"])
    assert_refused(outcome, r"does not overlap", far, tmp_path / "out", before)


@pytest.mark.skipif(os.geteuid() == 0, reason="running as root: file permissions do not block reads")
def test_unreadable_file(tmp_path):
    run, b0 = make_run(tmp_path), make_b0(tmp_path)
    b0.chmod(0)
    try:
        outcome = run_cli(_unwarp(run, b0, tmp_path / "out"))
        assert_refused(outcome, r"not readable|permission", b0, tmp_path / "out", {})
    finally:
        b0.chmod(0o644)
