"""The whole job on an invented sample scenario, start to finish, in about a minute.

:func:`run_demo` builds the scenario's dataset when it is absent (see :mod:`fieldfix.scenarios`),
then runs the field-map, unwarping, dropout and planning jobs on its first subject and builds
the report, all outputs in one folder. Because the scenario is simulated, its ground truth is
known, and the summary (:class:`fieldfix.outputs.DemoSummary`) says how close the results came
to it: the B0 map against the modelled field, and the unwarped run against an undistorted
simulation of the same head.

Research software, not a medical device; the scenarios and their data are invented.

Example
-------
>>> from fieldfix.workflows.demo import run_demo               # doctest: +SKIP
>>> summary = run_demo("demo_output")                          # doctest: +SKIP
>>> summary.report                                             # doctest: +SKIP
'demo_output/report.html'
"""

from __future__ import annotations

import time
from pathlib import Path

import numpy as np

from .. import scenarios
from .._progress import progress_bar
from ..errors import InputError, OutputError
from ..geometry import parse_pe_code, resample_to_grid
from ..io import load_image
from ..jsonfile import write_json
from ..outdir import output_folder
from ..outputs import DemoChecks, DemoStep, DemoSummary, JobOptions, PlanSummary
from ..scenario_spec import ManifestEntry, ManifestRun, ScenarioManifest
from ..shift import shift_vox_from_field
from ..unwarp import unwarp_volume
from .dropout import run_dropout
from .fieldmap import run_fieldmap
from .plan import run_plan
from .unwarp import run_unwarp

__all__ = ["DEFAULT_SCENARIO", "run_demo", "dataset_location"]

DEFAULT_SCENARIO = "orbitofrontal-3t"

# Protocols the demo's plan compares: echo time, slice thickness and slice tilt around the usual
# choices (common practice, no source), both phase-encode polarities.
PLAN_TE_S = (0.025, 0.030, 0.035)
PLAN_THICKNESS_MM = (2.0, 3.0)
PLAN_TILT_DEG = (-20.0, -10.0, 0.0, 10.0, 20.0)


def dataset_location(scenario: str, out_dir) -> Path:
    """Where the demo builds a scenario's dataset: ``<out_dir>/dataset`` (fieldfix writes only inside
    the output folder; a dataset already there, from the same definition, is reused)."""
    scenarios.scenario_path(scenario)  # refuses an unknown scenario early, naming the sample scenarios
    return Path(out_dir) / "dataset"


def _ensure_dataset(scenario: str, root: Path, seed: int = 0) -> tuple[ScenarioManifest, bool]:
    """Reuse a generated dataset whose manifest matches the definition; build it otherwise."""
    definition = scenarios.load_definition(scenario)
    want = scenarios.definition_hash(definition)
    try:
        manifest = scenarios.load_manifest(root)
        if (manifest.definition_sha256 == want and manifest.seed == seed
                and manifest.generator_version == scenarios.GENERATOR_VERSION
                and all(e.runs and (root / e.runs[0].bold).is_file() for e in manifest.entries)):
            return manifest, False
    except InputError:  # no manifest, or one of an older generator: build it again
        pass
    if root.is_dir() and any(p.name != ".fieldfix" for p in root.iterdir()):
        # Only a folder that holds an earlier generation (it has a manifest) is rebuilt in place.
        if not (root / scenarios.TRUTH_DIR / "manifest.json").is_file():
            raise OutputError("the dataset folder holds files that are not a generated scenario", root)
    with output_folder(root, raw_dataset=True):
        scenarios.generate_scenario(definition, root, seed=seed, overwrite=True)
    return scenarios.load_manifest(root), True


def _load_on(path: Path, ref_path: Path, order: int = 1) -> np.ndarray:
    img = load_image(path)
    ref = load_image(ref_path)
    data = img.get_fdata(np.float64)
    if data.ndim == 4:
        data = data[..., 0]
    values, _ = resample_to_grid(data, img.affine, ref.shape[:3], ref.affine, order=order)
    return values


class _Steps:
    """Runs the demo's steps in turn, timing each and advancing the progress bar."""

    def __init__(self, progress: bool):
        self.done: dict[str, DemoStep] = {}
        self.bar = progress_bar(total=6, desc="demo: dataset", enabled=progress, unit="step")

    def run(self, name: str, call, outputs=lambda result: []):
        self.bar.set_description(f"demo: {name}")
        start = time.perf_counter()
        result = call()
        self.done[name] = DemoStep(status="done", seconds=round(time.perf_counter() - start, 2),
                                   outputs=[str(p) for p in outputs(result)])
        self.bar.update(1)
        return result


