"""Invented sample scenarios: a definition file -> a deterministic BIDS-style dataset with ground truth.

A scenario definition (JSON, every quantity with its unit) describes an invented study: the field
strength, the head's position in the magnet, a gradient-echo field map and one or more EPI runs.
:func:`generate_scenario` builds from it, for each subject (and session):

* the modelled B0 map: the procedural head of :mod:`fieldfix.susceptibility` (scalp, skull, brain,
  sinuses, ear canals, mastoid cells), its field by the Fourier dipole kernel for the head's pitch,
  shimmed to second order inside the brain;
* field-map echoes from :mod:`fieldfix.simulate.gradient_echo`, written either as a phase difference
  (``phasediff`` + ``magnitude1``/``magnitude2``, sidecar with ``EchoTime1``/``EchoTime2``) or as
  two phases (``phase1``/``phase2`` + magnitudes, each with its ``EchoTime``); phase in radians;
* EPI runs from :mod:`fieldfix.simulate.epi` (k-space line by line, through-slice integration, small
  rigid motion, noise), sidecars with ``PhaseEncodingDirection``, ``TotalReadoutTime``,
  ``EffectiveEchoSpacing``, ``EchoTime``, ``RepetitionTime``; the field map's ``IntendedFor`` lists
  them (paths relative to the subject folder);
* ground truth under ``derivatives/scenario-truth/``: the B0 map in Hz on the field-map grid and on
  each run's grid, brain masks, the region-of-interest mask when the scenario names one, and an
  undistorted reference volume of each run (the same simulation with zero field), plus
  ``manifest.json`` listing every file (paths relative to the dataset root).

Everything random comes from ``numpy.random.SeedSequence([seed, subject, session])``, so the same
definition and seed give the same data arrays, whatever else has run before.

Definition keys (see ``sample_scenarios/*/scenario.json``)::

    name, title                      text
    field_strength                   "3T"
    subjects                         number of subjects (labels 01, 02, ...) or a list of labels
    sessions                         0 (no session level), a number, or a list of labels
    head.pitch, head.roll            "6deg"  mean head orientation (see b0_direction_from_pitch)
    head.pitch_jitter                "4deg"  per-session standard deviation
    head.scale, head.scale_jitter    1.0, 0.03  head size factor and its per-subject sd
    head.shim_order                  2
    model.voxel_size                 "2.5mm" grid of the susceptibility model (covers the head)
    fieldmap.kind                    "phasediff" or "phase-pair"
    fieldmap.echo_times              ["4.92ms", "7.38ms"]
    fieldmap.voxel_size, .shape, .center   grid ("4mm", [48, 56, 36], ["0mm", "0mm", "10mm"])
    fieldmap.snr, fieldmap.t2star    40, "40ms"
    runs[]                           task, voxel_size, shape, center, phase_encoding_direction ("j-"),
                                     echo_spacing, echo_time, repetition_time, volumes,
                                     acceleration, partial_fourier, t2star, noise (fraction of
                                     brain signal), motion_translation ("0.3mm"), motion_rotation
    roi                              optional {name, center, semi_axes}: an ellipsoid, cut to brain

Research software, not a medical device; the scenarios and all their data are invented.

Example
-------
>>> from fieldfix.scenarios import generate_scenario, scenario_path    # doctest: +SKIP
>>> root = generate_scenario(scenario_path("orbitofrontal-3t"), "/tmp/ofc3t")  # doctest: +SKIP
"""

from __future__ import annotations

import copy
import dataclasses
import hashlib
import json
import os
import sys
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from scipy import ndimage

from . import susceptibility as sus
from .errors import InputError, OutputError
from .geometry import parse_pe_code
from .io import save_image, write_json
from .jsonfile import read_json
from .outdir import output_folder
from .scenario_spec import (FieldmapTruth, ManifestEntry, ManifestFieldmap, ManifestRun, RoiSpec, RunSpec,
                            ScenarioManifest, ScenarioSpec, parse_definition, parse_labels)
from .simulate.epi import epi_sidecar, fine_coordinates, simulate_epi_run
from .simulate.gradient_echo import simulate_gradient_echo

