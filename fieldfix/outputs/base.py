"""Job options, the one caution text and the base of every output-name list."""

from __future__ import annotations

import dataclasses
import os
from dataclasses import dataclass
from pathlib import Path

from ..outdir import check_name_prefix
from ..records import Record


#: The caution every command, sidecar, summary and report carries (one text everywhere).
CAUTION = ("Research software, not a medical device: inspect corrected images, B0 maps and dropout "
           "predictions before they are used for any decision about a person.")


@dataclass(frozen=True)
class JobOptions:
    """Where and how a file-level job writes.

    Attributes
    ----------
    out_dir : Path
        Output folder (created if missing).
    tag : str
        Put at the start of every output file name (``"sub-01_"`` gives
        ``sub-01_b0_hz.nii.gz``); a plain part of a file name, no folders.
    overwrite : bool
        Replace earlier outputs fieldfix wrote (never inputs, never other files).
    progress : bool
        Show progress bars on standard error.
    command : str, optional
        The command line or call recorded in the provenance sidecars.
    """

    out_dir: Path
    tag: str = ""
    overwrite: bool = False
    progress: bool = False
    command: str | None = None

    def __post_init__(self):
        object.__setattr__(self, "out_dir", Path(self.out_dir))
        check_name_prefix(self.tag, "tag")

    def path(self, name: str) -> Path:
        """Absolute-or-relative path of an output name inside the output folder."""
        return self.out_dir / name


def job_and_settings(job, settings_type, settings, changes: dict):
    """Build a job's :class:`JobOptions` and its settings dataclass from a call's arguments.

    `job` is a :class:`JobOptions` or an output folder; `settings` an instance of
    `settings_type` or None (its defaults); `changes` keyword arguments naming fields of
    either, applied on top (so ``run_unwarp(runs, b0, "out", pe_code="j-", overwrite=True)``
    works as well as passing the objects).

    Raises
    ------
    TypeError
        For a keyword that is a field of neither.
    """
    job = job if isinstance(job, JobOptions) else JobOptions(out_dir=job)
    settings = settings if settings is not None else settings_type()
    job_fields = {f.name for f in dataclasses.fields(JobOptions)}
    setting_fields = {f.name for f in dataclasses.fields(settings_type)}
    unknown = sorted(set(changes) - job_fields - setting_fields)
    if unknown:
        raise TypeError(f"unexpected keyword argument {unknown[0]!r}")
    job_changes = {k: v for k, v in changes.items() if k in job_fields}
    setting_changes = {k: v for k, v in changes.items() if k in setting_fields}
    if job_changes:
        job = dataclasses.replace(job, **job_changes)
    if setting_changes:
        settings = dataclasses.replace(settings, **setting_changes)
    return job, settings


class JobFiles(Record):
    """A job's output names (relative to its folder); image roles get provenance sidecars;
    ``SUMMARY_ROLE`` names the role of the job's typed summary (its numbers)."""

    SUMMARY_SUFFIX = ""
    SUMMARY_ROLE = "summary"
    IMAGES: tuple = ()

    @classmethod
    def prefixed(cls, prefix: str, names: dict[str, str], made: dict[str, bool] | None = None):
        """The list with `prefix` in front of every name; `made` (role -> bool) leaves out the
        optional outputs a job does not write.

        Example
        -------
        >>> from fieldfix.outputs import CombinedFiles
        >>> CombinedFiles.prefixed("sub-01_", {"corrected": "a.nii.gz", "summary": "a.json"}).corrected
        'sub-01_a.nii.gz'
        """
        made = made or {}
        return cls(**{role: prefix + name for role, name in names.items() if made.get(role, True)})

    def paths(self, folder: str | os.PathLike) -> dict[str, Path]:
        """Role -> path inside `folder`, for the outputs this job writes."""
        folder = Path(folder)
        return {f.name: folder / getattr(self, f.name) for f in dataclasses.fields(self)
                if getattr(self, f.name) is not None}

    def image_roles(self) -> list[str]:
        return [role for role in self.IMAGES if getattr(self, role) is not None]

    def guarded(self, folder: str | os.PathLike) -> list[Path]:
        """Every path the job will write: the outputs and their provenance sidecars."""
        from ..io import sidecar_path

        paths = self.paths(folder)
        every = list(paths.values()) + [sidecar_path(paths[role]) for role in self.image_roles()]
        if len(set(every)) != len(every):  # a registry entry whose names collide is a bug, not user error
            raise AssertionError(f"{type(self).__name__}: two outputs share a name: {sorted(map(str, every))}")
        return every