def run_demo(out_dir, *, scenario: str = DEFAULT_SCENARIO, overwrite: bool = False, progress: bool = False,
             command: str | None = None, dataset_dir=None) -> DemoSummary:
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
    DemoSummary
        Also written as ``<out_dir>/demo_summary.json``.
    """
    t_start = time.perf_counter()
    out = Path(out_dir)
    summary_path = out / "demo_summary.json"
    if summary_path.exists() and not overwrite:
        raise OutputError("an earlier demo is in this folder; pass overwrite (--overwrite) to replace it",
                          summary_path)
    root = Path(dataset_dir) if dataset_dir is not None else dataset_location(scenario, out)
    steps = _Steps(progress)
    t0 = time.perf_counter()
    manifest, built = _ensure_dataset(scenario, root)
    steps.bar.update(1)
    dataset_step = DemoStep(status="built" if built else "reused", seconds=round(time.perf_counter() - t0, 2),
                            path=str(root))
    entry = manifest.entries[0]
    job = JobOptions(out_dir=out, overwrite=overwrite, progress=progress, command=command or "fieldfix demo")
    with output_folder(out):
        checks, report_path, warnings = _run_steps(steps, job, root, entry, manifest, scenario)
        steps.bar.close()
        summary = DemoSummary(
            scenario=manifest.scenario, title=manifest.title, field_strength_t=manifest.field_strength_t,
            subject=entry.subject, dataset=str(root),
            out_dir=str(out), steps={"dataset": dataset_step, **steps.done}, checks_against_truth=checks,
            report=str(report_path) if report_path else None, seconds=round(time.perf_counter() - t_start, 1),
            warnings=warnings)
        write_json(summary_path, summary.to_json(), overwrite=overwrite)
    return summary


def _run_steps(steps: _Steps, job: JobOptions, root: Path, entry: ManifestEntry, manifest: ScenarioManifest,
               scenario: str):
    run = entry.runs[0]
    bold = root / run.bold
    checks: dict = {}
    fm = steps.run("field map", lambda: _call_fieldmap(job, root, entry, manifest.field_strength_t),
                   lambda s: [job.path(s.outputs.b0_hz)])
    b0_path, mask_path = job.path(fm.outputs.b0_hz), job.path(fm.outputs.mask)
    checks.update(_field_checks(root, entry, b0_path))
    uw = steps.run("unwarping", lambda: run_unwarp([bold], b0_path, job, b0_mask=mask_path),
                   lambda s: [job.path(s[0].outputs.corrected)])[0]
    checks.update(max_abs_shift_vox=round(uw.max_abs_shift_vox, 2),
                  percent_shifted_over_1_voxel=round(uw.percent_shifted_over_1_voxel, 1))
    checks.update(_unwarp_checks(root, run, bold, job.path(uw.outputs.corrected), job.path(uw.outputs.shift_vox)))
    dr = steps.run("dropout", lambda: run_dropout(b0_path, job, te_s=run.te_s,
                                                  thickness_mm=run.slice_thickness_mm, like=bold,
                                                  mask=root / entry.truth.brain_mask),
                   lambda s: [job.path(s.outputs.retention)])
    checks.update(_dropout_checks(dr, job, entry, root))
    if entry.truth.roi_mask is not None:
        pl = steps.run("plan", lambda: _call_plan(job, b0_path, run, entry, root), lambda s: [job.path(s.outputs.csv)])
        checks.update(_plan_checks(pl))
    from ..report import build_report

    report_path = steps.run("report", lambda: build_report(
        job.out_dir, title=f"fieldfix demo: {manifest.title}", overwrite=job.overwrite,
        truth=DemoChecks(**checks)), lambda p: [p])
    return DemoChecks(**checks), report_path, [f"unwarping: {w}" for w in uw.warnings]


def _field_checks(root: Path, entry: ManifestEntry, b0_path: Path) -> dict:
    truth = _load_on(root / entry.truth.b0_hz, b0_path)
    est = load_image(b0_path).get_fdata(np.float64)
    brain = _load_on(root / entry.truth.brain_mask, b0_path, order=0) > 0.5
    err = np.abs(est - truth)[brain]
    return {"b0_brain_p1_p99_hz": [round(float(np.percentile(truth[brain], 1)), 1),
                                   round(float(np.percentile(truth[brain], 99)), 1)],
            "b0_error_vs_truth_median_hz": round(float(np.median(err)), 2),
            "b0_error_vs_truth_p95_hz": round(float(np.percentile(err, 95)), 2)}


def _unwarp_checks(root: Path, run: ManifestRun, bold: Path, corrected: Path, shift_path: Path) -> dict:
    """First volume before and after unwarping, compared with the scenario's truth, in the brain.

    * shift error: the shift map the unwarping used against the shift of the scenario's true
      field on the run grid (voxels), median and 95th percentile in the brain;
    * edge agreement before / after: agreement of image edges with those of the undistorted
      simulation (normalised gradient fields, :func:`fieldfix.report.edge_agreement`) over the
      brain; 1 means every edge in place. Dropout, the EPI's blurring along phase encoding and
      noise keep it well below 1 even after a perfect correction, so it is also given for the run
      unwarped by the true field (the best any field map can do);
    * the same where the correction moves voxels by more than half a voxel, the region where
      unwarping can make a difference (over the whole brain a local correction barely moves it).
      The brain, not the whole head: outside it the field changes within a voxel of a 4 mm field
      map beside the air cavities, which no field map of that resolution follows;
    * ROI signal kept: mean of the corrected image in the scenario's region of interest over the
      mean of the undistorted simulation there; what is missing was lost to through-slice
      dephasing (dropout), which no unwarping can bring back.
    """
    from ..report import edge_agreement

    ref_img = load_image(root / run.undistorted)
    ref = ref_img.get_fdata(np.float64)
    brain = load_image(root / run.brain_mask, sidecar=False).get_fdata() > 0.5
    before = load_image(bold).volume(0).astype(np.float64)
    after = load_image(corrected).volume(0).astype(np.float64)
    shift_vox = load_image(shift_path).get_fdata()
    true_shift = shift_vox_from_field(load_image(root / run.truth_b0_hz, sidecar=False).get_fdata(), run.pe_code,
                                      run.effective_echo_spacing_s)
    true_field = unwarp_volume(before, true_shift, parse_pe_code(run.pe_code)[0], interp="cubic")
    error = np.abs(shift_vox - true_shift)[brain]

    def agreement(image, where):
        return round(float(edge_agreement(image, ref, ref_img.affine, where)), 3)

    checks = {"shift_error_vs_truth_median_vox": round(float(np.median(error)), 3),
              "shift_error_vs_truth_p95_vox": round(float(np.percentile(error, 95)), 3),
              "edge_agreement_before": agreement(before, brain), "edge_agreement_after": agreement(after, brain),
              "edge_agreement_true_field": agreement(true_field, brain)}
    shifted = brain & (np.abs(shift_vox) > 0.5)
    if shifted.sum() >= 50:
        for key, image in (("before", before), ("after", after), ("true_field", true_field)):
            checks[f"edge_agreement_shifted_{key}"] = agreement(image, shifted)
    if run.roi_mask is not None:
        roi = load_image(root / run.roi_mask).get_fdata() > 0
        if roi.any() and ref[roi].mean() > 0:
            checks["roi_signal_kept"] = round(float(after[roi].mean() / ref[roi].mean()), 3)
    return checks


def _call_fieldmap(job: JobOptions, root: Path, entry: ManifestEntry, field_t: float):
    files = {k: root / v for k, v in entry.fieldmap.files.items()}
    mags = [files["magnitude1"], files["magnitude2"]]
    if "phasediff" in files:
        return run_fieldmap(job, phase_diff=files["phasediff"], magnitude=mags, field_strength_t=field_t)
    return run_fieldmap(job, phase=[files["phase1"], files["phase2"]], magnitude=mags, field_strength_t=field_t)


def _call_plan(job: JobOptions, b0_path: Path, run: ManifestRun, entry: ManifestEntry, root: Path) -> PlanSummary:
    truth = entry.truth
    pe_lines = int(round(run.total_readout_time_s / run.effective_echo_spacing_s)) + 1
    bold = load_image(root / run.bold)
    inplane = float(np.mean(np.sort(bold.zooms[:3])[:2]))
    return run_plan(b0_path, job, roi_path=root / truth.roi_mask, brain_mask_path=root / truth.brain_mask,
                    te_s=PLAN_TE_S, thickness_mm=PLAN_THICKNESS_MM, tilt_deg=PLAN_TILT_DEG, pe_signs=(1, -1),
                    echo_spacing_s=run.effective_echo_spacing_s, pe_lines=pe_lines, inplane_mm=inplane)


def _dropout_checks(result, job: JobOptions, entry: ManifestEntry, root: Path) -> dict:
    checks = {}
    if result.retention.median is not None:
        checks["dropout_brain_median_retention"] = round(result.retention.median, 3)
        checks["dropout_brain_percent_below_threshold"] = round(result.retention.percent_below_threshold, 1)
    if entry.truth.roi_mask is not None:
        ret = load_image(job.path(result.outputs.retention)).get_fdata(np.float64)
        roi = load_image(root / entry.truth.roi_mask).get_fdata() > 0
        if roi.shape == ret.shape and roi.any():
            checks["dropout_roi_mean_retention"] = round(float(ret[roi].mean()), 3)
    return checks


def _plan_checks(result: PlanSummary) -> dict:
    return {"plan_protocols_compared": int(result.protocols), "plan_recommended": result.recommended.protocol,
            "plan_recommended_roi_median": round(result.recommended.roi_median, 3), "plan_reason": result.reason}

