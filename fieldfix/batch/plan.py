"""Task planning and hashing: the inventory becomes tasks, each with a hash of what decides it.

One ``fieldmap`` task per field-map acquisition; per run with a field map one ``unwarp``
and one ``dropout`` task waiting for it; per subject one ``report`` task waiting for all of
that subject's tasks. A task whose inputs are known to be unusable (a problem found by
discovery: a missing file, a wrong sidecar value, an input outside the dataset) is planned
all the same and fails at once with that reason, so that every run with a field map is
either corrected or listed as a failure.

:func:`task_hash` covers the task kind and format, the fieldfix version, the parameters
(the processing options included), the run's metadata, the bytes of every input, and the
hashes of the tasks it depends on.
"""

from __future__ import annotations

import hashlib
import json
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Mapping

from .. import __version__
from ..errors import InputError
from ..outdir import sha256_file
from ..outputs import RunPlanEntry
from ..records import Record
from ..units import PLAUSIBLE
from .bids import pe_code_problem
from .fieldmaps import declared_phase_units, number
from .inventory import FieldMapAcquisition, Inventory, Run
from .options import BatchOptions
from .params import DropoutParams, EpiGroupParams, FieldmapKind, GradientEchoParams, ScannerMapParams, UnwarpParams

__all__ = ["TASK_FORMAT", "Task", "TaskResult", "plan_tasks", "task_hash", "run_entries", "REPORT_FOLDER"]

#: Bumped when the meaning of a task's outputs changes, so that old outputs are redone.
TASK_FORMAT = 2
#: Folder of the derivatives that holds the per-subject reports (``<folder>/sub-<label>/``).
REPORT_FOLDER = "inspection"


@dataclass
class Task:
    """One unit of work of a batch.

    Attributes
    ----------
    task_id : str
        Unique, e.g. ``"fieldmap:sub-01_ses-1"`` or ``"unwarp:sub-01_ses-1_task-rest_bold"``.
    kind : str
        ``"fieldmap"``, ``"unwarp"``, ``"dropout"`` or ``"report"``.
    subject, session : str
    deps : tuple of str
        Task ids whose results this task needs.
    inputs : dict of str to str
        Role to absolute path of the raw input files (hashed).
    params : record of :mod:`.params`, or None
        The parameters (hashed as JSON), SI units; None for a report or a task that fails at once.
    out_dir : str
        Absolute folder of its derivatives.
    source : str
        BIDS file name whose entities the derivative names carry.
    dataset : str
        Absolute path of the raw dataset.
    metadata : dict
        The run's merged sidecar values, carried forward into the corrected series' sidecar
        (hashed).
    grids : dict of str to str
        ``"run"`` / ``"fieldmap"`` -> raw file (from the dataset root) whose grid a map is on.
    problems, warnings : list of str
        Known reasons why the task cannot run (it then fails at once with them); what was
        worked around.
    """

    task_id: str
    kind: str
    subject: str
    session: str
    deps: tuple[str, ...]
    inputs: dict[str, str]
    params: Record | None
    out_dir: str
    source: str
    dataset: str = ""
    metadata: dict = field(default_factory=dict)
    grids: dict[str, str] = field(default_factory=dict)
    problems: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)

    def parameters(self) -> dict:
        """The parameters as JSON values (what is hashed and recorded)."""
        return self.params.to_json() if self.params is not None else {}


@dataclass(frozen=True)
class TaskResult(Record):
    """What one task did (one entry of the batch log).

    ``outputs`` maps each output role to its path relative to the derivatives folder;
    ``summary`` is the derivative job summary (relative path) that readers open with the
    job's summary record (``UnwarpSummary.read`` ...).
    """

    task_id: str
    kind: str
    subject: str
    session: str
    status: str
    reason: str = ""
    hash: str | None = None
    outputs: dict[str, str] = field(default_factory=dict)
    summary: str | None = None
    started: str | None = None
    worker: str | None = None
    seconds: float = 0.0
    cpu_seconds: float = 0.0
    remarks: list[str] = field(default_factory=list)
    traceback: str | None = None

    @property
    def ok(self) -> bool:
        return self.status in ("done", "reused")


def _subject_folder(deriv: Path, subject: str, session: str) -> Path:
    folder = deriv / f"sub-{subject}"
    return folder / f"ses-{session}" if session else folder


