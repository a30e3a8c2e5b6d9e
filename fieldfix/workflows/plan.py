"""File-level planning job: B0 map + ROI -> ranked protocol table, recommendation and figure.

Outputs (:class:`fieldfix.outputs.PlanFiles`, ``<t>`` = the job's tag): ``<t>plan.csv``
(ranked table, one row per protocol), ``<t>plan.json`` (:class:`fieldfix.outputs.PlanSummary`:
parameters, recommendation with its reason, all rows) and ``<t>plan.png`` (trade-off figure). The masks are brought onto the B0 grid (nearest
neighbour through the affines) when they are on another grid.

Research software, not a medical device: predictions are a planning aid.
"""

from __future__ import annotations

import csv
import io as _stdio
import logging
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..geometry import resample_to_grid, same_grid
from ..io import Provenance, load_image
from ..jsonfile import to_jsonable, write_json
from ..outdir import atomic_output, output_folder, output_paths_guard
from ..outputs import CAUTION, JobOptions, PlanFiles, PlanRow, PlanSummary, job_and_settings
from ..plan import COLUMN_WORDS, CSV_COLUMNS, SweepSpec, plot_tradeoffs, recommend, sweep
from ..plan_field import FieldModel, ModelledField
from ._b0 import field_strength_from, measured_field
from ._modelled import MODEL_BRAIN, model_inputs, read_modelled_field, save_modelled_field
from .dropout import load_mask_on_grid

__all__ = ["run_plan", "load_label_roi", "CAUTION"]

log = logging.getLogger(__name__)

def _csv_text(rows: list[PlanRow]) -> str:
    buffer = _stdio.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(CSV_COLUMNS)
    for r in rows:
        out = []
        for col in CSV_COLUMNS:
            value = getattr(r, col)
            if isinstance(value, float):
                value = f"{value:.6g}"
            out.append(value)
        writer.writerow(out)
    return buffer.getvalue()


def run_plan(b0_path, job: JobOptions | str, *, roi_path, brain_mask_path=None, spec: SweepSpec | None = None,
             roi_labels=None, model: ModelledField | None = None, **changes) -> PlanSummary:
    """Sweep candidate protocols over a B0 map, rank them and write the table and figure.

    Parameters
    ----------
    b0_path : path or None
        B0 map in Hz (3D NIfTI), measured or modelled; None: the field `model` describes (built-in
        head or a label image, :mod:`fieldfix.plan_field`), and its brain as the brain mask.
    job : JobOptions or path
        Output folder and writing options.
    roi_path : path
        Region-of-interest mask, or a label image when `roi_labels` is given.
    brain_mask_path : path, optional
        Whole-brain mask (default: the non-zero voxels of the B0 map, or the model's brain).
    spec : SweepSpec, optional
        The protocols (:class:`fieldfix.plan.SweepSpec`); ``**changes`` names fields of it or of
        :class:`fieldfix.outputs.JobOptions`.
    roi_labels : sequence of int, optional
        Label values of `roi_path` that form the ROI.
    model : ModelledField, optional
        Field strength, head pitch and label image of the modelled field (used when `b0_path` is
        None; default the built-in head at 3 T).

    Returns
    -------
    PlanSummary
        The recommended protocol and reason, counts and output names; ``plan.json`` holds it
        with the parameters, provenance and the full table.
    """
    job, spec = job_and_settings(job, SweepSpec, spec, changes)
    inputs = [Path(p) for p in (b0_path, roi_path, brain_mask_path) if p is not None]
    inputs += model_inputs(model) if b0_path is None else []
    files = PlanFiles.named(job.tag, modelled=b0_path is None)
    names = {k: job.path(v) for k, v in files.to_json().items() if v is not None}
    spec.check_tr_limits()
    with output_folder(job.out_dir):
        output_paths_guard(names.values(), inputs, job.overwrite)
        field = _field(b0_path, model, spec.physiology.field_strength_t)
        roi, brain = _masks(field, roi_path, brain_mask_path, roi_labels)
        return _plan_in_folder(field, roi, brain, job, files, names, inputs, spec,
                               dict(roi=str(roi_path), brain_mask=_brain_words(brain_mask_path, b0_path)))


def _brain_words(brain_mask_path, b0_path) -> str:
    if brain_mask_path is not None:
        return str(brain_mask_path)
    return "non-zero B0 voxels" if b0_path is not None else MODEL_BRAIN


