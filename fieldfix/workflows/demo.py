"""The whole job on an invented sample scenario, start to finish, in about a minute.

:func:`run_demo` builds the scenario's dataset when it is absent (see :mod:`fieldfix.scenarios`),
then runs the field-map, unwarping, dropout and planning workflows on its first subject and builds
the report, all outputs in one folder.  Because the scenario is simulated, its ground truth is
known, and the summary says how close the results came to it: the B0 map against the modelled field,
and the unwarped run against an undistorted simulation of the same head.

Steps whose workflow is not part of this installation are listed as skipped, not faked.

Research software, not a medical device; the scenarios and their data are invented.

Example
-------
>>> from fieldfix.workflows.demo import run_demo               # doctest: +SKIP
>>> summary = run_demo("demo_output")                          # doctest: +SKIP
>>> summary["report"]                                          # doctest: +SKIP
'demo_output/report.html'
"""

from __future__ import annotations

import importlib
import os
import time
from pathlib import Path

import numpy as np

from .. import scenarios
from .._progress import progress_bar
from ..errors import InputError, OutputError
from ..geometry import resample_to_grid
from ..io import load_image, write_json

__all__ = ["DEFAULT_SCENARIO", "run_demo", "dataset_location"]

DEFAULT_SCENARIO = "orbitofrontal-3t"
CAUTION = ("Research software, not a medical device: inspect corrected images before they are used for any "
           "decision about a person. The demo's study and data are invented.")


def dataset_location(scenario: str, out_dir) -> Path:
    """Where the demo keeps a scenario's generated dataset.

    A sample scenario of a source checkout is built once into ``sample_scenarios/<name>/generated/``
    (ignored by git) and reused; otherwise, or when that folder cannot be written, into
    ``<out_dir>/dataset``.
    """
    definition = scenarios.scenario_path(scenario)
    folder = definition.parent
    in_checkout = (scenarios.SAMPLE_SCENARIOS_DIR.parent / "fieldfix" / "__init__.py").is_file()
    if in_checkout and folder.parent.resolve() == scenarios.SAMPLE_SCENARIOS_DIR.resolve() \
            and os.access(folder, os.W_OK):
        return folder / "generated"
    return Path(out_dir) / "dataset"


def _ensure_dataset(scenario: str, root: Path, seed: int = 0) -> tuple[dict, bool]:
    """Reuse a generated dataset whose manifest matches the definition; build it otherwise."""
    definition = scenarios.load_definition(scenario)
    want = scenarios._definition_hash(definition)
    try:
        manifest = scenarios.load_manifest(root)
        if (manifest.get("definition_sha256") == want and manifest.get("seed") == seed
                and manifest.get("generator_version") == scenarios.GENERATOR_VERSION
                and all((root / e["runs"][0]["bold"]).is_file() for e in manifest["entries"])):
            return manifest, False
    except (InputError, KeyError, IndexError, TypeError):
        pass
    if root.is_dir() and any(root.iterdir()):
        # Only a folder that holds an earlier generation (it has a manifest) is rebuilt in place.
        if not (root / scenarios.TRUTH_DIR / "manifest.json").is_file():
            raise OutputError("the dataset folder holds files that are not a generated scenario", root)
    scenarios.generate_scenario(definition, root, seed=seed, overwrite=True)
    return scenarios.load_manifest(root), True


def _workflow(name: str, func: str):
    try:
        module = importlib.import_module(f"fieldfix.workflows.{name}")
    except ModuleNotFoundError as err:
        if err.name == f"fieldfix.workflows.{name}":
            return None
        raise
    return getattr(module, func, None)


def _load_on(path: Path, ref_path: Path, order: int = 1) -> np.ndarray:
    img = load_image(path)
    ref = load_image(ref_path)
    data = img.get_fdata(np.float64)
    if data.ndim == 4:
        data = data[..., 0]
    values, _ = resample_to_grid(data, img.affine, ref.shape[:3], ref.affine, order=order)
    return values


