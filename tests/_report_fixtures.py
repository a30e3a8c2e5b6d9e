"""Small synthetic studies for the report tests (invented data), run through the real jobs.

An anatomy-like magnitude image, a smooth B0 bump in front of it, an EPI run distorted by
that bump along j (the phase-encode axis, code "j-") through the project's forward model,
then the real field-map (from a wrapped phase difference), unwarping, dropout and planning jobs write their
outputs and typed summaries into one folder, as a user's would be.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
from scipy import ndimage

from fieldfix.io import save_image

SHAPE = (24, 28, 10)
ZOOMS_MM = (2.5, 2.5, 3.0)
ECHO_SPACING_S = 0.0005
PE_SIGN = -1  # code "j-"
ECHO_TIMES_S = (0.00492, 0.00738)  # the phase difference's echo times; unaliased range +-203.3 Hz


def affine() -> np.ndarray:
    a = np.diag([*ZOOMS_MM, 1.0])
    a[:3, 3] = [-30.0, -35.0, -15.0]
    return a


def anatomy() -> np.ndarray:
    """An ellipsoidal 'head' with a dark inner region and a bright band (magnitude units)."""
    i, j, k = np.meshgrid(*(np.arange(n, dtype=float) for n in SHAPE), indexing="ij")
    c = (np.array(SHAPE) - 1) / 2.0
    outer = ((i - c[0]) / 9.0) ** 2 + ((j - c[1]) / 11.0) ** 2 + ((k - c[2]) / 6.0) ** 2 <= 1.0
    inner = ((i - c[0]) / 3.5) ** 2 + ((j - c[1] + 1) / 4.5) ** 2 + ((k - c[2]) / 3.5) ** 2 <= 1.0
    band = outer & (np.abs(j - c[1] - 5.0) < 1.2)
    image = 100.0 * outer - 60.0 * inner + 50.0 * band
    return ndimage.gaussian_filter(image, 0.6)


def field_hz(peak_hz: float = 240.0) -> np.ndarray:
    """A smooth bump above an 'air cavity' at the front (high j), plus a gentle gradient."""
    i, j, k = np.meshgrid(*(np.arange(n, dtype=float) for n in SHAPE), indexing="ij")
    c = (np.array(SHAPE) - 1) / 2.0
    bump = peak_hz * np.exp(-(((i - c[0]) / 4.0) ** 2 + ((j - 22.0) / 3.5) ** 2 + ((k - 2.0) / 3.0) ** 2))
    return bump - 2.0 * (i - c[0])


def shift_vox_of(field: np.ndarray) -> np.ndarray:
    return PE_SIGN * field * ECHO_SPACING_S * SHAPE[1]


def write_inputs(root: Path, *, stem: str, n_volumes: int, peak_hz: float, grid=None, pe_first: bool = False) -> dict:
    """The raw inputs: magnitude, field (Hz), masks and the distorted run with its sidecar.

    With `pe_first`, every image is stored with its first two voxel axes swapped (and the
    affine's columns with them): the same head, phase encoding along voxel axis 0 ("i-").
    """
    from fieldfix.unwarp import distort

    aff = affine() if grid is None else np.asarray(grid, float)
    order = (1, 0, 2) if pe_first else (0, 1, 2)
    if pe_first:
        aff = aff[:, [1, 0, 2, 3]]
    raw = root / "raw"
    raw.mkdir(parents=True, exist_ok=True)
    anat = np.transpose(anatomy(), order)
    head = anat > 20.0
    brain = head & (ndimage.binary_erosion(head, iterations=2))
    field = np.transpose(field_hz(peak_hz), order)
    pe_axis = 0 if pe_first else 1
    distorted = distort(anat, np.transpose(shift_vox_of(field_hz(peak_hz)), order), pe_axis)
    rng = np.random.default_rng(7)
    run = np.stack([7.0 * distorted + rng.normal(0, 1.0, anat.shape) for _ in range(n_volumes)], axis=-1)
    delta_te_s = ECHO_TIMES_S[1] - ECHO_TIMES_S[0]
    paths = {"magnitude": save_image(raw / "magnitude.nii.gz", anat, aff),
             "phasediff": save_image(raw / "phasediff.nii.gz", np.angle(np.exp(2j * np.pi * field * delta_te_s)), aff),
             "head": save_image(raw / "head_mask.nii.gz", head.astype(np.uint8), aff),
             "brain": save_image(raw / "brain_mask.nii.gz", brain.astype(np.uint8), aff),
             "run": save_image(raw / f"{stem}.nii.gz", run, aff)}
    roi = np.zeros(SHAPE, bool)
    roi[8:16, 18:24, 1:5] = True
    paths["roi"] = save_image(raw / "roi_mask.nii.gz", (np.transpose(roi, order) & head).astype(np.uint8), aff)
    (raw / "phasediff.json").write_text(json.dumps({"EchoTime1": ECHO_TIMES_S[0], "EchoTime2": ECHO_TIMES_S[1]}))
    (raw / f"{stem}.json").write_text(json.dumps({"PhaseEncodingDirection": "i-" if pe_first else "j-",
                                                  "EffectiveEchoSpacing": ECHO_SPACING_S}))
    return paths


def write_outputs(root: str | Path, *, peak_hz: float = 240.0, wrong_polarity: bool = False, n_volumes: int = 3,
                  with_dropout: bool = True, with_plan: bool = True, with_fieldmap: bool = True,
                  stem: str = "sub-01_task-rest_bold", out_name: str = "out", grid=None,
                  pe_first: bool = False) -> dict:
    """Run the real jobs on a synthetic study into `root/<out_name>` (raw inputs in `root/raw`).

    Returns the folder, the summaries the jobs returned and facts the tests check
    independently of fieldfix.report.
    """
    from fieldfix.workflows.dropout import run_dropout
    from fieldfix.workflows.fieldmap import run_fieldmap
    from fieldfix.workflows.plan import run_plan
    from fieldfix.workflows.unwarp import run_unwarp

    root = Path(root)
    out = root / out_name
    paths = write_inputs(root, stem=stem, n_volumes=n_volumes, peak_hz=peak_hz, grid=grid, pe_first=pe_first)
    jobs = {}
    fm_out = out if with_fieldmap else root / "fieldmap-elsewhere"
    jobs["fieldmap"] = run_fieldmap(fm_out, phase_diff=paths["phasediff"], magnitude=[paths["magnitude"]],
                                    mask=paths["head"], smooth_mm=0.0, reject_outliers=False, field_strength_t=3.0,
                                    phase_units="rad")
    b0 = fm_out / jobs["fieldmap"].outputs.b0_hz
    unwarp = {"pe_code": "i" if pe_first else "j", "timing_win": "arguments"} if wrong_polarity else {}
    jobs["unwarp"] = run_unwarp([paths["run"]], b0, out, b0_mask=fm_out / jobs["fieldmap"].outputs.mask,
                                **unwarp)[0]
    if with_dropout:
        jobs["dropout"] = run_dropout(b0, out, te_s=0.03, thickness_mm=3.0, like=paths["run"], mask=paths["brain"])
    if with_plan:
        jobs["plan"] = run_plan(b0, out, roi_path=paths["roi"], brain_mask_path=paths["brain"], te_s=(0.025, 0.035),
                                thickness_mm=(2.0, 3.0), tilt_deg=(-10.0, 0.0, 10.0), pe_signs=(1, -1),
                                echo_spacing_s=ECHO_SPACING_S, pe_lines=SHAPE[1], inplane_mm=2.5)
    head = anatomy() > 20.0
    shift = shift_vox_of(field_hz(peak_hz))
    return {"out": out, "stem": stem, "jobs": jobs, "paths": paths, "fieldmap_out": fm_out,
            "max_abs_shift_vox": float(np.abs(shift[head]).max()),
            "field_p50_hz": float(np.percentile(field_hz(peak_hz)[head], 50))}


def plan_row(**fields):
    """A :class:`fieldfix.outputs.PlanRow` for hand-made tables: the given fields over plain
    defaults (one 3 mm, 30 ms protocol with every voxel kept)."""
    from fieldfix.outputs import PlanRow

    row = dict(protocol="p", thickness_mm=3.0, te_s=0.03, tilt_deg=0.0, pe_sign=0, pe_polarity="none",
               pe_direction=None, zshim_mtms_per_m=0.0, metric="retention", roi_median=1.0, roi_percent_below=0.0,
               brain_median=1.0, brain_percent_below=0.0, coverage_mm=120.0, n_slices=40, slice_time_s=0.05,
               tr_s=2.0, fits_tr=True, merit=1.0, tsnr=100.0, readout_s=0.03, rank=0)
    return PlanRow(**{**row, **fields})