#: Sub-samples through the slice in the EPI simulation. Two sub-samples sum two phasors and
#: underestimate through-slice dephasing (|cos(pi x / 2)| instead of |sinc(x)|); four bring the
#: simulated orbitofrontal ROI signal within 0.01 of eight sub-samples (0.646 vs 0.636).
SLICE_SUBSAMPLES = 4

__all__ = [
    "GENERATOR_VERSION",
    "definition_hash",
    "SAMPLE_SCENARIOS_DIR",
    "generate_scenario",
    "list_scenarios",
    "load_definition",
    "load_manifest",
    "scenario_path",
    "tissue_image",
]

#: Bumped whenever the generator's output for a given definition and seed changes.
GENERATOR_VERSION = 1

#: The repository's folder of sample scenarios (present in a source checkout).
def _sample_scenarios_dir() -> Path:
    """``sample_scenarios/`` beside the source tree (a checkout or an editable install), else the
    copy a regular install puts under ``<prefix>/share/fieldfix/``."""
    beside = Path(__file__).resolve().parent.parent / "sample_scenarios"
    if beside.is_dir():
        return beside
    return Path(sys.prefix) / "share" / "fieldfix" / "sample_scenarios"


SAMPLE_SCENARIOS_DIR = _sample_scenarios_dir()

TRUTH_DIR = Path("derivatives") / "scenario-truth"

_DEFAULTS = {
    "subjects": 1,
    "sessions": 0,
    "head": {"pitch": "0deg", "roll": "0deg", "pitch_jitter": "0deg", "scale": 1.0,
             "scale_jitter": 0.0, "shim_order": 2},
    "model": {"voxel_size": "2.5mm"},
    "fieldmap": {"kind": "phasediff", "echo_times": ["4.92ms", "7.38ms"], "voxel_size": "4mm",
                 "shape": [48, 56, 40], "center": ["0mm", "0mm", "5mm"], "snr": 40.0, "t2star": "40ms"},
    "run": {"task": "rest", "voxel_size": "3mm", "shape": [64, 64, 36], "center": ["0mm", "0mm", "15mm"],
            "phase_encoding_direction": "j-", "echo_spacing": "0.5ms", "echo_time": "30ms",
            "repetition_time": "2s", "volumes": 4, "acceleration": 1, "partial_fourier": 1.0,
            "t2star": "45ms", "noise": 0.02, "motion_translation": "0mm", "motion_rotation": "0deg"},
}


# ---------------------------------------------------------------------------------------------
# Definitions
# ---------------------------------------------------------------------------------------------


def list_scenarios() -> list[str]:
    """Names of the sample scenarios shipped in ``sample_scenarios/``.

    Example
    -------
    >>> "orbitofrontal-3t" in list_scenarios()
    True
    """
    if not SAMPLE_SCENARIOS_DIR.is_dir():
        return []
    return sorted(p.parent.name for p in SAMPLE_SCENARIOS_DIR.glob("*/scenario.json"))


def scenario_path(name_or_path: str | os.PathLike) -> Path:
    """Definition file of a scenario given by name, folder or file path.

    Raises
    ------
    InputError
        When nothing matches; the message lists the known scenario names.
    """
    p = Path(name_or_path)
    if p.is_file():
        return p
    if p.is_dir() and (p / "scenario.json").is_file():
        return p / "scenario.json"
    candidate = SAMPLE_SCENARIOS_DIR / str(name_or_path) / "scenario.json"
    if candidate.is_file():
        return candidate
    known = ", ".join(list_scenarios()) or "none found"
    raise InputError(f"no scenario named {str(name_or_path)!r} (known: {known})")


def _merge(base: dict, over: dict) -> dict:
    out = copy.deepcopy(base)
    for k, v in over.items():
        if isinstance(v, dict) and isinstance(out.get(k), dict):
            out[k] = _merge(out[k], v)
        else:
            out[k] = copy.deepcopy(v)
    return out


def load_definition(definition_or_path) -> dict:
    """Read and validate a scenario definition; returns it with defaults filled in.

    Parameters
    ----------
    definition_or_path : dict, str or PathLike
        A definition dict, a path to its JSON file or folder, or a sample scenario's name.

    Returns
    -------
    dict
        The definition with its defaults filled in (its typed form: :func:`fieldfix.scenario_spec.parse_definition`).

    Raises
    ------
    InputError, UnitError
        Naming the file and the bad key.
    """
    return _load(definition_or_path)[0]