def run_demo(out_dir, *, scenario: str = DEFAULT_SCENARIO, overwrite: bool = False, progress: bool = False,
             command: str | None = None, dataset_dir=None) -> dict:
    """Build a sample scenario (if needed) and run the whole job on it.

    Parameters
    ----------
    out_dir : str or PathLike
        Folder for every output and the report (created if missing).
    scenario : str
        Name of a sample scenario (``sample_scenarios/<name>``), or a scenario folder or file.
    overwrite : bool
        Replace outputs of an earlier demo in ``out_dir``.
    progress : bool
        Show progress bars.
    command : str, optional
        Recorded in the provenance sidecars.
    dataset_dir : str or PathLike, optional
        Where to build/reuse the scenario's dataset (default: :func:`dataset_location`).

    Returns
    -------
    dict
        JSON-serialisable summary: scenario, dataset, each step (status, seconds, outputs), the
        numbers checked against the ground truth, the report path.  Also written as
        ``<out_dir>/demo_summary.json``.
    """
    t_start = time.perf_counter()
    out = Path(out_dir)
    summary_path = out / "demo_summary.json"
    if summary_path.exists() and not overwrite:
        raise OutputError("an earlier demo is in this folder; pass overwrite (--overwrite) to replace it",
                          summary_path)
    root = Path(dataset_dir) if dataset_dir is not None else dataset_location(scenario, out)
    bar = progress_bar(total=6, desc="demo: dataset", enabled=progress, unit="step")
    t0 = time.perf_counter()
    manifest, built = _ensure_dataset(scenario, root)
    bar.update(1)
    steps: dict[str, dict] = {"dataset": {"status": "built" if built else "reused",
                                          "seconds": round(time.perf_counter() - t0, 2), "path": str(root)}}
    entry = dict(manifest["entries"][0], field_strength_t=manifest["field_strength_t"])
    run = entry["runs"][0]
    numbers: dict[str, object] = {}
    out.mkdir(parents=True, exist_ok=True)
    common = dict(overwrite=overwrite, progress=progress, command=command or "fieldfix demo")

    def step(name, workflow, func, call):
        bar.set_description(f"demo: {name}")
        fn = _workflow(workflow, func)
        if fn is None:
            steps[name] = {"status": "skipped", "reason": f"fieldfix.workflows.{workflow} is not available"}
            bar.update(1)
            return None
        t = time.perf_counter()
        result = call(fn)
        steps[name] = {"status": "done", "seconds": round(time.perf_counter() - t, 2)}
        bar.update(1)
        return result

    # --- field map ---
    files = {k: root / v for k, v in entry["fieldmap"]["files"].items()}
    b0_path = out / "b0_hz.nii.gz"
    b0_mask_path = out / "b0_mask.nii.gz"
    fm = step("field map", "fieldmap", "run_fieldmap", lambda fn: _call_fieldmap(fn, files, entry, out, common))
    if fm is not None:
        steps["field map"]["outputs"] = [str(b0_path)]
        truth = _load_on(root / entry["truth"]["b0_hz"], b0_path)
        est = load_image(b0_path).get_fdata(np.float64)
        brain = _load_on(root / entry["truth"]["brain_mask"], b0_path, order=0) > 0.5
        err = np.abs(est - truth)[brain]
        numbers["b0_brain_p1_p99_hz"] = [round(float(np.percentile(truth[brain], 1)), 1),
                                         round(float(np.percentile(truth[brain], 99)), 1)]
        numbers["b0_error_vs_truth_median_hz"] = round(float(np.median(err)), 2)
        numbers["b0_error_vs_truth_p95_hz"] = round(float(np.percentile(err, 95)), 2)

    # --- unwarping ---
    bold = root / run["bold"]
    uw = None
    if b0_path.is_file():
        uw = step("unwarping", "unwarp", "run_unwarp",
                  lambda fn: fn([bold], b0_path, out, b0_mask_path=b0_mask_path if b0_mask_path.is_file() else None,
                                **common))
    else:
        steps["unwarping"] = {"status": "skipped", "reason": "no B0 map"}
    if uw:
        s = uw[0]
        steps["unwarping"]["outputs"] = [str(v) for k, v in s.get("outputs", {}).items()][:1] or []
        numbers["max_abs_shift_vox"] = round(float(s.get("max_abs_shift_vox", float("nan"))), 2)
        if s.get("percent_shifted_over_1_voxel") is not None:
            numbers["percent_shifted_over_1_voxel"] = round(float(s["percent_shifted_over_1_voxel"]), 1)
        corrected = _corrected_path(out, bold)
        if corrected is not None:
            shift_path = s.get("outputs", {}).get("shift_vox")
            numbers.update(_unwarp_numbers(root, run, bold, corrected, Path(shift_path) if shift_path else None))

    # --- dropout and plan ---
    if b0_path.is_file():
        dr = step("dropout", "dropout", "run_dropout",
                  lambda fn: _call_dropout(fn, b0_path, run, entry, root, out, common))
        if dr is not None:
            steps["dropout"]["outputs"] = [dr.get("outputs", {}).get("retention")]
            numbers.update(_dropout_numbers(dr, out, entry, root))
        pl = step("plan", "plan", "run_plan", lambda fn: _call_plan(fn, b0_path, run, entry, root, out, common))
        if pl is not None:
            steps["plan"]["outputs"] = [pl.get("outputs", {}).get("csv")]
            numbers.update(_plan_numbers(pl))
    else:
        steps["dropout"] = {"status": "skipped", "reason": "no B0 map"}
        steps["plan"] = {"status": "skipped", "reason": "no B0 map"}

    # --- report ---
    bar.set_description("demo: report")
    report_path = None
    try:
        from ..report import build_report
    except ImportError:
        steps["report"] = {"status": "skipped", "reason": "fieldfix.report is not available"}
    else:
        t = time.perf_counter()
        try:
            report_path = build_report(out, title=f"fieldfix demo: {manifest.get('title', scenario)}",
                                       overwrite=overwrite)
            steps["report"] = {"status": "done", "seconds": round(time.perf_counter() - t, 2),
                               "outputs": [str(report_path)]}
        except InputError as err:  # nothing to report on (every step skipped)
            steps["report"] = {"status": "skipped", "reason": str(err)}

    bar.update(1)
    bar.close()
    summary = {
        "scenario": manifest["scenario"],
        "title": manifest.get("title", manifest["scenario"]),
        "field_strength_t": manifest["field_strength_t"],
        "subject": entry["subject"],
        "dataset": str(root),
        "out_dir": str(out),
        "steps": steps,
        "checks_against_truth": numbers,
        "report": str(report_path) if report_path else None,
        "seconds": round(time.perf_counter() - t_start, 1),
        "caution": CAUTION,
    }
    write_json(summary_path, summary, overwrite=overwrite)
    return summary


