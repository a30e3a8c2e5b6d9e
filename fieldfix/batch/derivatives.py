"""Derivative names and sidecars: what a downstream pipeline reads in the batch's folder.

Names follow the BIDS entity rules (see :mod:`fieldfix.batch.bids`); a name says what the
file holds and on which grid:

==========================  =========================================================
field-map job (``F`` = the  ``F_desc-b0hz_fieldmap.nii.gz`` (Hz), ``F_desc-b0_mask``,
acquisition's entities,     ``F_desc-b0_magnitude``, ``F_desc-b0rads_fieldmap``,
no ``dir-``)                ``F_desc-b0ppm_fieldmap``; summary ``F_desc-fieldmap_summary.json``
unwarping (``R`` = the      ``R_desc-corrected_<S>.nii.gz`` (the series, with a complete
run's entities, ``S`` its   sidecar), ``R_desc-<S>_shift`` (voxels), ``R_desc-<S>_jacobian``,
suffix; the run's grid)     ``R_desc-<S>fold_mask``, ``R_desc-<S>_displacement`` (vectors);
                            summary ``R_desc-<S>unwarp_summary.json``
dropout                     ``R_space-fieldmap_desc-<S>_retention`` and
                            ``..._boldsensitivity`` (on the field map's grid),
                            ``R_desc-<S>_retention`` / ``..._boldsensitivity`` (resampled onto
                            the run's grid); summary ``R_desc-<S>dropout_summary.json``
==========================  =========================================================

Every image has a sidecar: the job's provenance, ``Sources`` as BIDS URIs
(``bids:raw:<path>`` for the raw dataset named in ``DatasetLinks``, ``bids::<path>`` for
this one), ``SpatialReference`` (the raw image whose grid it is on), and what it holds.
The corrected series' sidecar carries the raw run's metadata forward (timing, task, echo,
slice timing, everything of its inherited sidecars) except the field-map links (it needs no
further correction), plus a record of the correction. Job summaries have the suffix
``summary``, which no image has, so no JSON file looks like a sidecar without its image.
"""

from __future__ import annotations

import re
from pathlib import Path

from .. import __version__
from ..errors import OutputError
from ..jsonfile import read_json, write_json
from ..outdir import atomic_output
from ..outputs import CAUTION
from .bids import BidsName, bids_uri, derivative_name, parse_bids_name
from .plan import TASK_FORMAT

__all__ = ["DERIVATIVE_NAME", "SPACE_FIELDMAP", "SUMMARY_SUFFIX", "DERIVATIVE_SUFFIXES", "derivative_names",
           "image_sidecar", "write_dataset_description", "write_bidsignore", "IGNORED_FOLDERS"]

DERIVATIVE_NAME = "fieldfix"
#: ``space-`` label of maps on the field map's grid (a custom space, see SpatialReference).
SPACE_FIELDMAP = "fieldmap"
#: Suffix of the job summaries (JSON documents, not sidecars).
SUMMARY_SUFFIX = "summary"
#: Suffixes of the files derived from a run or a field map, beside the run suffixes.
DERIVATIVE_SUFFIXES = ("fieldmap", "mask", "magnitude", "shift", "jacobian", "displacement", "retention",
                       "boldsensitivity", "epi", SUMMARY_SUFFIX)
#: Folders of the derivatives that are not BIDS data (listed in ``.bidsignore``).
IGNORED_FOLDERS = ("group/", "logs/", "inspection/")

_FIELDMAP = {"b0_hz": ("b0hz", "fieldmap"), "mask": ("b0", "mask"), "magnitude": ("b0", "magnitude"),
             "b0_rads": ("b0rads", "fieldmap"), "b0_ppm": ("b0ppm", "fieldmap")}
_DESCRIPTIONS = {
    "shift_vox": ("voxel", "shift along the phase-encode axis, in voxels, of each voxel of the run"),
    "jacobian": ("1", "Jacobian of the distortion (1 + d shift / d pe); intensities were multiplied by it"),
    "fold_mask": (None, "voxels where the distortion folds (Jacobian at or below the floor): unreliable"),
    "retention": (None, "predicted through-plane signal retention at the nominal echo time (0 to 1)"),
    "bold_sensitivity": (None, "predicted BOLD sensitivity relative to a field-free voxel"),
}