def _load(definition_or_path) -> tuple[dict, ScenarioSpec]:
    source = None
    if isinstance(definition_or_path, dict):
        raw = definition_or_path
    else:
        source = scenario_path(definition_or_path)
        raw = read_json(source, what="scenario definition (a JSON object)")
    if not isinstance(raw, dict) or "name" not in raw:
        raise InputError("a scenario definition is a JSON object with at least a 'name'", source)
    d = _merge({k: v for k, v in _DEFAULTS.items() if k != "run"}, raw)
    d["runs"] = [_merge(_DEFAULTS["run"], r) for r in raw.get("runs", [{}])]
    try:
        spec = parse_definition(d)
    except InputError as err:
        raise type(err)(str(err.args[0]) if err.args else str(err), source) from None
    except (TypeError, ValueError, KeyError) as err:
        raise InputError(f"bad scenario definition: {err}", source) from None
    d["_source"] = str(source) if source else None
    return d, spec


def definition_hash(d: dict) -> str:
    public = {k: v for k, v in d.items() if not k.startswith("_")}
    return hashlib.sha256(json.dumps(public, sort_keys=True).encode()).hexdigest()


# ---------------------------------------------------------------------------------------------
# Images of the invented head
# ---------------------------------------------------------------------------------------------

# Relative signal of each label in T2*-weighted EPI and gradient-echo magnitude images (an invented
# contrast that looks plausible: CSF bright, skull and air dark; common practice, no source).
_TISSUE_SIGNAL = {
    "air": 0.0, "scalp": 0.55, "skull": 0.05, "csf": 1.3, "brain": 0.9, "frontal_sinus": 0.0,
    "sphenoid_sinus": 0.0, "ethmoid_cells": 0.0, "ear_canal": 0.0, "mastoid_cells": 0.0,
    "soft_tissue": 0.5,
}


def tissue_image(x, y, z, scale: float = 1.0) -> np.ndarray:
    """Relative magnitude of the invented head at world points (mm), with inner structure.

    Brain carries a darker white-matter core and bright ventricles so that distortion and its
    correction are visible.

    Example
    -------
    >>> float(tissue_image(0.0, 0.0, 200.0))
    0.0
    """
    x, y, z = np.broadcast_arrays(*(np.asarray(v, dtype=float) for v in (x, y, z)))
    labels = sus.head_labels_at(x, y, z, scale)
    lut = np.zeros(256)
    for name, value in _TISSUE_SIGNAL.items():
        lut[sus.HEAD_LABELS[name]] = value
    img = np.array(lut[labels], dtype=float)
    brain = labels == sus.HEAD_LABELS["brain"]
    s = float(scale)
    wm = ((x / (42 * s)) ** 2 + ((y + 5 * s) / (58 * s)) ** 2 + ((z - 20 * s) / (40 * s)) ** 2) <= 1
    img[brain & wm] = 0.65
    for side in (-1, 1):
        vent = (((x - side * 9 * s) / (6 * s)) ** 2 + ((y + 5 * s) / (28 * s)) ** 2
                + ((z - 22 * s) / (9 * s)) ** 2) <= 1
        img[brain & vent] = 1.3
    return img


def _grid_affine(voxel_mm, shape, center_mm) -> np.ndarray:
    aff = np.diag([*np.asarray(voxel_mm, float), 1.0])
    aff[:3, 3] = np.asarray(center_mm, float) - np.asarray(voxel_mm, float) * (np.asarray(shape) - 1) / 2
    return aff


def _world(affine, index_axes) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """World coordinates of the grid given by per-axis fractional index arrays."""
    i, j, k = np.meshgrid(*index_axes, indexing="ij")
    a = affine
    return (a[0, 0] * i + a[0, 1] * j + a[0, 2] * k + a[0, 3],
            a[1, 0] * i + a[1, 1] * j + a[1, 2] * k + a[1, 3],
            a[2, 0] * i + a[2, 1] * j + a[2, 2] * k + a[2, 3])


