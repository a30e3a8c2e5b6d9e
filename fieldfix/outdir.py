"""The output folder: where fieldfix may write, and what it wrote there.

Every file fieldfix writes, replaces or deletes goes through this module, and three rules
hold for all of them:

* **Containment.** The path, resolved through symbolic links, lies inside the active
  output folder (see :func:`output_folder`); a path outside it, or inside the folder's own
  state directory, is refused with an :class:`~fieldfix.errors.OutputError`.
* **Ownership.** An existing file is replaced or deleted only when fieldfix wrote it: the
  folder's *ledger* (``<folder>/.fieldfix/written/``) holds, for every file put in place,
  a record of its relative path, size, modification time, inode and SHA-256, signed with
  an HMAC key kept in ``<folder>/.fieldfix/key`` (readable by its owner only). A file with
  no valid record, a record whose signature fails, or a file whose content changed since
  (a user edited or replaced it) is not fieldfix's and is never replaced, not even with
  ``overwrite``. A symbolic link is never fieldfix's.
* **Atomicity.** Data go to a hidden temporary file in the target folder that is renamed
  into place only when complete (:func:`atomic_output`); inside an
  :func:`output_transaction`, files put in place are removed again (and replaced ones
  restored, with their records) if the block fails.

Without an active output folder (a library call such as ``save_image(path, ...)``), the
folder is the target file's own parent directory.

Temporary names carry the host and process id (``.<name>.<host>-<pid>.<random>.part``),
so that :func:`remove_leftovers` can delete what a killed process left behind, and only that.

Examples
--------
>>> import tempfile, os
>>> folder = tempfile.mkdtemp()
>>> with output_folder(folder):
...     with atomic_output(os.path.join(folder, "table.csv")) as temporary:
...         _ = temporary.write_text("a,b")
...     written_by_fieldfix(os.path.join(folder, "table.csv"))
True
>>> open(os.path.join(folder, "notes.txt"), "w").close()
>>> written_by_fieldfix(os.path.join(folder, "notes.txt"))
False
"""

from __future__ import annotations

import contextlib
import contextvars
import hashlib
import hmac
import json
import os
import re
import secrets
import socket
import tempfile
from pathlib import Path
from typing import Iterable, Iterator

from .errors import InputError, OutputError
from .jsonfile import read_json

__all__ = [
    "STATE_DIR",
    "OutputFolder",
    "output_folder",
    "active_folder",
    "folder_for",
    "atomic_output",
    "output_transaction",
    "output_paths_guard",
    "written_by_fieldfix",
    "remove_output",
    "adopt_output",
    "remove_leftovers",
    "sha256_file",
    "check_name_prefix",
    "host_label",
    "process_alive",
]

#: Hidden folder, inside each output folder, that holds the ledger and the key.
STATE_DIR = ".fieldfix"
_RECORDS = "written"
_KEY = "key"
_RECORD_FORMAT = 1
_TEMP_PATTERN = re.compile(r"^\.(?P<name>.+)\.(?P<host>[A-Za-z0-9_.-]+)-(?P<pid>\d+)\.[A-Za-z0-9_]+\."
                           r"(?:part(?:\.nii\.gz|\.[A-Za-z0-9]+)?|previous)$")


def sha256_file(path: str | os.PathLike, chunk_bytes: int = 1 << 20) -> str:
    """SHA-256 hex digest of a file's bytes."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(chunk_bytes), b""):
            digest.update(block)
    return digest.hexdigest()


def check_name_prefix(prefix: str, parameter: str = "prefix") -> str:
    """Refuse an output-name prefix that is not a plain part of a file name.

    Raises
    ------
    OutputError
        For a prefix with a folder separator, a parent-folder part, or a NUL character.

    Examples
    --------
    >>> check_name_prefix("sub-01_")
    'sub-01_'
    """
    text = str(prefix)
    if "/" in text or "\\" in text or "\x00" in text or text.startswith("."):
        raise OutputError(f"{parameter} {text!r} must be a plain start of a file name (no folders, no leading "
                          "dot); outputs always go into the output folder")
    return text


def host_label() -> str:
    """This host's name as fieldfix writes it in temporary names (letters, digits, ``_`` and ``.``)."""
    return re.sub(r"[^A-Za-z0-9_.]", "_", socket.gethostname())[:40] or "host"