def _alnum(text: str) -> str:
    return re.sub(r"[^a-zA-Z0-9]", "", text)


def _unwarp_name(role: str, source: BidsName) -> str:
    s = source.suffix
    table = {"corrected": ("corrected", s), "shift_vox": (s, "shift"), "jacobian": (s, "jacobian"),
             "fold_mask": (f"{s}fold", "mask"), "displacement_mm": (s, "displacement")}
    desc, suffix = table.get(role, (f"{s}{_alnum(role)}", "map"))
    return derivative_name(source, desc=desc, suffix=suffix)


def _dropout_name(role: str, source: BidsName) -> str:
    s = source.suffix
    base = role.removesuffix("_on_epi")
    suffix = {"retention": "retention", "bold_sensitivity": "boldsensitivity"}.get(base, _alnum(base))
    space = None if role.endswith("_on_epi") else SPACE_FIELDMAP
    return derivative_name(source, desc=s, suffix=suffix, space=space)


def _name(kind: str, role: str, source: BidsName) -> str:
    if role == "summary":
        desc = {"fieldmap": "fieldmap"}.get(kind, f"{source.suffix}{kind}")
        return derivative_name(source, desc=desc, suffix=SUMMARY_SUFFIX, extension=".json")
    if kind == "fieldmap":  # roles not known yet (the EPI-pair job's corrected inputs) by their role's name
        desc, suffix = _FIELDMAP.get(role, (_alnum(role), "epi" if "epi" in role else "fieldmap"))
        return derivative_name(source, desc=desc, suffix=suffix)
    if kind == "unwarp":
        return _unwarp_name(role, source)
    return _dropout_name(role, source)


def derivative_names(kind: str, roles: dict, source: str) -> dict:
    """Role -> derivative file name (a list of names for a role that holds several files).

    Examples
    --------
    >>> names = derivative_names("unwarp", {"corrected": "x", "summary": "y"}, "sub-01_task-rest_bold.nii.gz")
    >>> names["corrected"], names["summary"]
    ('sub-01_task-rest_desc-corrected_bold.nii.gz', 'sub-01_task-rest_desc-boldunwarp_summary.json')
    """
    parsed = parse_bids_name(source)
    if parsed is None:
        raise OutputError(f"{source!r} is not a BIDS name; derivative names cannot be made from it")
    names = {}
    for role, native in roles.items():
        if isinstance(native, (list, tuple)):
            names[role] = [_name(kind, f"{role}{i + 1}", parsed) for i in range(len(native))]
        elif native is not None:
            names[role] = _name(kind, role, parsed)
    return names


def _uri_of(path: Path, root: Path) -> str:
    return bids_uri(path.relative_to(root).as_posix()) if path.is_relative_to(root) else path.as_uri()


def image_sidecar(task, role: str, provenance: dict, *, summary=None, derived_sources=()) -> dict:
    """The sidecar of one derivative image (see the module docstring).

    Parameters
    ----------
    task : Task
    role : str
        The output's role in the job's file registry.
    provenance : dict
        The sidecar the job wrote (provenance, units, description).
    summary : record, optional
        The job's summary (for the correction record of a corrected run).
    derived_sources : sequence of str
        Derivative files (paths from the derivatives root) it was made from.
    """
    root = Path(task.dataset)
    sources = [_uri_of(Path(p), root) for _, p in sorted(task.inputs.items())]
    sources += [bids_uri(p, "") for p in derived_sources]
    grid = "run" if task.kind == "unwarp" or role.endswith("_on_epi") else "fieldmap"
    record: dict = {}
    if task.kind == "unwarp" and role == "corrected":
        record.update({k: v for k, v in task.metadata.items()
                       if k not in ("B0FieldSource", "B0FieldIdentifier", "IntendedFor")})
        record["FieldfixCorrection"] = _correction_record(summary, derived_sources)
    units, description = _DESCRIPTIONS.get(role.removesuffix("_on_epi"), (None, None))
    if units:
        record["Units"] = units
    if description:
        record["Description"] = description
    if role == "displacement_mm" and summary is not None:
        record.update(Units="mm", DisplacementConvention=summary.displacement_convention,
                      VectorLayout="5-D NIfTI (x, y, z, 1, 3), intent code 1006 (displacement vector); the three "
                                   "components are world x, y, z in mm (NIfTI RAS+: right, anterior, superior)")
    record.update(provenance)
    record.update(Sources=sources, SpatialReference=bids_uri(task.grids[grid]) if grid in task.grids else None,
                  FieldfixBatch={"TaskId": task.task_id, "TaskFormat": TASK_FORMAT})
    return {k: v for k, v in record.items() if v is not None}