def _sample(volume, affine, x, y, z, order=1) -> np.ndarray:
    inv = np.linalg.inv(affine)
    coords = [inv[r, 0] * x + inv[r, 1] * y + inv[r, 2] * z + inv[r, 3] for r in range(3)]
    return ndimage.map_coordinates(volume, coords, order=order, mode="nearest")


# ---------------------------------------------------------------------------------------------
# Generation
# ---------------------------------------------------------------------------------------------


def _bids_stem(sub: str, ses: str | None) -> str:
    return f"sub-{sub}" + (f"_ses-{ses}" if ses else "")


def _bids_dir(sub: str, ses: str | None) -> Path:
    return Path(f"sub-{sub}") / (f"ses-{ses}" if ses else "")


def _model_field(p: ScenarioSpec, scale: float, pitch_deg: float):
    """Shimmed B0 map (Hz) of the head on the model grid, with the model."""
    vox = p.model_voxel_mm
    half = sus.head_extent_mm(scale) + 12.0
    shape = tuple(int(np.ceil(2 * h / v)) + 1 for h, v in zip(half, vox))
    hm = sus.head_model(shape, tuple(vox), scale=scale, supersample=2)
    b_dir = sus.b0_direction_from_pitch(pitch_deg, p.roll_deg)
    raw = sus.field_from_susceptibility(hm.chi_ppm, hm.affine, field_t=p.field_strength_t, b0_direction=b_dir,
                                        workers=-1)
    b0, _ = sus.shim_field(raw, hm.brain_mask, hm.affine, order=p.shim_order)
    return b0, hm


def _roi_mask(roi: RoiSpec | None, scale, x, y, z, brain):
    if roi is None:
        return None
    c = roi.center_mm * scale
    a = roi.semi_axes_mm * scale
    inside = ((x - c[0]) / a[0]) ** 2 + ((y - c[1]) / a[1]) ** 2 + ((z - c[2]) / a[2]) ** 2 <= 1
    return inside & brain


@dataclass
class _Subject:
    """What the generation of one subject (and session) shares: where it writes and its head."""

    p: ScenarioSpec
    root: Path
    rel_dir: Path
    truth_dir: Path
    stem: str
    scale: float
    b0_model: np.ndarray
    hm: object
    rng: np.random.Generator
    overwrite: bool

    def save(self, rel, data, affine, dtype=np.float32, sidecar=None, template=None) -> str:
        save_image(self.root / rel, data, affine, dtype=dtype, overwrite=self.overwrite, template=template)
        if sidecar is not None:
            write_json(self.root / (str(rel)[: -len(".nii.gz")] + ".json"), sidecar, overwrite=self.overwrite)
        return str(rel)

    def b0_at(self, x, y, z) -> np.ndarray:
        return _sample(self.b0_model, self.hm.affine, x, y, z)


def _generate_one(p, d, root: Path, sub: str, ses: str | None, seq: np.random.SeedSequence,
                  scale: float, overwrite: bool) -> ManifestEntry:
    rng = np.random.default_rng(seq)
    pitch = p.pitch_deg + (rng.normal(0, p.pitch_jitter_deg) if p.pitch_jitter_deg > 0 else 0.0)
    pitch = float(np.round(pitch, 3))
    b0_model, hm = _model_field(p, scale, pitch)
    rel_dir = _bids_dir(sub, ses)
    ctx = _Subject(p, root, rel_dir, TRUTH_DIR / rel_dir, _bids_stem(sub, ses), scale, b0_model, hm, rng, overwrite)
    # EPI runs first, so that the field map can name them in IntendedFor
    runs = [_simulated_run(ctx, run) for run in p.runs]
    intended = [str(Path(rec.bold).relative_to(Path(f"sub-{sub}"))) for rec in runs]
    fieldmap, truth = _simulated_fieldmap(ctx, intended)
    return ManifestEntry(subject=sub, session=ses or "", pitch_deg=pitch, head_scale=scale, runs=runs,
                         fieldmap=fieldmap, truth=truth)


