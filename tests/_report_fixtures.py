"""Small synthetic output folders for the report tests (invented data, written with fieldfix.io).

The folder mimics what the fieldmap, unwarp, dropout and plan workflows leave behind:
an anatomy-like magnitude image, a smooth B0 bump in front of it, an EPI run distorted by
that bump along j (the phase-encode axis) and a "corrected" run. Values are chosen so that
the expected numbers can be computed independently in the tests.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
from scipy import ndimage

from fieldfix.io import NIFTI_INTENT_DISPVECT, Provenance, save_image, write_json

SHAPE = (24, 28, 10)
ZOOMS_MM = (2.5, 2.5, 3.0)
ECHO_SPACING_S = 0.0005
PE_SIGN = -1  # code "j-"
DELTA_TE_S = 0.00246


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


def distort(image: np.ndarray, shift_vox: np.ndarray) -> np.ndarray:
    """What an EPI acquisition shows: signal moved along j by `shift_vox`, conserving signal
    (compression brightens), through the project's forward model."""
    from fieldfix.unwarp import distort as forward

    return forward(image, shift_vox, 1)


def write_outputs(
    root: str | Path,
    *,
    folded_voxels: int = 3,
    peak_hz: float = 240.0,
    wrong_polarity: bool = False,
    n_volumes: int = 3,
    with_dropout: bool = True,
    with_plan: bool = True,
    stem: str = "sub-01_task-rest_bold",
) -> dict:
    """Write a synthetic output folder `root/out` (and the raw run in `root/raw`).

    Returns the expected values the tests check (independently of fieldfix.report).
    """
    root = Path(root)
    out, raw = root / "out", root / "raw"
    out.mkdir(parents=True, exist_ok=True)
    raw.mkdir(parents=True, exist_ok=True)
    aff = affine()
    anat = anatomy()
    mask = anat > 20.0
    field = field_hz(peak_hz)
    shift = shift_vox_of(field)
    rng = np.random.default_rng(7)

    # Field-map outputs.
    b0 = save_image(out / "b0_hz.nii.gz", field, aff, provenance=Provenance("synthetic", {}, []))
    save_image(out / "b0_mask.nii.gz", mask, aff)
    save_image(out / "b0_magnitude.nii.gz", anat, aff)
    unaliased = 1.0 / (2.0 * DELTA_TE_S)
    write_json(out / "b0_summary.json", {
        "echo_times_s": [0.00492, 0.00492 + DELTA_TE_S],
        "unaliased_range_hz": [-unaliased, unaliased],
        "phase_units": "radians",
        "mask_volume_ml": float(mask.sum() * np.prod(ZOOMS_MM) / 1000.0),
    })

    # The distorted run (in raw/) and the correction (in out/).
    distorted = distort(anat, shift)
    # A perfect correction gives the anatomy back; one with the wrong polarity doubles the distortion.
    corrected = distort(distorted, shift) if wrong_polarity else anat.copy()
    epi_scale = 7.0  # EPI intensities differ from the magnitude's (the measure must not care)
    run = np.stack([epi_scale * distorted + rng.normal(0, 1.0, SHAPE) for _ in range(n_volumes)], axis=-1)
    fixed = np.stack([epi_scale * corrected + rng.normal(0, 1.0, SHAPE) for _ in range(n_volumes)], axis=-1)
    run_path = save_image(raw / f"{stem}.nii.gz", run, aff)
    (raw / f"{stem}.json").write_text(json.dumps({"PhaseEncodingDirection": "j-",
                                                  "EffectiveEchoSpacing": ECHO_SPACING_S}))
    provenance = Provenance("fieldfix unwarp (synthetic)", {"phase_encoding": "j-"}, [run_path, b0])
    save_image(out / f"{stem}_corrected.nii.gz", fixed, aff, provenance=provenance)
    save_image(out / f"{stem}_shift_vox.nii.gz", shift, aff, provenance=provenance)
    jac = 1.0 + np.gradient(shift, axis=1)
    folds = np.zeros(SHAPE, bool)
    inside = np.argwhere(mask)
    for n in range(folded_voxels):
        folds[tuple(inside[len(inside) // 2 + 7 * n])] = True
    jac[folds] = -0.2
    save_image(out / f"{stem}_jacobian.nii.gz", jac, aff)
    save_image(out / f"{stem}_fold_mask.nii.gz", folds, aff)
    displacement = shift[..., None] * aff[:3, 1]
    save_image(out / f"{stem}_displacement_mm.nii.gz", displacement[:, :, :, None, :], aff,
               intent=NIFTI_INTENT_DISPVECT)
    readout = ECHO_SPACING_S * (SHAPE[1] - 1)
    write_json(out / f"{stem}_unwarp.json", {
        "timing": {"readout_time_s": readout, "echo_spacing_s": ECHO_SPACING_S, "n_pe_lines": SHAPE[1]},
        "phase_encoding_direction": "j-",
        "pe_voxel_size_mm": ZOOMS_MM[1],
        "max_abs_shift_mm": float(np.abs(shift[mask]).max() * ZOOMS_MM[1]),
    })

    expected = {
        "out": out,
        "stem": stem,
        "max_abs_shift_mm": float(np.abs(shift[mask]).max() * ZOOMS_MM[1]),
        "percent_over_one_voxel": float(100.0 * np.mean(np.abs(shift[mask]) > 1.0)),
        "folded_voxels": int(folded_voxels),
        "field_max_hz": float(field[mask].max()),
        "field_min_hz": float(field[mask].min()),
        "field_p50_hz": float(np.percentile(field[mask], 50)),
        "unaliased_hz": unaliased,
        "beyond_unaliased": int(np.count_nonzero(np.abs(field[mask]) > unaliased)),
        "mask_volume_ml": float(mask.sum() * np.prod(ZOOMS_MM) / 1000.0),
    }

    if with_dropout:
        retention = np.clip(1.0 - field / (1.2 * peak_hz), 0.0, 1.0) ** 2
        save_image(out / "retention.nii.gz", retention, aff, provenance=Provenance("synthetic", {}, [b0]))
        save_image(out / "bold_sensitivity.nii.gz", 0.9 * retention, aff)
        write_json(out / "dropout.json", {"retention_threshold": 0.5, "te_s": 0.03})
        expected["retention_median"] = float(np.median(retention[mask]))
        expected["retention_below"] = float(100.0 * np.mean(retention[mask] < 0.5))

    if with_plan:
        header = ["rank", "thickness_mm", "te_s", "tilt_deg", "pe", "roi_median_retention"]
        rows = [[1, 2.0, 0.025, -20, "j-", 0.91], [2, 2.5, 0.025, -20, "j-", 0.88], [3, 3.0, 0.030, 0, "j", 0.71]]
        (out / "plan.csv").write_text("\n".join(",".join(map(str, r)) for r in [header, *rows]) + "\n")
        write_json(out / "plan.json", {"recommended": "2 mm, TE 25 ms, tilt -20 deg, j-",
                                       "reason": "thinnest slice and earlier echo keep the most signal in the ROI",
                                       "protocols": [dict(zip(header, r)) for r in rows]})
        from matplotlib.figure import Figure

        fig = Figure(figsize=(3, 2), dpi=60)
        ax = fig.subplots()
        ax.plot([2.0, 2.5, 3.0], [0.91, 0.88, 0.71], "o-")
        ax.set_xlabel("thickness (mm)")
        fig.savefig(out / "plan.png", format="png")
    return expected
