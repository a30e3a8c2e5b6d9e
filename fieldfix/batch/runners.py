"""Task runners: thin adapters from a planned task to a workflow call writing into a staging folder.

Each runner takes ``(task, upstream, deriv, staging, command)`` and returns the job's typed
summary, whose ``outputs`` name the files it wrote in `staging`; :mod:`.tasks` moves them
to their derivative names. Metadata resolved by the BIDS inheritance principle are passed
as arguments that win over the files' own sidecars (which may hold only part of them).
"""

from __future__ import annotations

from pathlib import Path
from typing import Mapping

import nibabel as nib

from ..errors import InputError
from ..geometry import parse_pe_code
from ..io import load_image
from ..outputs import JobOptions
from ..workflows.dropout import run_dropout
from ..workflows.fieldmap import run_fieldmap
from ..workflows.unwarp import run_unwarp
from .fieldmaps import check_declared_phase_units
from .params import EpiGroupParams, GradientEchoParams, ScannerMapParams
from .plan import Task, TaskResult
from .reports import SubjectReport, subject_report

__all__ = ["RUNNERS"]

_B0_UNITS = {"hz": "hz", "rad/s": "rad/s", "rad s-1": "rad/s", "t": "T", "ppm": "ppm"}


def _job(staging: Path, command) -> JobOptions:
    return JobOptions(out_dir=staging, command=command)


def _fieldmap_of(upstream: Mapping[str, TaskResult]) -> TaskResult:
    for result in upstream.values():
        if result.kind == "fieldmap":
            return result
    raise InputError("the field-map task this task needs left no result")


def _phase_units(p: GradientEchoParams, images: list[str]) -> str | None:
    """The phase units to use: the option, else the sidecar's when the values agree with it."""
    if p.phase_units:
        return p.phase_units
    declared = p.declared_phase_units
    if declared is None:
        return None
    times = p.echo_times_s
    delta = abs(times[1] - times[0]) if len(times) == 2 and None not in times else None
    for path in images:
        check_declared_phase_units(load_image(path, sidecar=False).get_fdata(), declared, delta, path)
    return declared


def _gre_fieldmap(task: Task, staging: Path, command):
    i, p = task.inputs, task.params
    common = dict(smooth_mm=p.smooth_mm, unwrap_method=p.unwrap_method, echo_times_s=tuple(p.echo_times_s),
                  echo_times_win="arguments")
    if p.kind == "phasediff":
        mags = tuple(i[m] for m in ("magnitude1", "magnitude2") if m in i)
        if "magnitude1" not in i:
            mags = (i["magnitude2"],)
        return run_fieldmap(_job(staging, command), phase_diff=i["phasediff"], magnitude=mags,
                            phase_units=_phase_units(p, [i["phasediff"]]), **common)
    return run_fieldmap(_job(staging, command), phase=(i["phase1"], i["phase2"]),
                        magnitude=(i["magnitude1"], i["magnitude2"]),
                        phase_units=_phase_units(p, [i["phase1"], i["phase2"]]), **common)


def _readout_times(task: Task) -> list[float]:
    """Total readout time of each EPI image: the sidecar's, else echo spacing x (lines - 1)."""
    p = task.params
    times = []
    for role, readout, spacing, code in zip(p.roles, p.readout_times_s, p.echo_spacings_s, p.pe_codes):
        if readout is None:
            lines = nib.load(task.inputs[role]).shape[parse_pe_code(code)[0]]
            readout = spacing * (lines - 1)
        times.append(float(readout))
    return times


def _epi_fieldmap(task: Task, staging: Path, command):
    p = task.params
    return run_fieldmap(_job(staging, command), epi=[task.inputs[r] for r in p.roles], epi_pe_codes=list(p.pe_codes),
                        epi_readout_times_s=_readout_times(task))