def _field(b0_path, model: ModelledField | None, field_strength_t: float) -> FieldModel:
    """The measured field of a file in Hz (its sidecar's Units honoured, as for dropout and unwarp; a
    ppm map at the sidecar's MagneticFieldStrength, else at `field_strength_t`), or the modelled
    field (built-in head or label image)."""
    if b0_path is None:
        return read_modelled_field(model)
    b0_img = load_image(b0_path, ndim=(3,))
    return measured_field(b0_img, None, field_strength_from(b0_img, None) or field_strength_t)[0]


def load_label_roi(path, labels, shape, affine) -> np.ndarray:
    """ROI of the voxels of a label image holding any of `labels`, brought onto a grid (nearest).

    Raises
    ------
    InputError
        When a label is not present in the image (naming the file and the labels).
    """
    image = load_image(path, ndim=(3,))
    data = np.rint(np.nan_to_num(image.get_fdata(np.float32))).astype(np.int64)
    wanted = sorted({int(v) for v in labels})
    absent = [v for v in wanted if not (data == v).any()]
    if absent:
        raise InputError(f"labels {absent} are not present in the label image", path)
    inside = np.isin(data, wanted)
    if same_grid(image.shape, image.affine, shape, affine):
        return inside
    values, covered = resample_to_grid(inside.astype(np.float32), image.affine, shape, affine, order=0,
                                       outside=0.0)
    roi = (values > 0.5) & covered
    if not roi.any():
        raise InputError("the labelled ROI does not overlap the B0 map", path)
    return roi


def _masks(field: FieldModel, roi_path, brain_mask_path, roi_labels):
    shape, affine = field.b0_hz.shape, field.affine
    if roi_labels is not None:
        roi = load_label_roi(roi_path, roi_labels, shape, affine)
    else:
        roi = load_mask_on_grid(roi_path, shape, affine, what="ROI mask")
    if not roi.any():
        raise InputError("the ROI mask is empty on the B0 grid", roi_path)
    brain = field.brain_mask
    if brain_mask_path is not None:
        brain = load_mask_on_grid(brain_mask_path, shape, affine, what="brain mask")
    if not np.isfinite(field.b0_hz[roi if brain is None else (brain | roi)]).all():
        raise InputError("the B0 map has non-finite values inside the masks", field.source.split(": ", 1)[-1])
    return roi, brain


def _tr_warning(rows, choice, spec: SweepSpec) -> list[str]:
    if spec.max_tr_s is None or choice.fits_tr:
        return []
    return [f"no protocol fits the TR limit of {spec.max_tr_s:g} s (shortest TR {min(r.tr_s for r in rows):.2f} s);"
            " the recommendation exceeds it"]


def _plan_in_folder(field: FieldModel, roi, brain, job, files, names, inputs, spec: SweepSpec,
                    masks: dict) -> PlanSummary:
    rows = sweep(field.b0_hz, field.affine, roi, brain, spec)
    choice, reason = recommend(rows, tolerance=spec.tolerance, threshold=spec.threshold, ranking=spec.ranking)
    warnings = _tr_warning(rows, choice, spec)
    for text in warnings:
        log.warning(text)
    parameters = spec.as_dict()
    modelled = field.source.startswith("modelled")
    with atomic_output(names["csv"], inputs, job.overwrite) as temporary:
        temporary.write_text(_csv_text(rows), encoding="utf-8")
    if modelled:
        save_modelled_field(names["modelled_b0_hz"], field, inputs=inputs, overwrite=job.overwrite,
                            provenance=Provenance(job.command, parameters, inputs))
    with atomic_output(names["figure"], inputs, job.overwrite) as temporary:
        plot_tradeoffs(rows, temporary, recommended=choice, ranking=spec.ranking, modelled=modelled)
    summary = PlanSummary(
        b0=field.source if modelled else field.source.split(": ", 1)[1], roi_voxels=int(roi.sum()),
        protocols=len(rows), metric=rows[0].metric, ranking=spec.ranking,
        field_source="modelled" if modelled else "measured", warnings=warnings,
        columns={k: COLUMN_WORDS[k] for k in CSV_COLUMNS},
        recommended=choice.choice(),
        reason=("Modelled field (no field map): " if modelled else "") + reason, outputs=files,
        parameters=to_jsonable(parameters), provenance=Provenance(job.command, parameters, inputs).as_dict(),
        rows=rows, **masks)
    write_json(names["json"], summary.to_json(), inputs=inputs, overwrite=job.overwrite)
    return summary
