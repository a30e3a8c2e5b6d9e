"""Builds a small invented BIDS dataset for the batch tests and the batch benchmark.

The study is invented ("a resting-state pilot at an imaginary 3 T site"); all data are
synthetic: an ellipsoidal head-like object, a smooth B0 field with a frontal bump, EPI
runs distorted along the phase-encode axis by that field (shift in voxels = field in Hz
x total readout time in s; common practice, no source), and gradient-echo field maps
whose phase follows 2*pi*field*TE.

Layout (three subjects):

* ``sub-01`` has two sessions; each has a phase-difference field map whose IntendedFor
  names the session's rest run -- as a path relative to the subject folder in ``ses-1``
  and as a BIDS URI (``bids::...``) in ``ses-2``.
* ``sub-02`` has a two-phase field map linked to its rest run through
  B0FieldIdentifier / B0FieldSource, a motor run with no field map, and a ready field
  map (``fieldmap`` + ``magnitude``) with no target.
* ``sub-03`` has a phase-difference field map whose NIfTI file is broken (truncated).

Repetition and echo time of the rest runs come from a root-level ``task-rest_bold.json``
(BIDS inheritance principle).
"""

from __future__ import annotations

import gzip
import json
import shutil
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
from scipy import ndimage

SHAPE = (24, 24, 12)
VOXEL_MM = 3.0
TE1_S, TE2_S = 0.00492, 0.00738
READOUT_S = 0.03
EPI_TE_S = 0.03


def _affine(shape=SHAPE, voxel_mm=VOXEL_MM) -> np.ndarray:
    aff = np.diag([voxel_mm, voxel_mm, voxel_mm, 1.0])
    aff[:3, 3] = -0.5 * voxel_mm * (np.array(shape) - 1)
    return aff


def _grid(shape):
    return np.meshgrid(*(np.linspace(-1, 1, n) for n in shape), indexing="ij")


def head(shape=SHAPE) -> np.ndarray:
    """Ellipsoid with a darker 'ventricle' in the middle, values ~ 0..1000."""
    x, y, z = _grid(shape)
    r = (x / 0.8) ** 2 + (y / 0.85) ** 2 + (z / 0.9) ** 2
    img = np.where(r < 1.0, 800.0, 0.0)
    img += np.where(x**2 / 0.04 + y**2 / 0.09 + z**2 / 0.2 < 1.0, -300.0, 0.0)
    img = ndimage.gaussian_filter(img, 0.7)
    return img.astype(np.float32)


def field_hz(shape=SHAPE, peak_hz=60.0, seed=0) -> np.ndarray:
    """Smooth field: a frontal bump plus a weak linear gradient (invented)."""
    x, y, z = _grid(shape)
    rng = np.random.default_rng(seed)
    jitter = 0.1 * rng.standard_normal(3)
    bump = np.exp(-(((x - jitter[0]) / 0.35) ** 2 + ((y - 0.6 - jitter[1]) / 0.3) ** 2
                    + ((z + 0.4 - jitter[2]) / 0.4) ** 2))
    return (peak_hz * bump + 8.0 * y).astype(np.float32)


def distort(image: np.ndarray, b0_hz: np.ndarray, readout_s: float, pe_sign: int) -> np.ndarray:
    """Forward EPI distortion along axis 1: intensity moves by shift = f * T * N / (N - 1)
    voxels (BIDS: TotalReadoutTime = EffectiveEchoSpacing x (N - 1), and the shift is
    the field times the echo spacing times N lines).

    Splatting with linear weights conserves total intensity (common practice, no source).
    """
    ny = image.shape[1]
    shift = pe_sign * b0_hz * readout_s * ny / (ny - 1)
    out = np.zeros_like(image, dtype=np.float64)
    # push each source voxel to its shifted position with linear splatting
    idx = np.indices(image.shape).astype(np.float64)
    dest = idx[1] + shift
    lo = np.floor(dest).astype(int)
    w_hi = dest - lo
    for off, w in ((0, 1.0 - w_hi), (1, w_hi)):
        j = lo + off
        ok = (j >= 0) & (j < ny)
        np.add.at(out, (idx[0][ok].astype(int), j[ok], idx[2][ok].astype(int)), (image * w)[ok])
    return out.astype(np.float32)


def _save(path: Path, data: np.ndarray, sidecar: dict | None = None) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    img = nib.Nifti1Image(np.asarray(data, dtype=np.float32), _affine(data.shape[:3]))
    img.header.set_xyzt_units("mm", "sec")
    if data.ndim == 4:
        img.header["pixdim"][4] = 2.0
    nib.save(img, str(path))
    if sidecar is not None:
        path.with_name(path.name.replace(".nii.gz", ".json")).write_text(
            json.dumps(sidecar, indent=2))


def _wrap(phase):
    return np.angle(np.exp(1j * phase)).astype(np.float32)


def _bold(path: Path, b0, n_volumes, seed, sidecar=None, pe_sign=-1):
    rng = np.random.default_rng(seed)
    base = distort(head(b0.shape), b0, READOUT_S, pe_sign)
    vols = [base * (1.0 + 0.01 * t) + rng.normal(0, 2.0, base.shape) for t in range(n_volumes)]
    _save(path, np.stack(vols, axis=-1), sidecar)