def _simulated_run(ctx: _Subject, run: RunSpec) -> ManifestRun:
    """One EPI run acquired in k-space (with motion and noise), its sidecar and its truth on the run grid."""
    aff = _grid_affine(run.voxel_mm, run.shape, run.center_mm)
    # Two sub-samples along the phase-encode axis (field variation within a voxel) and along
    # the slice (through-slice dephasing); the readout needs none in this signal model.
    pe_axis, _ = parse_pe_code(run.pe_code)
    slice_axis = 2 if pe_axis != 2 else 1
    factors = tuple({pe_axis: 2, slice_axis: SLICE_SUBSAMPLES}.get(a, 1) for a in range(3))
    fx, fy, fz = _world(aff, fine_coordinates(run.shape, factors))
    obj_fine = tissue_image(fx, fy, fz, ctx.scale)
    b0_fine = ctx.b0_at(fx, fy, fz)
    b0_fine[obj_fine <= 0] = 0.0  # no signal there; keeps the air's extreme values out
    options = dict(pe_code=run.pe_code, echo_spacing_s=run.echo_spacing_s, te_s=run.te_s,
                   oversample=factors, acceleration=run.acceleration, partial_fourier=run.partial_fourier,
                   t2star_s=run.t2star_s)
    mean_vox = float(np.mean(run.voxel_mm))
    data, motion = simulate_epi_run(obj_fine, b0_fine, run.volumes, noise_sd=run.noise,
                                    translation_sd_vox=run.motion_translation_mm / mean_vox,
                                    rotation_sd_deg=run.motion_rotation_deg, rng=ctx.rng, **options)
    reference, _ = simulate_epi_run(obj_fine, np.zeros_like(b0_fine), 1, **options)
    scale_signal = 1000.0  # scanner-like numbers
    bold_rel = ctx.rel_dir / "func" / f"{ctx.stem}_task-{run.task}_bold.nii.gz"
    sidecar = epi_sidecar(run.pe_code, run.shape[pe_axis], run.echo_spacing_s, run.te_s,
                          run.acceleration)
    sidecar.update({"TaskName": run.task, "RepetitionTime": run.repetition_time_s,
                    "MagneticFieldStrength": ctx.p.field_strength_t, "SliceThickness": float(run.voxel_mm[2]),
                    "PartialFourier": run.partial_fourier})
    ctx.save(bold_rel, data * scale_signal, aff, sidecar=sidecar, template=_tr_template(aff, run.repetition_time_s))
    cx, cy, cz = _world(aff, [np.arange(n, dtype=float) for n in run.shape])
    brain_run = sus.head_labels_at(cx, cy, cz, ctx.scale) == sus.HEAD_LABELS["brain"]
    folder, tstem = ctx.truth_dir / "func", f"{ctx.stem}_task-{run.task}"
    roi = _roi_mask(ctx.p.roi, ctx.scale, cx, cy, cz, brain_run)
    return ManifestRun(
        task=run.task, bold=str(bold_rel), pe_code=run.pe_code, total_readout_time_s=sidecar["TotalReadoutTime"],
        effective_echo_spacing_s=sidecar["EffectiveEchoSpacing"], te_s=run.te_s,
        slice_thickness_mm=float(run.voxel_mm[2]), motion=motion.round(6).tolist(),
        truth_b0_hz=ctx.save(folder / f"{tstem}_desc-truth_fieldmap.nii.gz", ctx.b0_at(cx, cy, cz), aff,
                             sidecar={"Units": "Hz", "Description": "modelled B0 map on the run grid"}),
        brain_mask=ctx.save(folder / f"{tstem}_desc-brain_mask.nii.gz", brain_run, aff, dtype=np.uint8),
        undistorted=ctx.save(folder / f"{tstem}_desc-undistorted_bold.nii.gz", reference[..., 0] * scale_signal, aff),
        roi_mask=None if roi is None else ctx.save(folder / f"{tstem}_desc-{ctx.p.roi.name}_mask.nii.gz", roi, aff,
                                                   dtype=np.uint8))