class OutputFolder:
    """One output folder: containment checks and the signed ledger of what fieldfix wrote.

    Parameters
    ----------
    root : path
        The folder (created when the first file is written). Resolved through symbolic
        links once, here.
    """

    def __init__(self, root: str | os.PathLike):
        self.root = Path(os.path.abspath(os.path.expanduser(os.fspath(root))))
        self.root = self.root.resolve()
        self._key: bytes | None = None

    def __repr__(self) -> str:
        return f"OutputFolder({str(self.root)!r})"

    # -- containment -----------------------------------------------------------------------
    def contains(self, path: str | os.PathLike) -> bool:
        """Whether `path` (its parent resolved through links) lies inside this folder."""
        try:
            self.relative(path)
        except OutputError:
            return False
        return True

    def relative(self, path: str | os.PathLike) -> str:
        """Path relative to the folder, as POSIX text; refuses a path outside it.

        The parent folder is resolved through symbolic links, so a link inside the folder
        that leads outside it does not let a write escape. The last component is not
        followed (fieldfix replaces a name, never writes through a link).

        Raises
        ------
        OutputError
            For a path outside the folder, the folder itself, or a path in its state folder.
        """
        path = Path(os.path.abspath(os.path.expanduser(os.fspath(path))))
        parent = path.parent.resolve()
        if path.name in ("", ".", ".."):
            raise OutputError("not a file name inside the output folder", path)
        if parent != self.root and self.root not in parent.parents:
            raise OutputError(f"would be written outside the output folder {self.root}; fieldfix writes "
                              "and deletes only inside it", path)
        relative = (parent / path.name).relative_to(self.root)
        if relative.parts[0] == STATE_DIR:
            raise OutputError(f"lies in fieldfix's own state folder ({STATE_DIR}); choose another name", path)
        return relative.as_posix()

    # -- the key and the records -----------------------------------------------------------
    def _state(self) -> Path:
        return self.root / STATE_DIR

    def _read_key(self) -> bytes | None:
        try:
            text = (self._state() / _KEY).read_text(encoding="ascii").strip()
            return bytes.fromhex(text) if len(text) == 64 else None
        except (OSError, ValueError):
            return None

    def key(self, create: bool = False) -> bytes | None:
        """The folder's HMAC key (made on first write; None when missing and not created)."""
        if self._key is None:
            self._key = self._read_key()
        if self._key is None and create:
            self._key = self._make_key()
        return self._key

    def _make_key(self) -> bytes:
        state = self._state()
        try:
            state.mkdir(parents=True, exist_ok=True)
            (state / _RECORDS).mkdir(exist_ok=True)
        except OSError as err:
            raise OutputError(f"cannot create fieldfix's state folder ({err.strerror or err})", state) from None
        if state.is_symlink() or not state.is_dir():
            raise OutputError("fieldfix's state folder is not a plain folder; remove it", state)
        handle, temporary = tempfile.mkstemp(prefix=".key.", dir=state)
        try:
            os.write(handle, secrets.token_hex(32).encode("ascii"))
            os.close(handle)
            os.chmod(temporary, 0o600)
            os.link(temporary, state / _KEY)  # atomic: fails when another process made it first
        except FileExistsError:
            pass
        except OSError as err:
            raise OutputError(f"cannot write fieldfix's key ({err.strerror or err})", state / _KEY) from None
        finally:
            with contextlib.suppress(OSError):
                os.unlink(temporary)
        key = self._read_key()
        if key is None:
            raise OutputError("cannot read fieldfix's key (another user's folder?)", state / _KEY)
        return key

    def _record_path(self, relative: str) -> Path:
        name = hashlib.sha256(relative.encode("utf-8")).hexdigest()[:40]
        return self._state() / _RECORDS / f"{name}.json"

    def _mac(self, fields: dict, key: bytes) -> str:
        text = json.dumps(fields, sort_keys=True, separators=(",", ":"))
        return hmac.new(key, text.encode("utf-8"), hashlib.sha256).hexdigest()

    def _load_record(self, relative: str) -> dict | None:
        key = self.key()
        if key is None:
            return None
        try:
            record = read_json(self._record_path(relative))
        except InputError:  # missing or damaged: not a record fieldfix wrote
            return None
        if not isinstance(record, dict) or record.get("path") != relative:
            return None
        mac = record.pop("mac", None)
        if not isinstance(mac, str) or not hmac.compare_digest(mac, self._mac(record, key)):
            return None
        return record

    def _records_for(self, relative: str) -> Iterator[dict]:
        parts = relative.split("/")
        for depth in range(len(parts) - 1, -1, -1):
            folder = self if depth == 0 else OutputFolder(self.root.joinpath(*parts[:depth]))
            record = folder._load_record("/".join(parts[depth:]))
            if record is not None:
                yield record

    @staticmethod
    def version_of(file: Path, sha256: str | None = None) -> dict:
        """What identifies one version of a file: size, modification time, inode, SHA-256."""
        info = os.lstat(file)
        return {"size": info.st_size, "mtime_ns": info.st_mtime_ns, "inode": info.st_ino,
                "sha256": sha256 or sha256_file(file)}

    def record(self, path: str | os.PathLike, versions: list[dict]) -> None:
        """Record the versions of the file at `path` that fieldfix wrote (newest first).

        :func:`put_in_place` records the new version together with the one it replaces
        before the rename, then the new one alone, so that an interruption between the two
        never leaves a file of fieldfix's without a record.
        """
        relative = self.relative(path)
        fields = {"format": _RECORD_FORMAT, "path": relative, "versions": versions}
        key = self.key(create=True)
        record = dict(fields, mac=self._mac(fields, key))
        target = self._record_path(relative)
        handle, temporary = tempfile.mkstemp(prefix=".record.", dir=target.parent)
        with os.fdopen(handle, "w", encoding="utf-8") as stream:
            json.dump(record, stream)
        os.replace(temporary, target)

    def versions(self, relative: str) -> list[dict]:
        """The recorded versions of a file in this folder's own ledger (empty when none)."""
        record = self._load_record(relative)
        versions = record.get("versions") if record else None
        return [v for v in versions if isinstance(v, dict)] if isinstance(versions, list) else []

    def forget(self, path: str | os.PathLike) -> None:
        """Drop the record of a file (after it was removed)."""
        with contextlib.suppress(OSError):
            self._record_path(self.relative(path)).unlink()

    def _record_bytes(self, relative: str) -> bytes | None:
        try:
            return self._record_path(relative).read_bytes()
        except OSError:
            return None

    def _restore_record(self, relative: str, content: bytes | None) -> None:
        target = self._record_path(relative)
        with contextlib.suppress(OSError):
            if content is None:
                target.unlink()
            else:
                target.write_bytes(content)

    def owns(self, path: str | os.PathLike) -> bool:
        """Whether the file at `path` is one fieldfix wrote here and nobody changed since.

        The record is looked up in this folder's ledger and in the ledgers of the folders
        between it and the file (a file written by a library call into a subfolder has its
        record there).
        """
        relative = self.relative(path)
        full = self.root / relative
        try:
            info = os.lstat(full)
        except OSError:
            return False
        if not os.path.isfile(full) or os.path.islink(full):
            return False
        digest = None
        for record in self._records_for(relative):
            for version in record.get("versions") or []:
                if not isinstance(version, dict) or version.get("size") != info.st_size:
                    continue
                if version.get("mtime_ns") == info.st_mtime_ns and version.get("inode") == info.st_ino:
                    return True
                if digest is None:  # copied or touched: compare the content itself
                    try:
                        digest = sha256_file(full)
                    except OSError:
                        return False
                if version.get("sha256") == digest:
                    return True
        return False