def _fieldmap_params(fm: FieldMapAcquisition, options: BatchOptions) -> FieldmapKind:
    meta = fm.metadata
    if fm.kind == "phasediff":
        pd = meta.get("phasediff", {})
        return GradientEchoParams(kind=fm.kind, echo_times_s=[number(pd, "EchoTime1"), number(pd, "EchoTime2")],
                                  declared_phase_units=declared_phase_units(pd), **options.fieldmap_params())
    if fm.kind == "phase-pair":
        return GradientEchoParams(kind=fm.kind,
                                  echo_times_s=[number(meta.get(r, {}), "EchoTime") for r in ("phase1", "phase2")],
                                  declared_phase_units=declared_phase_units(meta.get("phase1", {})),
                                  **options.fieldmap_params())
    if fm.kind == "fieldmap":
        fmap = meta.get("fieldmap", {})
        return ScannerMapParams(kind=fm.kind, units=fmap.get("Units"),
                                field_strength_t=number(fmap, "MagneticFieldStrength"), smooth_mm=options.smooth_mm)
    if fm.kind == "epi":
        roles = sorted(fm.files)
        return EpiGroupParams(kind=fm.kind, roles=roles, pe_codes=[meta[r].get("PhaseEncodingDirection") for r in roles],
                              readout_times_s=[number(meta[r], "TotalReadoutTime") for r in roles],
                              echo_spacings_s=[number(meta[r], "EffectiveEchoSpacing") for r in roles])
    return FieldmapKind(kind=fm.kind)


def _fieldmap_task(fm: FieldMapAcquisition, root: Path, deriv: Path, options: BatchOptions) -> Task:
    return Task(task_id=f"fieldmap:{fm.key}", kind="fieldmap", subject=fm.subject, session=fm.session, deps=(),
                inputs={role: str(root / rel) for role, rel in sorted(fm.files.items())},
                params=_fieldmap_params(fm, options),
                out_dir=str(_subject_folder(deriv, fm.subject, fm.session) / "fmap"),
                source=f"{fm.key}_fieldmap.nii.gz", dataset=str(root), grids={"fieldmap": fm.primary},
                problems=list(fm.problems), warnings=list(fm.warnings))


def _echo_time(meta: dict) -> float | None:
    """The run's ``EchoTime`` (s) when it is a plausible EPI echo time, else None (the alignment then
    compares the magnitude alone, and says so)."""
    te = number(meta, "EchoTime")
    return te if PLAUSIBLE["te_s"].contains(te) else None


def _run_tasks(run: Run, fm: FieldMapAcquisition, root: Path, deriv: Path, options: BatchOptions) -> list[Task]:
    meta = run.metadata
    problems = list(run.problems)
    sidecar = run.path.rsplit(".nii", 1)[0] + ".json"
    pe = meta.get("PhaseEncodingDirection")
    problem = pe_code_problem(pe, sidecar)
    if problem:
        problems.append(problem)
    readout, spacing = number(meta, "TotalReadoutTime"), number(meta, "EffectiveEchoSpacing")
    if readout is None and spacing is None:
        problems.append(f"{sidecar}: sidecar has neither TotalReadoutTime nor EffectiveEchoSpacing")
    te = options.dropout_te_s if options.dropout_te_s is not None else number(meta, "EchoTime")
    common = dict(subject=run.subject, session=run.session, deps=(f"fieldmap:{fm.key}",),
                  inputs={"run": str(root / run.path)},
                  out_dir=str(_subject_folder(deriv, run.subject, run.session) / run.datatype),
                  source=Path(run.path).name, dataset=str(root), metadata=dict(meta),
                  grids={"run": run.path, "fieldmap": fm.primary})
    timing = dict(pe_code=pe if problem is None else None, readout_time_s=readout, echo_spacing_s=spacing)
    unwarp = Task(task_id=f"unwarp:{run.stem}", kind="unwarp",
                  params=UnwarpParams(**timing, te_s=_echo_time(meta), **options.unwarp_params()), problems=problems, **common)
    dropout_problems = list(run.problems) + ([] if te is not None else [f"{sidecar}: sidecar has no EchoTime"])
    dropout = Task(task_id=f"dropout:{run.stem}", kind="dropout",
                   params=DropoutParams(**timing, te_s=te, slice_thickness_mm=number(meta, "SliceThickness"),
                                        slice_encoding_direction=meta.get("SliceEncodingDirection"),
                                        **options.dropout_params()),
                   problems=dropout_problems, **common)
    return [unwarp, dropout]


