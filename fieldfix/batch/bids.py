"""BIDS names and metadata: entities, the inheritance principle, IntendedFor, B0 field links.

The terms are those of the BIDS specification 1.9 (an open standard; Gorgolewski et al.
2016, Scientific Data 3:160044, and the specification text, sections "File name
structure", "The inheritance principle", "Fieldmap data" and "BIDS URI"):

* a file name is ``<key>-<label>_..._<suffix><extension>``; labels are letters and digits,
  index entities (``run``, ``echo`` ...) are non-negative integers, and entities appear in
  the order of the specification's entity table (:data:`ENTITY_ORDER`);
* a JSON sidecar applies to every data file in its folder or below (up to the dataset root)
  with the same suffix and a superset of its entities; values closer to the file win;
* ``IntendedFor`` entries are paths relative to the subject folder, or BIDS URIs:
  ``bids::<path from the dataset root>`` (this dataset) and ``bids:<name>:<path>`` (the
  dataset called ``<name>`` in ``DatasetLinks``, followed only when it is this one);
* ``B0FieldIdentifier`` of a field map and ``B0FieldSource`` of a run link them.

Every JSON file is read through :func:`fieldfix.jsonfile.read_json` (one strict reader).

Examples
--------
>>> parse_bids_name("sub-01_ses-2_task-rest_run-1_bold.nii.gz").entity_dict["ses"]
'2'
>>> derivative_name(parse_bids_name("sub-01_task-rest_bold.nii.gz"), desc="corrected")
'sub-01_task-rest_desc-corrected_bold.nii.gz'
"""

from __future__ import annotations

import json
import os
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable

from ..errors import FieldfixError, InputError
from ..jsonfile import read_json

__all__ = [
    "ENTITY_ORDER",
    "INDEX_ENTITIES",
    "PE_CODES",
    "BidsName",
    "parse_bids_name",
    "derivative_name",
    "check_label",
    "SidecarIndex",
    "Metadata",
    "IntendedTarget",
    "resolve_intended_for",
    "as_list",
    "pe_code_problem",
    "bids_uri",
]

#: Entities in the order of the BIDS entity table (specification 1.9; from memory of its
#: appendix "Entity table").
ENTITY_ORDER = (
    "sub", "ses", "sample", "task", "tracksys", "acq", "nuc", "voi", "ce", "trc", "stain", "rec", "dir",
    "run", "mod", "echo", "flip", "inv", "mt", "part", "proc", "hemi", "space", "split", "recording",
    "chunk", "seg", "res", "den", "label", "desc",
)
#: Entities whose value is an index (a non-negative integer) rather than a label.
INDEX_ENTITIES = frozenset({"run", "echo", "flip", "inv", "split", "chunk"})
#: The phase-encode codes BIDS allows in PhaseEncodingDirection.
PE_CODES = ("i", "j", "k", "i-", "j-", "k-")

_EXTENSIONS = (".nii.gz", ".nii", ".json", ".tsv.gz", ".tsv", ".csv", ".png", ".html")
_LABEL = re.compile(r"^[a-zA-Z0-9]+$")
_ENTITY = re.compile(r"^([a-zA-Z0-9]+)-([a-zA-Z0-9]+)$")
_SUFFIX = re.compile(r"^[a-zA-Z0-9]+$")


@dataclass(frozen=True)
class BidsName:
    """The parts of a BIDS file name.

    Attributes
    ----------
    entities : tuple of (str, str)
        Key-label pairs in the order they appear, e.g. ``(("sub", "01"), ("task", "rest"))``.
    suffix : str
        The last underscore-separated part before the extension, e.g. ``"bold"``.
    extension : str
        ``".nii.gz"``, ``".nii"``, ``".json"`` ...
    """

    entities: tuple[tuple[str, str], ...]
    suffix: str
    extension: str

    @property
    def entity_dict(self) -> dict[str, str]:
        return dict(self.entities)

    def stem(self, *, drop: Iterable[str] = ()) -> str:
        """Entities joined by underscores, without suffix (``sub-01_ses-02_task-rest``)."""
        dropped = set(drop)
        return "_".join(f"{k}-{v}" for k, v in self.entities if k not in dropped)

    @property
    def name(self) -> str:
        """The file name these parts make."""
        return "_".join([self.stem(), self.suffix] if self.entities else [self.suffix]) + self.extension

    def in_order(self) -> bool:
        """Whether the entities follow the BIDS entity table's order (unknown keys last)."""
        rank = [_rank(k) for k, _ in self.entities]
        return rank == sorted(rank)


def _rank(key: str) -> int:
    return ENTITY_ORDER.index(key) if key in ENTITY_ORDER else len(ENTITY_ORDER)


def _split_extension(base: str) -> tuple[str, str]:
    for ext in _EXTENSIONS:
        if base.endswith(ext):
            return base[: -len(ext)], ext
    if "." in base:
        head, dot, rest = base.partition(".")
        return head, dot + rest
    return base, ""


