"""File-level planning job: B0 map + ROI -> ranked protocol table, recommendation and figure.

Outputs (:class:`fieldfix.outputs.PlanFiles`, ``<t>`` = the job's tag): ``<t>plan.csv``
(ranked table, one row per protocol), ``<t>plan.json`` (:class:`fieldfix.outputs.PlanSummary`:
parameters, recommendation with its reason, all rows) and ``<t>plan.png`` (trade-off figure). The masks are brought onto the B0 grid (nearest
neighbour through the affines) when they are on another grid.

Research software, not a medical device: predictions are a planning aid.
"""

from __future__ import annotations

import csv
import dataclasses
import io as _stdio
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..io import Provenance, load_image
from ..jsonfile import to_jsonable, write_json
from ..outdir import atomic_output, output_folder, output_paths_guard
from ..outputs import CAUTION, JobOptions, PlanChoice, PlanFiles, PlanSummary, job_and_settings
from ..plan import CSV_COLUMNS, plot_tradeoffs, recommend, sweep
from .dropout import load_mask_on_grid

__all__ = ["run_plan", "CAUTION"]



def _csv_text(rows: list[dict]) -> str:
    buffer = _stdio.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(CSV_COLUMNS)
    for r in rows:
        out = []
        for col in CSV_COLUMNS:
            value = r[col]
            if isinstance(value, float):
                value = f"{value:.6g}"
            out.append(value)
        writer.writerow(out)
    return buffer.getvalue()


def run_plan(
    b0_path,
    job: JobOptions | str,
    *,
    roi_path,
    brain_mask_path=None,
    te_s=(0.03,),
    thickness_mm=(3.0,),
    tilt_deg=(0.0,),
    pe_signs=(1, -1),
    zshim_mtms_per_m=(0.0,),
    orientation: str = "axial",
    pe_world_axis: str = "y",
    inplane_mm: float = 3.0,
    pe_lines: int = 64,
    echo_spacing_s: float | None = None,
    partial_fourier: float = 1.0,
    profile: str = "rect",
    tbw: float = 4.0,
    threshold: float = 0.5,
    slice_gap_mm: float = 0.0,
    time_per_slice_s: float = 0.06,
    multiband: int = 1,
    max_tr_s: float | None = None,
    tolerance: float = 0.01,
    coverage: str = "brain",
    **job_changes,
) -> PlanSummary:
    """Sweep candidate protocols over a B0 map, rank them and write the table and figure.

    Parameters are those of :func:`fieldfix.plan.sweep` (lists for the swept values) and
    :func:`fieldfix.plan.recommend` (`tolerance`), plus file paths:

    b0_path : path
        B0 map in Hz (3D NIfTI), measured or modelled.
    roi_path : path
        Region-of-interest mask.
    brain_mask_path : path, optional
        Whole-brain mask (default: the non-zero voxels of the B0 map).
    job : JobOptions or path
        Output folder and writing options (``**job_changes`` names their fields).

    Returns
    -------
    PlanSummary
        The recommended protocol and reason, counts and output names; ``plan.json`` holds it
        with the parameters, provenance and the full table.
    """
    job, _ = job_and_settings(job, _NoSettings, None, job_changes)
    b0_path = Path(b0_path)
    inputs = [Path(p) for p in (b0_path, roi_path, brain_mask_path) if p is not None]
    files = PlanFiles.named(job.tag)
    names = {k: job.path(v) for k, v in files.to_json().items()}
    with output_folder(job.out_dir):
        output_paths_guard(names.values(), inputs, job.overwrite)
        return _plan_in_folder(
            b0_path, job, files, names, inputs, roi_path=roi_path, brain_mask_path=brain_mask_path, te_s=te_s,
            thickness_mm=thickness_mm, tilt_deg=tilt_deg, pe_signs=pe_signs, zshim_mtms_per_m=zshim_mtms_per_m,
            orientation=orientation, pe_world_axis=pe_world_axis, inplane_mm=inplane_mm, pe_lines=pe_lines,
            echo_spacing_s=echo_spacing_s, partial_fourier=partial_fourier, profile=profile, tbw=tbw,
            threshold=threshold, slice_gap_mm=slice_gap_mm, time_per_slice_s=time_per_slice_s, multiband=multiband,
            max_tr_s=max_tr_s, tolerance=tolerance, coverage=coverage)