def _unlinked_run_task(run: Run, root: Path, deriv: Path) -> Task:
    """A task that fails at once with the problems of a run whose field map cannot be found."""
    return Task(task_id=f"unwarp:{run.stem}", kind="unwarp", subject=run.subject, session=run.session, deps=(),
                inputs={}, params=None, out_dir=str(_subject_folder(deriv, run.subject, run.session) / run.datatype),
                source=Path(run.path).name, dataset=str(root), problems=list(run.problems))


def plan_tasks(inventory: Inventory, out_dir: str | os.PathLike, *, reports: bool = True,
               options: BatchOptions | None = None) -> list[Task]:
    """Turn an inventory into an ordered list of tasks with their dependencies.

    Field maps with no usable kind and no target are left out (they are listed in the
    summary's remarks); every other field map gets a task, also one with no target.

    Raises
    ------
    InputError
        When two tasks would share a name (duplicate file names in the dataset).

    Examples
    --------
    >>> tasks = plan_tasks(discover("/data/study"), "/data/out")   # doctest: +SKIP
    >>> tasks[0].task_id                                            # doctest: +SKIP
    'fieldmap:sub-01_ses-1'
    """
    options = options or BatchOptions()
    root = Path(inventory.root)
    deriv = Path(out_dir).expanduser().resolve()
    tasks: list[Task] = []
    by_subject: dict[str, list[str]] = {}
    planned = {}
    for fm in inventory.fieldmaps:
        if fm.kind == "unsupported" and not fm.targets:
            continue
        planned[fm.key] = fm
        tasks.append(_fieldmap_task(fm, root, deriv, options))
        by_subject.setdefault(fm.subject, []).append(tasks[-1].task_id)
    for run in inventory.runs:
        if run.fieldmap is None:
            if run.problems:  # an unreadable sidecar, a B0FieldSource that names nothing ...
                tasks.append(_unlinked_run_task(run, root, deriv))
                by_subject.setdefault(run.subject, []).append(tasks[-1].task_id)
            continue
        pair = _run_tasks(run, planned[run.fieldmap], root, deriv, options)
        tasks.extend(pair)
        by_subject.setdefault(run.subject, []).extend(t.task_id for t in pair)
    for subject in inventory.subjects if reports else ():
        deps = tuple(by_subject.get(subject, ()))
        if deps:
            tasks.append(Task(task_id=f"report:sub-{subject}", kind="report", subject=subject, session="", deps=deps,
                              inputs={}, params=None, out_dir=str(deriv / REPORT_FOLDER / f"sub-{subject}"),
                              source=f"sub-{subject}_report.html", dataset=str(root)))
    ids = [t.task_id for t in tasks]
    if len(set(ids)) != len(ids):
        twice = sorted({i for i in ids if ids.count(i) > 1})
        raise InputError(f"two tasks share the name {twice[0]}; the dataset has duplicate file names",
                         path=inventory.root)
    return tasks


def task_hash(task: Task, upstream: Mapping[str, TaskResult]) -> str:
    """SHA-256 over what determines a task's outputs (see the module docstring)."""
    record = {"kind": task.kind, "format": TASK_FORMAT, "fieldfix": __version__, "params": task.parameters(),
              "metadata": task.metadata, "source": task.source,
              "inputs": {role: sha256_file(p) for role, p in sorted(task.inputs.items())},
              "upstream": {dep: upstream[dep].hash for dep in sorted(upstream)}}
    text = json.dumps(record, sort_keys=True, default=str)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def run_entries(inventory: Inventory, tasks: list[Task]) -> list[RunPlanEntry]:
    """One entry per EPI run: ``correct`` (with its field map's files) or ``skip`` with the reason."""
    by_id = {t.task_id: t for t in tasks}
    entries = []
    for run in inventory.runs:
        fm = next((f for f in inventory.fieldmaps if f.key == run.fieldmap), None)
        files = sorted(fm.files.values()) if fm is not None else []
        unwarp = by_id.get(f"unwarp:{run.stem}")
        if fm is None and unwarp is not None:
            entries.append(RunPlanEntry(run=run.path, fieldmap=[], action="skip", reason="; ".join(unwarp.problems)))
            continue
        if fm is None or unwarp is None:
            entries.append(RunPlanEntry(run=run.path, fieldmap=files, action="skip", reason=run.note))
            continue
        problems = [f"field map {fm.key}: {p}" for p in fm.problems] + unwarp.problems
        entries.append(RunPlanEntry(run=run.path, fieldmap=files, action="skip" if problems else "correct",
                                    reason="; ".join(problems) if problems else run.note))
    return entries