#: The output folder of the job running in this context (None: each file's own parent).
_ACTIVE: contextvars.ContextVar[OutputFolder | None] = contextvars.ContextVar("fieldfix_output_folder",
                                                                             default=None)


def active_folder() -> OutputFolder | None:
    """The output folder set by the innermost :func:`output_folder` block, if any."""
    return _ACTIVE.get()


def folder_for(path: str | os.PathLike) -> OutputFolder:
    """The output folder `path` is written in: the active one, else the path's parent."""
    active = _ACTIVE.get()
    if active is not None:
        return active
    return OutputFolder(Path(os.path.abspath(os.fspath(path))).parent)


def raw_dataset_holding(root: str | os.PathLike) -> Path | None:
    """The raw BIDS dataset `root` lies in outside its ``derivatives/`` folder, if any.

    The nearest folder at or above `root` with a ``dataset_description.json`` decides: a raw
    dataset (``DatasetType`` missing or ``"raw"``) is returned unless `root` lies below its
    ``derivatives`` folder; a derivative dataset, or none at all, gives None.
    """
    from .jsonfile import read_json

    root = Path(os.path.abspath(os.fspath(root))).resolve()
    for folder in (root, *root.parents):
        description = folder / "dataset_description.json"
        if not description.is_file():
            continue
        try:
            kind = read_json(description).get("DatasetType", "raw")
        except InputError:
            return None
        if kind == "derivative":
            return None
        inside = root.relative_to(folder).parts
        return None if inside and inside[0] == "derivatives" else folder
    return None