def _simulated_fieldmap(ctx: _Subject, intended: list[str]) -> tuple[ManifestFieldmap, FieldmapTruth]:
    """The dual-echo gradient-echo field map of the subject, and its truth on the field-map grid."""
    fm, field_t = ctx.p.fieldmap, ctx.p.field_strength_t
    aff = _grid_affine(fm.voxel_mm, fm.shape, fm.center_mm)
    cx, cy, cz = _world(aff, [np.arange(n, dtype=float) for n in fm.shape])
    b0_fm = ctx.b0_at(cx, cy, cz).astype(np.float64)
    gre = simulate_gradient_echo(b0_fm, fm.echo_times_s, magnitude=tissue_image(cx, cy, cz, ctx.scale),
                                 t2star_s=fm.t2star_s, snr=fm.snr, rng=ctx.rng)
    te1, te2 = fm.echo_times_s
    fdir, stem = ctx.rel_dir / "fmap", ctx.stem
    common = {"MagneticFieldStrength": field_t, "IntendedFor": intended}
    mags = gre.magnitudes()
    files = {f"magnitude{n}": ctx.save(fdir / f"{stem}_magnitude{n}.nii.gz", mags[n - 1] * 1000.0, aff,
                                       sidecar={"EchoTime": te, "MagneticFieldStrength": field_t})
             for n, te in ((1, te1), (2, te2))}
    if fm.kind == "phasediff":
        dphi = np.angle(gre.echoes[1] * np.conj(gre.echoes[0]))
        files["phasediff"] = ctx.save(fdir / f"{stem}_phasediff.nii.gz", dphi, aff,
                                      sidecar={"EchoTime1": te1, "EchoTime2": te2, "Units": "rad", **common})
    else:
        phases = gre.phases_rad()
        for n, te in ((1, te1), (2, te2)):
            files[f"phase{n}"] = ctx.save(fdir / f"{stem}_phase{n}.nii.gz", phases[n - 1], aff,
                                          sidecar={"EchoTime": te, "Units": "rad", **common})
    brain_fm = sus.head_labels_at(cx, cy, cz, ctx.scale) == sus.HEAD_LABELS["brain"]
    folder = ctx.truth_dir / "fmap"
    roi = _roi_mask(ctx.p.roi, ctx.scale, cx, cy, cz, brain_fm)
    brain_b0 = b0_fm[brain_fm]
    truth = FieldmapTruth(
        b0_hz=ctx.save(folder / f"{stem}_desc-truth_fieldmap.nii.gz", b0_fm, aff,
                       sidecar={"Units": "Hz", "Description": "modelled B0 map on the field-map grid"}),
        brain_mask=ctx.save(folder / f"{stem}_desc-brain_mask.nii.gz", brain_fm, aff, dtype=np.uint8),
        brain_b0_hz_percentiles={q: float(np.percentile(brain_b0, v)) for q, v in (("p1", 1), ("p50", 50), ("p99", 99))},
        roi_mask=None if roi is None else ctx.save(folder / f"{stem}_desc-{ctx.p.roi.name}_mask.nii.gz", roi, aff,
                                                   dtype=np.uint8))
    return ManifestFieldmap(kind=fm.kind, echo_times_s=[te1, te2], files=files), truth


def _tr_template(affine, tr_s: float):
    """A tiny 4D NIfTI whose header carries the voxel sizes and the repetition time."""
    import nibabel as nib

    header = nib.Nifti1Header()
    header.set_data_shape((1, 1, 1, 1))
    header.set_zooms((*np.sqrt((np.asarray(affine)[:3, :3] ** 2).sum(0)), float(tr_s)))
    header.set_xyzt_units("mm", "sec")
    return nib.Nifti1Image(np.zeros((1, 1, 1, 1), np.float32), affine, header)


