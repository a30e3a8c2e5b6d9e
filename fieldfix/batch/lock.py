"""The batch's hold on its output folder: one batch at a time, and the leftovers of killed runs.

* :class:`BatchLock`: a second batch into the same folder is refused with the holder's
  process id, host and start time; a lock whose holder no longer runs on this host is
  taken over, with a notice. The lock (``<out>/.fieldfix-batch.lock``) is made with an
  exclusive create (``os.link`` of a finished temporary file), so two batches starting
  together cannot both hold it; it is the one file of the folder made outside the ledger,
  and only its holder (or a batch taking over from a dead holder) removes it.
* :func:`clean_leftovers`: temporaries of dead processes (:func:`fieldfix.outdir.remove_leftovers`)
  and the staging folders (``.fieldfix-work/*``) of dead runs on this host; only files the
  ledger vouches for, temporaries of dead processes, and links the report adapter made are
  removed.
"""

from __future__ import annotations

import contextlib
import datetime
import json
import os
import re
import secrets
from dataclasses import dataclass
from pathlib import Path

from ..errors import FieldfixError, OutputError
from ..outdir import OutputFolder, host_label, process_alive, remove_leftovers, remove_output
from ..records import Record

__all__ = ["LOCK_NAME", "LockHolder", "BatchLock", "clear_folder",
           "clean_leftovers"]

LOCK_NAME = ".fieldfix-batch.lock"
#: Staging folder names: ``<task id, letters digits _ ->.<host>-<pid>.<random hex>`` (``-in``: the report's).
_STAGING = re.compile(r"^[A-Za-z0-9_-]+\.(?P<host>[A-Za-z0-9_.]+)-(?P<pid>\d+)\.[0-9a-f]+(?:-in)?$")


@dataclass(frozen=True)
class LockHolder(Record):
    """Who holds a batch lock."""

    pid: int
    host: str
    started: str
    command: str | None = None


class BatchLock:
    """Hold the output folder for one batch (a context manager).

    Parameters
    ----------
    folder : path
        The derivatives folder (created if missing).
    command : str, optional
        Recorded in the lock, for the message another batch shows.

    Raises
    ------
    OutputError
        When another batch holds the folder (naming its process, host and start time), or
        the lock cannot be read or made.
    """

    def __init__(self, folder: str | os.PathLike, command: str | None = None):
        self.folder = OutputFolder(folder)
        self.path = self.folder.root / LOCK_NAME
        self.folder.relative(self.path)  # inside the folder, also through links
        self.holder = LockHolder(pid=os.getpid(), host=host_label(),
                                 started=datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds"),
                                 command=command)
        self.notice: str | None = None

    def __enter__(self) -> "BatchLock":
        self.folder.root.mkdir(parents=True, exist_ok=True)
        for _ in range(3):
            if self._create():
                return self
            other = self._read()
            if other.host != host_label() or process_alive(other.pid):
                raise OutputError(f"another fieldfix batch is writing into this folder (process {other.pid} on "
                                  f"{other.host}, started {other.started}); wait for it to finish, or remove the "
                                  "lock if that batch no longer runs", self.path)
            self._take_over(other)
        raise OutputError("cannot take the batch lock (other batches keep starting)", self.path)

    def _create(self) -> bool:
        temporary = self.path.with_name(f".{LOCK_NAME}.{host_label()}-{os.getpid()}.{secrets.token_hex(4)}.part")
        try:
            temporary.write_text(json.dumps(self.holder.to_json()), encoding="utf-8")
            os.link(temporary, self.path)
            return True
        except FileExistsError:
            return False
        except OSError as err:
            raise OutputError(f"cannot make the batch lock ({err.strerror or err})", self.path) from None
        finally:
            with contextlib.suppress(OSError):
                temporary.unlink()

    def _read(self) -> LockHolder:
        try:
            return LockHolder.read(self.path)
        except FieldfixError as err:
            if not self.path.exists():  # released meanwhile
                return LockHolder(pid=os.getpid(), host="", started="")
            raise OutputError(f"the batch lock cannot be read ({err.message}); remove it if no batch runs",
                              self.path) from None

    def _take_over(self, other: LockHolder) -> None:
        if not other.host:
            return
        aside = self.path.with_name(f".{LOCK_NAME}.stale.{secrets.token_hex(4)}")
        with contextlib.suppress(FileNotFoundError):
            os.rename(self.path, aside)  # only one of several batches taking over succeeds
            aside.unlink()
            self.notice = (f"took over the batch lock of process {other.pid} on {other.host} (started "
                           f"{other.started}), which no longer runs")

    def __exit__(self, *exc) -> bool:
        with contextlib.suppress(FieldfixError, OSError):
            if LockHolder.read(self.path) == self.holder:
                self.path.unlink()
        return False


def clear_folder(folder: Path) -> list[str]:
    """Remove a staging folder: files fieldfix wrote, temporaries of dead processes, empty folders.

    Anything else (a file someone put there) stays, and so does its folder. Returns the
    paths left behind.
    """
    if not folder.is_dir() or folder.is_symlink():
        return []
    remove_leftovers(folder)
    left = []
    for directory, subfolders, files in os.walk(folder, topdown=False):
        for name in files:
            path = Path(directory) / name
            if not remove_output(path):
                left.append(str(path))
        for name in subfolders:
            with contextlib.suppress(OSError):
                (Path(directory) / name).rmdir()
    with contextlib.suppress(OSError):
        folder.rmdir()
    return left


def clean_leftovers(deriv: Path, work_folder: str) -> list[str]:
    """Delete what killed runs on this host left in the folder; returns the removed paths.

    Call inside the folder's :func:`fieldfix.outdir.output_folder` block (the ledger decides).
    """
    removed = remove_leftovers(deriv)
    work = deriv / work_folder
    if not work.is_dir() or work.is_symlink():
        return removed
    for entry in sorted(work.iterdir()):
        match = _STAGING.match(entry.name)
        if match is None or match["host"] != host_label() or process_alive(int(match["pid"])):
            continue
        if entry.name.endswith("-in") and entry.is_dir() and not entry.is_symlink():
            for link in entry.iterdir():  # the report adapter's links: removing one leaves its target
                if link.is_symlink():
                    link.unlink()
        if not clear_folder(entry):
            removed.append(entry.relative_to(deriv).as_posix() + "/")
    with contextlib.suppress(OSError):
        work.rmdir()
    return removed