def run_fieldmap_task(task: Task, upstream, deriv: Path, staging: Path, command):
    """The field-map job for one acquisition (gradient-echo kinds or an EPI group)."""
    p = task.params
    if isinstance(p, GradientEchoParams):
        return _gre_fieldmap(task, staging, command)
    if isinstance(p, ScannerMapParams):
        units = str(p.units or "")
        b0_units = _B0_UNITS.get(units.strip().lower())
        if b0_units is None:
            raise InputError(f"field map Units {units!r} not understood (Hz, rad/s, T or ppm)",
                             path=task.inputs["fieldmap"])
        return run_fieldmap(_job(staging, command), b0=task.inputs["fieldmap"], b0_units=b0_units,
                            magnitude=(task.inputs["magnitude"],), smooth_mm=p.smooth_mm,
                            field_strength_t=p.field_strength_t)
    if isinstance(p, EpiGroupParams):
        return _epi_fieldmap(task, staging, command)
    raise InputError(f"field maps of kind {p.kind!r} are not supported")


def _b0_and_mask(task: Task, upstream, deriv: Path) -> tuple[Path, Path | None]:
    fieldmap = _fieldmap_of(upstream)
    mask = fieldmap.outputs.get("mask") if task.params.masks == "fieldmap" else None
    return deriv / fieldmap.outputs["b0_hz"], (deriv / mask) if mask else None


def run_unwarp_task(task: Task, upstream, deriv: Path, staging: Path, command):
    """Unwarp one run with its field map's B0 map."""
    p = task.params
    b0, mask = _b0_and_mask(task, upstream, deriv)
    timing = ({"readout_time_s": p.readout_time_s} if p.readout_time_s is not None
              else {"echo_spacing_s": p.echo_spacing_s})
    magnitude = _fieldmap_of(upstream).outputs.get("magnitude")
    summaries = run_unwarp([task.inputs["run"]], b0, _job(staging, command), pe_code=p.pe_code,
                           timing_win="arguments", te_s=p.te_s, b0_mask=mask, interp=p.interp,
                           align_fieldmap=p.align_fieldmap, motion=p.motion,
                           b0_magnitude=deriv / magnitude if magnitude else None, **timing)
    return summaries[0]


def run_geometry(task: Task) -> tuple[float, int, float | None]:
    """Slice thickness (mm), slice axis and effective echo spacing (s) of the task's run.

    Thickness: the option, else ``SliceThickness``, else the voxel size across slices.
    Echo spacing: ``EffectiveEchoSpacing``, else ``TotalReadoutTime / (N - 1)`` with N the
    voxels along the phase-encode axis (the BIDS definition of TotalReadoutTime).
    """
    p = task.params
    image = load_image(task.inputs["run"], sidecar=False)
    direction = p.slice_encoding_direction
    axis = parse_pe_code(direction)[0] if isinstance(direction, str) and direction.strip() else 2
    thickness = p.thickness_mm_option or p.slice_thickness_mm or float(image.zooms[axis])
    spacing = p.echo_spacing_s
    if spacing is None and p.readout_time_s is not None and p.pe_code:
        spacing = float(p.readout_time_s) / (image.shape[parse_pe_code(p.pe_code)[0]] - 1)
    return float(thickness), axis, spacing


def run_dropout_task(task: Task, upstream, deriv: Path, staging: Path, command):
    """Predict the dropout maps of one run's protocol with its field map's B0 map."""
    b0, mask = _b0_and_mask(task, upstream, deriv)
    thickness, axis, spacing = run_geometry(task)
    p = task.params
    return run_dropout(b0, _job(staging, command), te_s=p.te_s, thickness_mm=thickness, like=task.inputs["run"],
                       slice_axis=axis, pe_code=p.pe_code if spacing is not None else None, echo_spacing_s=spacing,
                       mask=mask, tilt_deg=p.tilt_deg)


def run_report_task(task: Task, upstream, deriv: Path, staging: Path, command) -> SubjectReport:
    """The subject's report, from the derivative summaries of its finished tasks."""
    summaries = [deriv / r.summary for _, r in sorted(upstream.items()) if r.summary is not None]
    return subject_report(summaries, staging, title=f"fieldfix batch report: sub-{task.subject}")


#: Task kind -> runner (tests replace entries to check the engine apart from the numerics).
RUNNERS = {
    "fieldmap": run_fieldmap_task,
    "unwarp": run_unwarp_task,
    "dropout": run_dropout_task,
    "report": run_report_task,
}