def generate_scenario(definition_or_path, out_root, *, subjects=None, seed: int = 0, overwrite: bool = False,
                      sessions=None) -> Path:
    """Build a BIDS-style dataset with ground truth from a scenario definition.

    Parameters
    ----------
    definition_or_path : dict, str or PathLike
        Definition dict, its JSON file or folder, or the name of a sample scenario.
    out_root : str or PathLike
        Dataset folder to create (must be empty or absent unless ``overwrite``).
    subjects : int or list of str, optional
        Overrides the definition's subjects: a number (labels 01, 02, ...) or labels.
    seed : int
        Seed of all randomness; the same definition and seed give the same data arrays.
    overwrite : bool
        Replace files of an earlier generation in ``out_root``.
    sessions : int or list of str, optional
        Overrides the definition's sessions (0 for none).

    Returns
    -------
    Path
        ``out_root``; ``derivatives/scenario-truth/manifest.json`` lists every file written.

    Raises
    ------
    InputError
        Bad definition.
    OutputError
        ``out_root`` holds files and ``overwrite`` is false.
    """
    d, p = _load(definition_or_path)
    if subjects is not None:
        p = dataclasses.replace(p, subjects=parse_labels(subjects))
        if not p.subjects:
            raise InputError("a scenario needs at least one subject")
    if sessions is not None:
        p = dataclasses.replace(p, sessions=parse_labels(sessions, 1) if sessions else ())
    seed = int(seed)
    root = Path(out_root)
    if root.exists() and not root.is_dir():
        raise OutputError("the dataset folder is a file", root)
    if root.is_dir() and any(root.iterdir()) and not overwrite:
        raise OutputError("the dataset folder is not empty; pass overwrite to regenerate", root)
    root.mkdir(parents=True, exist_ok=True)
    with output_folder(root, raw_dataset=True):  # a raw dataset is what the generator makes
        return _write_dataset(d, p, root, seed, overwrite)


def _write_dataset(d: dict, p: ScenarioSpec, root: Path, seed: int, overwrite: bool) -> Path:
    public = {k: v for k, v in d.items() if not k.startswith("_")}
    write_json(root / "dataset_description.json", {
        "Name": f"fieldfix sample scenario: {d.get('title', d['name'])}",
        "BIDSVersion": "1.9.0",
        "DatasetType": "raw",
        "GeneratedBy": [{"Name": "fieldfix", "Description": "invented sample scenario (synthetic data)"}],
    }, overwrite=overwrite)
    write_json(root / TRUTH_DIR / "dataset_description.json", {
        "Name": "ground truth of the invented scenario",
        "BIDSVersion": "1.9.0",
        "DatasetType": "derivative",
        "GeneratedBy": [{"Name": "fieldfix", "Description": "modelled field and references"}],
    }, overwrite=overwrite)
    entries = []
    rows = ["participant_id\thead_scale"]
    for i, sub in enumerate(p.subjects):
        sub_rng = np.random.default_rng(np.random.SeedSequence([seed, i]))
        scale = p.scale * (1.0 + (sub_rng.normal(0, p.scale_jitter) if p.scale_jitter > 0 else 0.0))
        scale = float(np.round(scale, 4))
        rows.append(f"sub-{sub}\t{scale}")
        for j, ses in enumerate(p.sessions or [None]):
            seq = np.random.SeedSequence([seed, i, j + 1])
            entries.append(_generate_one(p, d, root, sub, ses, seq, scale, overwrite))
    _write_text(root / "participants.tsv", "\n".join(rows) + "\n", overwrite)
    manifest = ScenarioManifest(scenario=d["name"], title=d.get("title", d["name"]), generator_version=GENERATOR_VERSION,
                                definition_sha256=definition_hash(d), definition=public, seed=seed,
                                field_strength_t=p.field_strength_t, roi_name=p.roi.name if p.roi else None,
                                entries=entries)
    write_json(root / TRUTH_DIR / "manifest.json", manifest.to_json(), overwrite=overwrite)
    return root


def _write_text(path: Path, text: str, overwrite: bool) -> None:
    from .outdir import atomic_output

    with atomic_output(path, overwrite=overwrite) as temporary:
        temporary.write_text(text, encoding="utf-8")


def load_manifest(root) -> ScenarioManifest:
    """The manifest written by :func:`generate_scenario` (paths relative to ``root``).

    Raises
    ------
    InputError
        When ``root`` holds no generated scenario, or a manifest that does not match
        :class:`fieldfix.scenario_spec.ScenarioManifest` (one of an older generator).
    """
    path = Path(root) / TRUTH_DIR / "manifest.json"
    if not path.is_file():
        raise InputError("not a generated scenario (no manifest)", path)
    return ScenarioManifest.read(path)