def _unwarp_numbers(root: Path, run: dict, bold: Path, corrected: Path, shift_path: Path | None = None) -> dict:
    """First volume before and after unwarping, compared with the undistorted simulation.

    * ``edge_agreement_before`` / ``_after``: agreement of image edges with those of the undistorted
      simulation (normalised gradient fields, :func:`fieldfix.report.edge_agreement`) over the head;
      1 means every edge in place.
    * ``edge_agreement_shifted_before`` / ``_after``: the same where the correction moves voxels by
      more than half a voxel, the region where unwarping can make a difference (over the whole
      head a local correction barely moves the number).
    * ``roi_signal_kept``: mean of the corrected image in the scenario's region of interest over
      the mean of the undistorted simulation there; what is missing was lost to through-slice
      dephasing (dropout), which no unwarping can bring back.
    """
    from ..report import edge_agreement

    ref_img = load_image(root / run["undistorted"])
    ref = ref_img.get_fdata(np.float64)
    before = load_image(bold).volume(0).astype(np.float64)
    after = load_image(corrected).volume(0).astype(np.float64)
    head = ref > 0.1 * np.percentile(ref, 99)
    nums = {
        "edge_agreement_before": round(float(edge_agreement(before, ref, ref_img.affine, head)), 3),
        "edge_agreement_after": round(float(edge_agreement(after, ref, ref_img.affine, head)), 3),
    }
    if shift_path is not None and shift_path.is_file():
        shifted = head & (np.abs(load_image(shift_path).get_fdata()) > 0.5)
        if shifted.sum() >= 50:
            for key, image in (("before", before), ("after", after)):
                value = edge_agreement(image, ref, ref_img.affine, shifted)
                nums[f"edge_agreement_shifted_{key}"] = round(float(value), 3)
    if "roi_mask" in run:
        roi = load_image(root / run["roi_mask"]).get_fdata() > 0
        if roi.any() and ref[roi].mean() > 0:
            nums["roi_signal_kept"] = round(float(after[roi].mean() / ref[roi].mean()), 3)
    return nums