def _correction_record(summary, derived_sources) -> dict:
    if summary is None:
        return {}
    return {"Description": "distortion along the phase-encode axis corrected with a B0 field map (pull-back along "
                           "the phase-encode axis, Jacobian intensity correction when JacobianModulation is true)",
            "FieldMap": bids_uri(derived_sources[0], "") if derived_sources else None,
            "PhaseEncodingDirection": summary.pe_code, "TotalReadoutTime": summary.timing.readout_time_s,
            "EffectiveEchoSpacing": summary.timing.echo_spacing_s, "TimingSource": summary.timing.source,
            "Interpolation": summary.interp, "JacobianModulation": summary.jacobian,
            "MaxAbsShiftVoxels": summary.max_abs_shift_vox, "FoldedVoxels": summary.folded_voxels_total,
            "FieldMapPlacement": summary.field_placement,
            "FieldMapToRunTransform": _transform(summary.alignment),
            "HeadMotion": summary.motion.to_json() if summary.motion is not None else None,
            "Warnings": list(summary.warnings)}


def _transform(alignment) -> dict | None:
    """The field-map-to-run rigid transform as the sidecar states it (units and convention in the keys)."""
    if alignment is None:
        return None
    return {"Matrix": alignment.matrix, "TranslationMillimetres": alignment.translation_mm,
            "RotationDegrees": alignment.rotation_deg, "RotationCentreMillimetres": alignment.centre_mm,
            "Convention": "field-map world (NIfTI RAS+ mm) -> run world; rotations about world x, y, z through the "
                          "centre, R = Rz Ry Rx, right-handed",
            "MatchBefore": alignment.measure_before, "MatchAfter": alignment.measure_after,
            "MatchMeasure": "normalised mutual information (1 independent, 2 identical)",
            "SignalModel": alignment.signal_model}


def write_dataset_description(deriv: Path, bids_root: Path) -> Path:
    """Write (or check) ``dataset_description.json`` of the derivatives dataset.

    Raises
    ------
    OutputError
        When the folder already holds a dataset description not made by fieldfix.
    """
    path = deriv / "dataset_description.json"
    if path.is_file():
        existing = read_json(path)
        names = [g.get("Name") for g in existing.get("GeneratedBy", []) if isinstance(g, dict)]
        if DERIVATIVE_NAME not in names:
            raise OutputError("this folder holds another dataset (its dataset_description.json was not written by "
                              "fieldfix); choose another output folder", path=path)
    raw = bids_root / "dataset_description.json"
    source_name = read_json(raw).get("Name") if raw.is_file() else None
    description = {
        "Name": f"fieldfix derivatives of {source_name}" if source_name else "fieldfix derivatives",
        "BIDSVersion": "1.9.0", "DatasetType": "derivative",
        "GeneratedBy": [{"Name": DERIVATIVE_NAME, "Version": __version__,
                         "Description": "B0 field maps in Hz, EPI runs unwarped along the phase-encode axis with "
                                        "Jacobian intensity correction, predicted dropout maps. " + CAUTION}],
        "SourceDatasets": [{"URL": bids_root.as_uri()}],
        "DatasetLinks": {"raw": bids_root.as_uri()},
    }
    write_json(path, description, overwrite=True)
    return path


def write_bidsignore(deriv: Path) -> Path:
    """List the batch's non-BIDS folders (group table, logs, reports) in ``.bidsignore``."""
    path = deriv / ".bidsignore"
    with atomic_output(path, overwrite=True) as temporary:
        temporary.write_text("".join(f"{folder}\n" for folder in IGNORED_FOLDERS), encoding="utf-8")
    return path