def _phasediff_fmap(folder: Path, stem: str, b0, intended=None, extra=None):
    mag = head(b0.shape)
    meta = {"EchoTime1": TE1_S, "EchoTime2": TE2_S, "Units": "rad"}
    if intended is not None:
        meta["IntendedFor"] = intended
    meta.update(extra or {})
    _save(folder / f"{stem}_phasediff.nii.gz",
          _wrap(2 * np.pi * b0 * (TE2_S - TE1_S)) * (mag > 50), meta)
    _save(folder / f"{stem}_magnitude1.nii.gz", mag, {"EchoTime": TE1_S})
    _save(folder / f"{stem}_magnitude2.nii.gz", 0.9 * mag, {"EchoTime": TE2_S})


def build_dataset(root, *, n_volumes: int = 4, shape=SHAPE, broken: bool = True,
                  extra_subjects: int = 0) -> Path:
    """Write the invented dataset under ``root`` and return its path.

    ``extra_subjects`` adds further subjects like ``sub-01``'s first session (used by the
    benchmark to give the scheduler more than a handful of tasks).
    """
    root = Path(root)
    root.mkdir(parents=True, exist_ok=True)
    (root / "dataset_description.json").write_text(json.dumps({
        "Name": "Invented resting-state pilot (synthetic)", "BIDSVersion": "1.9.0",
        "DatasetType": "raw", "License": "CC0",
    }, indent=2))
    (root / "task-rest_bold.json").write_text(json.dumps({
        "TaskName": "rest", "RepetitionTime": 2.0, "EchoTime": EPI_TE_S,
        "PhaseEncodingDirection": "j-", "TotalReadoutTime": READOUT_S,
    }, indent=2))
    (root / "participants.tsv").write_text("participant_id\n" + "".join(
        f"sub-{i:02d}\n" for i in range(1, 4 + extra_subjects)))

    # sub-01: two sessions, IntendedFor relative and as BIDS URI
    for k, ses in enumerate(("1", "2")):
        b0 = field_hz(shape, seed=10 + k)
        sdir = root / "sub-01" / f"ses-{ses}"
        bold_rel = f"ses-{ses}/func/sub-01_ses-{ses}_task-rest_bold.nii.gz"
        intended = [bold_rel] if ses == "1" else [f"bids::sub-01/{bold_rel}"]
        _phasediff_fmap(sdir / "fmap", f"sub-01_ses-{ses}", b0, intended)
        _bold(sdir / "func" / f"sub-01_ses-{ses}_task-rest_bold.nii.gz", b0, n_volumes, 20 + k)

    # sub-02: phase1/phase2 via B0FieldIdentifier, a run without field map, a spare fieldmap
    b0 = field_hz(shape, peak_hz=70.0, seed=30)
    mag = head(shape)
    fdir = root / "sub-02" / "fmap"
    for i, te in ((1, TE1_S), (2, TE2_S)):
        _save(fdir / f"sub-02_phase{i}.nii.gz", _wrap(2 * np.pi * b0 * te + 0.3) * (mag > 50),
              {"EchoTime": te, "Units": "rad", "B0FieldIdentifier": "gre2echo"})
        _save(fdir / f"sub-02_magnitude{i}.nii.gz", mag * (1.0 - 0.1 * (i - 1)),
              {"EchoTime": te, "B0FieldIdentifier": "gre2echo"})
    _save(fdir / "sub-02_acq-spare_fieldmap.nii.gz", b0 * (mag > 50), {"Units": "Hz"})
    _save(fdir / "sub-02_acq-spare_magnitude.nii.gz", mag, {})
    _bold(root / "sub-02" / "func" / "sub-02_task-rest_bold.nii.gz", b0, n_volumes, 31,
          sidecar={"B0FieldSource": "gre2echo"})
    _bold(root / "sub-02" / "func" / "sub-02_task-motor_bold.nii.gz", b0, n_volumes, 32,
          sidecar={"TaskName": "motor", "RepetitionTime": 2.0, "EchoTime": EPI_TE_S,
                   "PhaseEncodingDirection": "j-", "TotalReadoutTime": READOUT_S})

    # sub-03: broken phase-difference image (gzip stream cut short)
    b0 = field_hz(shape, seed=40)
    sdir = root / "sub-03"
    _phasediff_fmap(sdir / "fmap", "sub-03", b0, ["func/sub-03_task-rest_bold.nii.gz"])
    _bold(sdir / "func" / "sub-03_task-rest_bold.nii.gz", b0, n_volumes, 41)
    if broken:
        bad = sdir / "fmap" / "sub-03_phasediff.nii.gz"
        raw = gzip.decompress(bad.read_bytes())
        bad.write_bytes(gzip.compress(raw[: len(raw) // 3])[:-16])

    for i in range(4, 4 + extra_subjects):
        b0 = field_hz(shape, seed=100 + i)
        sdir = root / f"sub-{i:02d}"
        _phasediff_fmap(sdir / "fmap", f"sub-{i:02d}", b0,
                        [f"func/sub-{i:02d}_task-rest_bold.nii.gz"])
        _bold(sdir / "func" / f"sub-{i:02d}_task-rest_bold.nii.gz", b0, n_volumes, 100 + i)
    return root


# Fixtures shared by the batch test modules (imported by name there): the clean dataset is built
# once per module and each test works on its own copy.
@pytest.fixture(scope="module")
def pristine(tmp_path_factory):
    return build_dataset(tmp_path_factory.mktemp("pristine") / "study", broken=False)


@pytest.fixture
def dataset(pristine, tmp_path):
    root = tmp_path / "study"
    shutil.copytree(pristine, root)
    return root