def parse_bids_name(name: str | os.PathLike) -> BidsName | None:
    """Split a BIDS file name into entities, suffix and extension.

    Returns None when the name does not follow the ``key-label_..._suffix.ext`` pattern
    (labels of letters and digits, a suffix of letters and digits, no key twice).

    Examples
    --------
    >>> parse_bids_name("sub-01_ses-2_task-rest_run-1_bold.nii.gz").suffix
    'bold'
    >>> parse_bids_name("sub-01_task-re_st_bold.nii.gz") is None
    True
    """
    base, extension = _split_extension(Path(name).name)
    parts = base.split("_")
    suffix = parts[-1]
    if not suffix or not _SUFFIX.match(suffix):
        return None
    entities = []
    for part in parts[:-1]:
        match = _ENTITY.match(part)
        if match is None:
            return None
        entities.append((match.group(1), match.group(2)))
    keys = [k for k, _ in entities]
    if len(set(keys)) != len(keys):
        return None
    return BidsName(tuple(entities), suffix, extension)


def check_label(text: str, what: str = "label") -> str:
    """Refuse a BIDS label that is not letters and digits (``sub-01`` -> ``01``).

    Raises
    ------
    InputError
        Naming the label and the rule.

    Examples
    --------
    >>> check_label("sub-01", "participant label")
    '01'
    """
    label = text[4:] if text.startswith("sub-") else text
    if not _LABEL.match(label):
        raise InputError(f"{text!r} is not a BIDS label (letters and digits only)", parameter=what)
    return label


def derivative_name(source: BidsName, *, desc: str | None = None, suffix: str | None = None,
                    space: str | None = None, extension: str = ".nii.gz", drop: Iterable[str] = ()) -> str:
    """BIDS derivative file name: the source's entities, plus ``space-`` and ``desc-``, in order.

    Parameters
    ----------
    source : BidsName
    desc, space : str, optional
        Labels (letters and digits; other characters are removed).
    suffix : str, optional
        Default: the source's suffix.
    extension : str
    drop : iterable of str
        Entities of the source left out (``dir`` for a field map made of several directions).

    Examples
    --------
    >>> src = parse_bids_name("sub-01_ses-1_task-rest_bold.nii.gz")
    >>> derivative_name(src, desc="bold", space="fieldmap", suffix="retention")
    'sub-01_ses-1_task-rest_space-fieldmap_desc-bold_retention.nii.gz'
    """
    dropped = set(drop) | {"desc", "space"}
    entities = {k: v for k, v in source.entities if k not in dropped}
    for key, value in (("space", space), ("desc", desc)):
        if value is not None:
            label = re.sub(r"[^a-zA-Z0-9]", "", value)
            if not label:
                raise ValueError(f"{key} {value!r} has no letters or digits")
            entities[key] = label
    keys = sorted(entities, key=lambda k: (_rank(k), k))
    return "_".join([f"{k}-{entities[k]}" for k in keys] + [suffix or source.suffix]) + extension


def as_list(value: Any) -> list:
    """A sidecar value that may be one item or a list, as a list (None: empty)."""
    if value is None:
        return []
    return list(value) if isinstance(value, (list, tuple)) else [value]


def pe_code_problem(value: Any, where: str) -> str | None:
    """Why a PhaseEncodingDirection value is unusable (None when it is one of the BIDS codes).

    Examples
    --------
    >>> pe_code_problem(1, "x.json")
    'x.json: PhaseEncodingDirection is 1, not one of i j k i- j- k-'
    >>> pe_code_problem("j-", "x.json") is None
    True
    """
    if value is None:
        return f"{where}: sidecar has no PhaseEncodingDirection"
    if isinstance(value, str) and value in PE_CODES:
        return None
    shown = repr(value) if isinstance(value, str) else json.dumps(value)
    return f"{where}: PhaseEncodingDirection is {shown}, not one of {' '.join(PE_CODES)}"


def bids_uri(relative: str, dataset: str = "raw") -> str:
    """A BIDS URI: ``bids:<dataset>:<path>`` (``dataset=""`` gives ``bids::<path>``, this dataset).

    Examples
    --------
    >>> bids_uri("sub-01/func/sub-01_task-rest_bold.nii.gz")
    'bids:raw:sub-01/func/sub-01_task-rest_bold.nii.gz'
    """
    return f"bids:{dataset}:{Path(relative).as_posix()}"


# ----------------------------------------------------------------------------- sidecars
@dataclass
class Metadata:
    """A data file's metadata merged from its sidecars, with the files and their problems."""

    values: dict = field(default_factory=dict)
    files: list[str] = field(default_factory=list)
    problems: list[str] = field(default_factory=list)