@contextlib.contextmanager
def output_folder(root: str | os.PathLike, *, raw_dataset: bool = False) -> Iterator[OutputFolder]:
    """Make `root` the output folder of everything written inside the block.

    A block inside an active folder joins it when `root` lies inside that folder (a job
    writing into a subfolder of a batch's derivatives, say); a `root` outside it is refused.
    A new folder inside a raw BIDS dataset (outside its ``derivatives/``) is refused unless
    `raw_dataset` (the scenario generator writes raw datasets).
    """
    active = _ACTIVE.get()
    if active is not None:
        if Path(os.path.abspath(os.fspath(root))).resolve() != active.root:
            active.relative(Path(root) / "x")  # raises when outside
        yield active
        return
    dataset = None if raw_dataset else raw_dataset_holding(root)
    if dataset is not None:
        raise OutputError(f"lies inside the raw BIDS dataset {dataset}; fieldfix writes into a dataset only below its "
                          "derivatives/ folder (e.g. <dataset>/derivatives/fieldfix)", root)
    folder = OutputFolder(root)
    token = _ACTIVE.set(folder)
    try:
        yield folder
    finally:
        _ACTIVE.reset(token)


def written_by_fieldfix(path: str | os.PathLike) -> bool:
    """Whether the file at `path` was written by fieldfix (and is unchanged since)."""
    folder = folder_for(path)
    return folder.contains(path) and folder.owns(path)


def _same_file(a: Path, b: Path) -> bool:
    try:
        return a.exists() and b.exists() and os.path.samefile(a, b)
    except OSError:
        return False


def output_paths_guard(paths: Iterable, inputs: Iterable = (), overwrite: bool = False) -> None:
    """Check outputs before any computation, so that a refused job writes nothing.

    Refuses a path outside the output folder, one that would replace an input, a folder, an
    existing file that fieldfix did not write (whatever `overwrite` says), and an existing
    fieldfix output unless `overwrite`.

    Raises
    ------
    OutputError
        Naming the first offending path.
    """
    inputs = [Path(p) for p in inputs if p is not None]
    resolved_inputs = {p.resolve() for p in inputs}
    for path in paths:
        path = Path(path)
        folder = folder_for(path)
        folder.relative(path)
        if path.resolve() in resolved_inputs or any(_same_file(path, p) for p in inputs):
            raise OutputError("an input file has this output's name; inputs are never overwritten, "
                              "choose another output folder", path)
        if path.is_dir() and not path.is_symlink():
            raise OutputError("output name is taken by a folder", path)
        if os.path.lexists(path):
            if not folder.owns(path):
                raise OutputError("a file that fieldfix did not write (or that was changed since) has this "
                                  "output's name; fieldfix never replaces it: move it away or choose another "
                                  "output folder", path)
            if not overwrite:
                raise OutputError("output exists; pass overwrite (--overwrite) to replace it", path)


