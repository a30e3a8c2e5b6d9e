"""fieldfix: B0 field maps, EPI distortion correction and susceptibility-dropout prediction.

Research software, not a medical device: inspect corrected images before they are used for
any decision about a person.

The public API is small and flat; names carry their units. Array functions (the core) take
numpy arrays in SI units (hertz, seconds, millimetres) and return arrays; file-level jobs
(``run_*``, :func:`build_report`) read and write NIfTI/JSON and return a summary dict.

Field maps
    :func:`b0_from_echoes`, :func:`b0_from_phase_difference`, :func:`b0_from_map`,
    :func:`unwrap_quality`, :func:`unwrap_laplacian`, :func:`unaliased_range_hz`
Shifts and unwarping
    :func:`shift_vox_from_field`, :func:`jacobian_from_shift`, :func:`fold_mask`,
    :func:`displacement_field_mm`, :func:`echo_spacing_from_readout_time`,
    :func:`build_tables`, :func:`apply_tables`, :func:`unwarp_array`, :func:`distort`,
    :func:`distort_with_field`
Fields from reversed phase-encode pairs
    :func:`field_from_pairs`, :func:`restore_jointly`, :class:`PhaseEncoding`, :class:`PairOptions`
Field map placement and head motion
    :func:`align_fieldmap`, :func:`align_field_to_run`, :func:`align_rigid_matrix`,
    :func:`align_rigid_parameters`, :func:`align_motion_model`, :func:`align_volume_pose`,
    :func:`align_resample_volume`, :func:`align_run_volumes`, :func:`align_motion`, :func:`align_motion_result`,
    :func:`align_framewise_displacement`, :func:`align_motion_tsv`
Dropout and planning
    :func:`frame_from_affine`, :func:`frame_from_orientation`, :func:`dropout_maps`,
    :func:`through_plane_retention`, :func:`bold_sensitivity`, :func:`sweep`,
    :func:`recommend`, :class:`SweepSpec`, :class:`Physiology`, :func:`bold_merit`,
    :func:`modelled_field`, :class:`ModelledField`
Physics models
    :func:`field_from_susceptibility`, :func:`head_model`, :func:`shim_field`
Files and jobs
    :func:`load_image`, :func:`save_image`, :func:`run_fieldmap`, :func:`run_unwarp`,
    :func:`run_dropout`, :func:`run_plan`, :func:`run_batch`, :func:`run_demo`,
    :func:`build_report`
Units, geometry and errors
    :func:`parse_quantity`, :func:`parse_pe_code`, :func:`pe_world_direction`,
    :func:`resample_to_grid`, :class:`FieldfixError`, :class:`InputError`

Submodules are imported on first use, so ``import fieldfix`` is quick and compiles nothing.

Examples
--------
>>> import numpy as np, fieldfix
>>> b0_hz = np.full((8, 16, 4), 20.0)
>>> shift = fieldfix.shift_vox_from_field(b0_hz, "j-", echo_spacing_s=0.5e-3, n_pe_lines=16)
>>> float(shift[0, 0, 0])
-0.16
"""

from __future__ import annotations

import importlib

__version__ = "0.1.0"

_EXPORTS = {
    "fieldmap": ["b0_from_echoes", "b0_from_phase_difference", "b0_from_map", "FieldMapResult",
                 "unaliased_range_hz"],
    "unwrap": ["unwrap_quality", "unwrap_laplacian"],
    "shift": ["shift_vox_from_field", "jacobian_from_shift", "fold_mask", "displacement_field_mm",
              "echo_spacing_from_readout_time"],
    "unwarp": ["build_tables", "apply_tables", "unwarp_array", "distort", "distort_with_field"],
    "pairs": ["field_from_pairs", "restore_jointly", "PhaseEncoding", "PairOptions"],
    "dropout": ["frame_from_affine", "frame_from_orientation", "dropout_maps", "through_plane_retention",
                "bold_sensitivity"],
    "plan": ["sweep", "recommend", "SweepSpec"],
    "plan_merit": ["Physiology", "bold_merit"],
    "plan_field": ["modelled_field", "ModelledField"],
    "susceptibility": ["field_from_susceptibility", "head_model"],
    "shim": ["shim_field"],
    "io": ["load_image", "save_image"],
    "units": ["parse_quantity"],
    "geometry": ["parse_pe_code", "pe_world_direction", "resample_to_grid"],
    "align": ["align_fieldmap", "align_field_to_run", "align_rigid_matrix", "align_rigid_parameters"],
    "motion": ["align_motion_model", "align_volume_pose", "align_resample_volume", "align_run_volumes",
               "align_motion", "align_motion_result", "align_framewise_displacement", "align_motion_tsv"],
    "errors": ["FieldfixError", "InputError", "UnitError", "MetadataError", "GeometryError", "OutputError"],
    "report": ["build_report"],
    "batch": ["run_batch"],
    "workflows.fieldmap": ["run_fieldmap"],
    "workflows.unwarp": ["run_unwarp"],
    "workflows.dropout": ["run_dropout"],
    "workflows.plan": ["run_plan"],
    "workflows.demo": ["run_demo"],
}
_WHERE = {name: module for module, names in _EXPORTS.items() for name in names}

__all__ = sorted(_WHERE) + ["__version__"]


def __getattr__(name: str):
    module = _WHERE.get(name)
    if module is None:
        raise AttributeError(f"module 'fieldfix' has no attribute {name!r}")
    value = getattr(importlib.import_module(f"fieldfix.{module}"), name)
    globals()[name] = value
    return value


def __dir__():
    return sorted(set(globals()) | set(__all__))