def _corrected_path(out: Path, bold: Path) -> Path | None:
    stem = bold.name[: -len(".nii.gz")] if bold.name.endswith(".nii.gz") else bold.stem
    candidate = out / f"{stem}_corrected.nii.gz"
    return candidate if candidate.is_file() else None


def _call_fieldmap(fn, files, entry, out, common):
    field_t = entry.get("field_strength_t")
    mags = [files["magnitude1"], files["magnitude2"]]
    if "phasediff" in files:
        return fn(out, phase_diff=files["phasediff"], magnitude=mags, field_strength_t=field_t, **common)
    return fn(out, phase=[files["phase1"], files["phase2"]], magnitude=mags, field_strength_t=field_t, **common)


def _call_dropout(fn, b0_path, run, entry, root, out, common):
    """Retention for the scenario's own protocol, slice geometry and timing from the run."""
    return fn(b0_path, out, te_s=float(run["echo_time_s"]), thickness_mm=float(run["slice_thickness_mm"]),
              like_path=root / run["bold"], mask_path=root / entry["truth"]["brain_mask"], **common)


# Protocols the demo's plan compares: echo time, slice thickness and slice tilt around the usual
# choices (common practice, no source), both phase-encode polarities.
PLAN_TE_S = (0.025, 0.030, 0.035)
PLAN_THICKNESS_MM = (2.0, 3.0)
PLAN_TILT_DEG = (-20.0, -10.0, 0.0, 10.0, 20.0)


def _call_plan(fn, b0_path, run, entry, root, out, common):
    truth = entry["truth"]
    if "roi_mask" not in truth:
        raise InputError("the scenario names no region of interest, so there is nothing to plan for")
    pe_lines = int(round(run["total_readout_time_s"] / run["effective_echo_spacing_s"])) + 1
    bold = load_image(root / run["bold"])
    inplane = float(np.mean(np.sort(bold.zooms[:3])[:2]))
    return fn(b0_path, out, roi_path=root / truth["roi_mask"], brain_mask_path=root / truth["brain_mask"],
              te_s=PLAN_TE_S, thickness_mm=PLAN_THICKNESS_MM, tilt_deg=PLAN_TILT_DEG, pe_signs=(1, -1),
              echo_spacing_s=float(run["effective_echo_spacing_s"]), pe_lines=pe_lines, inplane_mm=inplane,
              **common)


def _dropout_numbers(result: dict, out: Path, entry: dict, root: Path) -> dict:
    nums = {}
    retention = result.get("retention") or {}
    if retention.get("median") is not None:
        nums["dropout_brain_median_retention"] = round(float(retention["median"]), 3)
        nums["dropout_brain_percent_below_half"] = round(float(retention["pct_below"]), 1)
    path = (result.get("outputs") or {}).get("retention")
    if path and "roi_mask" in entry["truth"]:
        ret = load_image(path).get_fdata(np.float64)
        roi = load_image(root / entry["truth"]["roi_mask"]).get_fdata() > 0
        if roi.shape == ret.shape and roi.any():
            nums["dropout_roi_mean_retention"] = round(float(ret[roi].mean()), 3)
    return nums


def _plan_numbers(result: dict) -> dict:
    rec = result.get("recommended") or {}
    nums = {"plan_protocols_compared": int(result.get("protocols", 0))}
    if rec:
        nums["plan_recommended"] = str(rec.get("protocol"))
        if rec.get("roi_median") is not None:
            nums["plan_recommended_roi_median"] = round(float(rec["roi_median"]), 3)
        nums["plan_reason"] = str(result.get("reason", ""))
    return nums