class _Transaction:
    """What an :func:`output_transaction` put in place, to undo it on failure."""

    def __init__(self):
        #: (folder, final path, set-aside previous file or None, the previous record's bytes)
        self.placed: list[tuple[OutputFolder, Path, Path | None, bytes | None]] = []
        #: state folders that did not exist before the transaction
        self.new_states: list[Path] = []

    def note_state(self, folder: OutputFolder) -> None:
        state = folder.root / STATE_DIR
        if not state.exists() and state not in self.new_states:
            self.new_states.append(state)

    def undo(self) -> None:
        for folder, final, previous, record in reversed(self.placed):
            relative = folder.relative(final)
            with contextlib.suppress(OSError):
                if previous is not None:
                    os.replace(previous, final)
                else:
                    final.unlink(missing_ok=True)
            folder._restore_record(relative, record)
        for state in self.new_states:  # made by this transaction: nothing of it stays
            with contextlib.suppress(OSError):
                for item in sorted(state.rglob("*"), reverse=True):
                    item.rmdir() if item.is_dir() and not item.is_symlink() else item.unlink()
                state.rmdir()

    def finish(self) -> None:
        for _, _, previous, _ in self.placed:
            if previous is not None:
                with contextlib.suppress(OSError):
                    previous.unlink()


_TRANSACTION: contextvars.ContextVar[_Transaction | None] = contextvars.ContextVar(
    "fieldfix_output_transaction", default=None)


@contextlib.contextmanager
def output_transaction():
    """All-or-nothing outputs: files written inside the block are removed again if it fails.

    Every file put in place inside the block is recorded; a file it replaces (with
    ``overwrite``) is first set aside. When the block raises (any exception,
    KeyboardInterrupt included), the new files are removed and the replaced ones restored,
    ledger records included (and a state folder the block created is removed), so a job
    that fails half-way leaves the output folder as it was; on success the set-aside files
    are deleted. A block inside an active transaction joins it.

    Examples
    --------
    >>> import tempfile, os
    >>> folder = tempfile.mkdtemp()
    >>> try:
    ...     with output_folder(folder), output_transaction():
    ...         with atomic_output(os.path.join(folder, "a.txt")) as temporary:
    ...             _ = temporary.write_text("1")
    ...         raise RuntimeError("a later step fails")
    ... except RuntimeError:
    ...     pass
    >>> os.listdir(folder)
    []
    """
    if _TRANSACTION.get() is not None:
        yield
        return
    transaction = _Transaction()
    token = _TRANSACTION.set(transaction)
    try:
        yield
    except BaseException:
        _TRANSACTION.reset(token)
        transaction.undo()
        raise
    _TRANSACTION.reset(token)
    transaction.finish()


def _temporary_name(path: Path, suffix: str) -> str:
    return f".{path.name}.{host_label()}-{os.getpid()}.{secrets.token_hex(4)}.{suffix}"


def put_in_place(temporary: Path, path: Path, sha256: str | None = None) -> None:
    """Rename a finished temporary file onto `path` and record it in the ledger.

    An existing file at `path` is replaced only when fieldfix wrote it; inside a
    transaction it is set aside first, so that a failure restores it.

    Raises
    ------
    OutputError
        When `path` lies outside the output folder or holds a file fieldfix did not write.
    """
    folder = folder_for(path)
    relative = folder.relative(path)
    if os.path.lexists(path) and not folder.owns(path):
        raise OutputError("a file that fieldfix did not write (or that was changed since) has this output's "
                          "name; fieldfix never replaces it", path)
    transaction = _TRANSACTION.get()
    previous_record = folder._record_bytes(relative)
    previous = None
    if transaction is not None:
        transaction.note_state(folder)
        if os.path.lexists(path):
            previous = path.with_name(_temporary_name(path, "previous"))
            os.replace(path, previous)
    new = OutputFolder.version_of(temporary, sha256)  # a rename keeps the inode and times
    folder.record(path, [new] + folder.versions(relative)[:1])
    os.replace(temporary, path)
    if transaction is not None:
        transaction.placed.append((folder, path, previous, previous_record))
    folder.record(path, [new])


