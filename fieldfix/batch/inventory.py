"""The inventory of a BIDS dataset: field-map acquisitions, EPI runs and remarks (typed records)."""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from pathlib import Path

__all__ = ["FieldMapAcquisition", "Run", "Inventory"]

_NIFTI = (".nii.gz", ".nii")


@dataclass
class FieldMapAcquisition:
    """One field-map acquisition of a subject/session.

    Attributes
    ----------
    key : str
        Entity stem shared by its files (``dir-`` left out for EPI groups), e.g.
        ``"sub-01_ses-1_acq-gre"``.
    subject, session : str
        Labels without ``sub-``/``ses-`` (session ``""`` when the dataset has none).
    kind : str
        ``"phasediff"``, ``"phase-pair"``, ``"fieldmap"``, ``"epi"`` (reversed phase-encode
        images) or ``"unsupported"``.
    files : dict of str to str
        Role to path relative to the root: the BIDS suffix for gradient-echo files, the file
        stem for the images of an EPI group.
    metadata : dict of str to dict
        Role to its merged (inherited) sidecar values.
    identifiers : list of str
        Its ``B0FieldIdentifier`` values.
    targets, other_targets : list of str
        Runs it is used for; other files its IntendedFor names (anatomical images ...).
    problems : list of str
        What makes it unusable; its task fails at once with them.
    warnings : list of str
        What was worked around (a missing ``magnitude1`` ...).
    unreadable : list of str
        Its sidecars that could not be read (then its targets are unknown).
    """

    key: str
    subject: str
    session: str
    kind: str = ""
    files: dict[str, str] = field(default_factory=dict)
    metadata: dict[str, dict] = field(default_factory=dict)
    identifiers: list[str] = field(default_factory=list)
    targets: list[str] = field(default_factory=list)
    other_targets: list[str] = field(default_factory=list)
    problems: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    unreadable: list[str] = field(default_factory=list)

    @property
    def primary(self) -> str:
        """Path of the file that carries the acquisition's metadata."""
        for role in ("phasediff", "phase1", "fieldmap"):
            if role in self.files:
                return self.files[role]
        return self.files[sorted(self.files)[0]]

    def add_problem(self, text: str) -> None:
        if text not in self.problems:
            self.problems.append(text)


@dataclass
class Run:
    """An EPI run that may be unwarped.

    Attributes
    ----------
    path : str
        Path relative to the dataset root.
    subject, session, datatype, suffix : str
    metadata : dict
        Its merged (inherited) sidecar values.
    fieldmap : str or None
        Key of the field map chosen for it, None when it has none.
    note : str
        Why it has no field map, or how the field map was chosen.
    problems : list of str
        Why it cannot be corrected although it has a field map (its tasks fail with them).
    """

    path: str
    subject: str
    session: str
    datatype: str
    suffix: str
    metadata: dict = field(default_factory=dict)
    fieldmap: str | None = None
    note: str = ""
    problems: list[str] = field(default_factory=list)

    @property
    def stem(self) -> str:
        name = Path(self.path).name
        return next((name[: -len(e)] for e in _NIFTI if name.endswith(e)), name)


@dataclass
class Inventory:
    """What :func:`discover` found in a BIDS dataset.

    Attributes
    ----------
    root : str
        Absolute path of the dataset.
    subjects : list of str
        Labels of the subjects included (without ``sub-``).
    fieldmaps : list of FieldMapAcquisition
    runs : list of Run
    problems : list of str
        Remarks that concern no single run or field map.
    """

    root: str
    subjects: list[str]
    fieldmaps: list[FieldMapAcquisition]
    runs: list[Run]
    problems: list[str] = field(default_factory=list)

    def fieldmap(self, key: str) -> FieldMapAcquisition:
        for fm in self.fieldmaps:
            if fm.key == key:
                return fm
        raise KeyError(key)

    @property
    def runs_without_fieldmap(self) -> list[Run]:
        return [r for r in self.runs if r.fieldmap is None]

    @property
    def fieldmaps_without_target(self) -> list[FieldMapAcquisition]:
        return [f for f in self.fieldmaps if not f.targets]

    def as_dict(self) -> dict:
        """JSON values of the whole inventory (for the batch log)."""
        return {"root": self.root, "subjects": list(self.subjects),
                "fieldmaps": [dataclasses.asdict(f) | {"primary": f.primary} for f in self.fieldmaps],
                "runs": [dataclasses.asdict(r) for r in self.runs], "problems": list(self.problems)}