@dataclass(frozen=True)
class _NoSettings:
    """The planning job takes its sweep as keyword arguments."""


def _plan_in_folder(b0_path, job, files, names, inputs, *, roi_path, brain_mask_path, te_s, thickness_mm, tilt_deg,
                    pe_signs, zshim_mtms_per_m, orientation, pe_world_axis, inplane_mm, pe_lines, echo_spacing_s,
                    partial_fourier, profile, tbw, threshold, slice_gap_mm, time_per_slice_s, multiband, max_tr_s,
                    tolerance, coverage) -> PlanSummary:
    b0_img = load_image(b0_path, ndim=(3,))
    b0 = b0_img.get_fdata(np.float64)
    roi = load_mask_on_grid(roi_path, b0.shape, b0_img.affine, what="ROI mask")
    if not roi.any():
        raise InputError("the ROI mask is empty on the B0 grid", roi_path)
    brain = None
    if brain_mask_path is not None:
        brain = load_mask_on_grid(brain_mask_path, b0.shape, b0_img.affine, what="brain mask")
    if not np.isfinite(b0[roi if brain is None else (brain | roi)]).all():
        raise InputError("the B0 map has non-finite values inside the masks", b0_path)

    rows = sweep(b0, b0_img.affine, roi, brain, thickness_mm=thickness_mm, te_s=te_s, tilt_deg=tilt_deg,
                 pe_signs=pe_signs, zshim_mtms_per_m=zshim_mtms_per_m, orientation=orientation,
                 pe_world_axis=pe_world_axis, inplane_mm=inplane_mm, pe_lines=pe_lines,
                 echo_spacing_s=echo_spacing_s, partial_fourier=partial_fourier, profile=profile, tbw=tbw,
                 threshold=threshold, slice_gap_mm=slice_gap_mm, time_per_slice_s=time_per_slice_s,
                 multiband=multiband, max_tr_s=max_tr_s, coverage=coverage)
    choice, reason = recommend(rows, tolerance=tolerance, threshold=threshold)

    parameters = {
        "te_s": list(te_s), "thickness_mm": list(thickness_mm), "tilt_deg": list(tilt_deg),
        "pe_signs": list(pe_signs) if echo_spacing_s is not None else [], "zshim_mtms_per_m": list(zshim_mtms_per_m),
        "orientation": orientation, "pe_world_axis": pe_world_axis, "inplane_mm": inplane_mm,
        "pe_lines": pe_lines, "echo_spacing_s": echo_spacing_s, "partial_fourier": partial_fourier,
        "profile": profile, "tbw": tbw if profile == "rf" else None, "threshold": threshold,
        "slice_gap_mm": slice_gap_mm, "time_per_slice_s": time_per_slice_s, "multiband": multiband,
        "max_tr_s": max_tr_s, "tolerance": tolerance, "coverage": coverage,
    }
    with atomic_output(names["csv"], inputs, job.overwrite) as temporary:
        temporary.write_text(_csv_text(rows), encoding="utf-8")
    with atomic_output(names["figure"], inputs, job.overwrite) as temporary:
        plot_tradeoffs(rows, temporary, recommended=choice)
    summary = PlanSummary(
        b0=str(b0_path), roi=str(roi_path),
        brain_mask=str(brain_mask_path) if brain_mask_path is not None else "non-zero B0 voxels",
        roi_voxels=int(roi.sum()), protocols=len(rows), metric=rows[0]["metric"],
        recommended=PlanChoice.from_json({f.name: choice[f.name] for f in dataclasses.fields(PlanChoice)}),
        reason=reason, outputs=files, parameters=parameters,
        provenance=Provenance(job.command, parameters, inputs).as_dict(), rows=to_jsonable(rows))
    write_json(names["json"], summary.to_json(), inputs=inputs, overwrite=job.overwrite)
    return summary