def _current_umask() -> int:
    """The process umask, read from /proc where possible (setting it to read it is not thread-safe)."""
    try:
        with open("/proc/self/status") as handle:
            for line in handle:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    except (OSError, ValueError):
        pass
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def _make_parent(path: Path) -> None:
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise OutputError(f"cannot create the output folder ({err.strerror or err})", path.parent) from None


@contextlib.contextmanager
def atomic_output(path: str | os.PathLike, inputs: Iterable = (), overwrite: bool = False):
    """Yield a temporary path in the target folder; rename it onto `path` on success only.

    For outputs written by other libraries (a matplotlib figure, a CSV file): write to the
    yielded path, and the file appears under its final name only when the block succeeds.
    The output is checked with :func:`output_paths_guard` first, recorded in the folder's
    ledger, and takes part in an active :func:`output_transaction`.

    Examples
    --------
    >>> import tempfile, os
    >>> target = os.path.join(tempfile.mkdtemp(), "table.csv")
    >>> with atomic_output(target) as temporary:
    ...     _ = temporary.write_text("a,b")
    >>> open(target).read()
    'a,b'
    """
    path = Path(path)
    output_paths_guard([path], inputs, overwrite)
    temporary = new_temporary(path)
    try:
        yield temporary
        put_in_place(temporary, path)
    except OSError as err:
        temporary.unlink(missing_ok=True)
        raise write_failed(err, path) from None
    except BaseException:
        temporary.unlink(missing_ok=True)
        raise


def new_temporary(path: Path) -> Path:
    """Create an empty hidden temporary file beside `path` (usual permissions) and return its path."""
    _make_parent(path)
    suffix = ".nii.gz" if path.name.endswith(".nii.gz") else path.suffix
    temporary = path.with_name(_temporary_name(path, "part" + suffix))
    try:
        handle = os.open(temporary, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666 & ~_current_umask())
        os.close(handle)
    except OSError as err:
        raise OutputError(f"cannot write in the output folder ({err.strerror or err})", path) from None
    return temporary


def write_failed(err: OSError, path: Path) -> OutputError:
    """The one-line error for a write that failed (the temporary file was removed)."""
    return OutputError(f"write failed ({err.strerror or err}); nothing was left behind", path)


def remove_output(path: str | os.PathLike) -> bool:
    """Delete a file fieldfix wrote (and its record); anything else is left alone.

    Returns
    -------
    bool
        True when the file was removed; False when it was absent, outside the output folder,
        or not fieldfix's.
    """
    folder = folder_for(path)
    if not folder.contains(path) or not folder.owns(path):
        return False
    with contextlib.suppress(FileNotFoundError):
        os.unlink(path)
    folder.forget(path)
    return True


def adopt_output(source: str | os.PathLike, path: str | os.PathLike) -> None:
    """Move a finished file that fieldfix made (in a staging folder) to its final name.

    Both names must lie inside the output folder; an existing file at `path` is replaced
    only when fieldfix wrote it. The moved file is recorded under its new name.
    """
    folder = folder_for(path)
    source = Path(source)
    folder.relative(source)
    put_in_place(source, Path(path))
    folder.forget(source)


def remove_leftovers(root: str | os.PathLike) -> list[str]:
    """Delete the temporary files that killed fieldfix processes on this host left in `root`.

    Only hidden files named like fieldfix's temporaries, made on this host by a process that
    no longer runs, are removed; the state folder is skipped. Returns their relative paths.
    """
    folder = OutputFolder(root)
    removed = []
    host = host_label()
    for directory, subfolders, files in os.walk(folder.root):
        subfolders[:] = [s for s in subfolders if s != STATE_DIR and not s.startswith(".fieldfix-work")]
        for name in files:
            match = _TEMP_PATTERN.match(name)
            if match is None or match["host"] != host or process_alive(int(match["pid"])):
                continue
            full = Path(directory) / name
            if full.is_symlink() or not full.is_file():
                continue
            with contextlib.suppress(OSError):
                full.unlink()
                removed.append(full.relative_to(folder.root).as_posix())
    return removed


def process_alive(pid: int) -> bool:
    """Whether a process with this id runs on this host (one we may not signal counts as running)."""
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True