class SidecarIndex:
    """Finds the JSON sidecars of a file by the BIDS inheritance principle.

    A sidecar applies to a data file when it sits in the same folder or a parent folder
    (up to the dataset root), has the same suffix, and its entities are a subset of the
    file's. Values from sidecars closer to the file win; among sidecars of one folder, the
    one with more entities wins. A sidecar that cannot be read (see
    :func:`fieldfix.jsonfile.read_json`) is a problem of every file it applies to, never
    of the whole dataset.
    """

    def __init__(self, root: Path):
        self.root = root
        self._listing: dict[Path, list[tuple[BidsName, Path]]] = {}
        self._read: dict[Path, tuple[dict, str | None]] = {}

    def _jsons_in(self, folder: Path) -> list[tuple[BidsName, Path]]:
        if folder not in self._listing:
            found = []
            try:
                entries = sorted(folder.iterdir())
            except OSError:
                entries = []
            for path in entries:
                name = parse_bids_name(path.name) if path.name.endswith(".json") else None
                if name is not None and path.is_file():
                    found.append((name, path))
            self._listing[folder] = found
        return self._listing[folder]

    def _load(self, path: Path) -> tuple[dict, str | None]:
        if path not in self._read:
            try:
                self._read[path] = (read_json(path, what="JSON object (a BIDS sidecar)"), None)
            except FieldfixError as err:
                shown = path.relative_to(self.root).as_posix() if path.is_relative_to(self.root) else str(path)
                self._read[path] = ({}, f"{shown}: {err.message}")
        return self._read[path]

    def _folders(self, path: Path) -> list[Path]:
        folders, folder = [], path.parent
        while True:
            folders.append(folder)
            if folder == self.root or self.root not in folder.parents:
                return folders[::-1]  # root first, the file's own folder last
            folder = folder.parent

    def metadata(self, path: Path) -> Metadata:
        """The merged sidecar values of the data file at `path` (inside the root)."""
        name = parse_bids_name(path.name)
        result = Metadata()
        if name is None:
            return result
        entities = set(name.entities)
        for folder in self._folders(path):
            candidates = sorted((len(jn.entities), jp) for jn, jp in self._jsons_in(folder)
                                if jn.suffix == name.suffix and set(jn.entities) <= entities)
            for _, sidecar in candidates:
                values, problem = self._load(sidecar)
                result.values.update(values)
                result.files.append(sidecar.relative_to(self.root).as_posix())
                if problem:
                    result.problems.append(problem)
        return result


# ----------------------------------------------------------------------------- IntendedFor
@dataclass(frozen=True)
class IntendedTarget:
    """One IntendedFor entry resolved: the path from the dataset root, or why not.

    ``relative`` may be set together with ``problem`` when the entry clearly names a file
    of the dataset but breaks a rule (an absolute path): the run is then linked and fails
    with the reason instead of silently going uncorrected.
    """

    entry: str
    relative: str | None
    problem: str | None = None


def _inside(root: Path, candidate: str) -> str | None:
    """`candidate` (absolute, not resolved through links) as a path from `root`, if inside."""
    normal = os.path.normpath(candidate)
    try:
        relative = Path(normal).relative_to(root)
    except ValueError:
        return None
    return relative.as_posix() if relative.parts and ".." not in relative.parts else None


def resolve_intended_for(entry: Any, root: Path, subject_dir: Path, self_names: Iterable[str] = ()
                         ) -> IntendedTarget:
    """Resolve one IntendedFor entry to a path relative to the dataset root.

    Paths are resolved lexically (links are not followed), so a run stored as a link into
    an annex object store keeps its own name. `self_names` are the names under which the
    dataset's ``DatasetLinks`` refer to the dataset itself (``bids:<name>:`` URIs with
    another name point into another dataset and are not followed).

    Examples
    --------
    >>> root = Path("/data/study")
    >>> resolve_intended_for("bids::sub-01/func/a_bold.nii.gz", root, root / "sub-01").relative
    'sub-01/func/a_bold.nii.gz'
    >>> resolve_intended_for("/func/a_bold.nii.gz", root, root / "sub-01").problem[:44]
    "IntendedFor entry '/func/a_bold.nii.gz' is a"
    """
    if not isinstance(entry, str) or not entry.strip():
        return IntendedTarget(str(entry), None, f"IntendedFor entry {entry!r} is not a path or a BIDS URI")
    text = entry.strip()
    if text.startswith("bids:"):
        name, sep, rest = text[5:].partition(":")
        if not sep or not rest:
            return IntendedTarget(text, None, f"malformed BIDS URI {text!r} (expected bids:<dataset>:<path>)")
        if name and name not in set(self_names):
            return IntendedTarget(text, None, f"BIDS URI {text!r} points into another dataset ({name!r}), "
                                              "not followed")
        relative = _inside(root, str(root / rest.lstrip("/")))
        if relative is None:
            return IntendedTarget(text, None, f"BIDS URI {text!r} leaves the dataset")
        return IntendedTarget(text, relative)
    if os.path.isabs(text):
        rule = (f"IntendedFor entry {text!r} is an absolute path; it must be relative to the subject folder "
                "or a BIDS URI (bids::sub-.../...)")
        relative = _inside(root, text) or _inside(root, str(subject_dir / text.lstrip("/")))
        if relative is not None and not os.path.lexists(root / relative):
            relative = None
        return IntendedTarget(text, relative, rule)
    relative = _inside(root, str(subject_dir / text))
    if relative is None:
        return IntendedTarget(text, None, f"IntendedFor entry {text!r} leaves the dataset")
    if not os.path.lexists(root / relative):
        return IntendedTarget(text, None, f"IntendedFor entry {text!r} names a file that does not exist")
    return IntendedTarget(text, relative)
