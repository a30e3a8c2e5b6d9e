"""How much memory a job may count on, and the refusal of images too large for it.

fieldfix refuses an image before reading it when its working size -- the voxels it would
hold at once, as single-precision floats (4 bytes each) -- times :data:`WORKING_COPIES`
exceeds the memory available to the process. The jobs keep several arrays the size of
an image (the field, shifts, Jacobian, resampling tables, temporaries), so eight
single-precision copies is the budget each image is given (common practice, no source:
a rule of thumb measured on fieldfix's own jobs, whose peaks stay below it).

The available memory is the smallest of

* ``MemAvailable`` of ``/proc/meminfo`` (Linux),
* the room left under the process's address-space limit (``RLIMIT_AS`` minus ``VmSize``),
* the room left under the memory limit of its control group (cgroup v2 ``memory.max``),

or the value of the environment variable :data:`MEMORY_ENV` (for example ``6G``, ``800M`` or
a number of bytes) when it is set. Where none is known, nothing is refused on this ground.

A compressed image read whole is also refused when its data would inflate more than
:data:`MAX_INFLATION` times its file size to more than :data:`INFLATION_FLOOR_BYTES` of float32:
real scans compress a few times, not a thousand (common practice, no source), so such a file is
almost surely a decompression bomb, and on a large machine the budget above would let it
through. Setting :data:`MEMORY_ENV` lifts this rule (the user then answers for the memory).

Examples
--------
>>> budget = MemoryBudget(available_bytes=8 * 2 ** 30, source="example")
>>> budget.fits(100 * 2 ** 20)   # 100 MiB of float32 voxels: 800 MiB of the 8 GiB
True
"""

from __future__ import annotations

import math
import os
import re
import resource
from dataclasses import dataclass
from pathlib import Path

from .errors import InputError, MemoryLimitError

__all__ = ["MEMORY_ENV", "WORKING_COPIES", "MAX_INFLATION", "INFLATION_FLOOR_BYTES", "MemoryBudget", "memory_budget",
           "check_image_memory", "check_inflation", "format_bytes"]

#: Environment variable giving the memory fieldfix may count on (bytes, or with K, M, G, T: powers of 1024).
MEMORY_ENV = "FIELDFIX_MEMORY_LIMIT"
#: Single-precision copies of an image a job is assumed to hold at once.
WORKING_COPIES = 8
#: Largest ratio of declared data bytes to file bytes accepted for a large image read whole.
MAX_INFLATION = 100
#: Working size (float32 bytes) below which the inflation rule does not apply.
INFLATION_FLOOR_BYTES = 256 * 2 ** 20
_UNITS = {"": 1, "K": 2 ** 10, "M": 2 ** 20, "G": 2 ** 30, "T": 2 ** 40}


@dataclass(frozen=True)
class MemoryBudget:
    """The memory available to the process (None when unknown) and where the figure came from."""

    available_bytes: int | None
    source: str

    def fits(self, working_bytes: int) -> bool:
        """True when `working_bytes` of float32 voxels, times :data:`WORKING_COPIES`, fit."""
        return self.available_bytes is None or working_bytes * WORKING_COPIES <= self.available_bytes


def format_bytes(n: float) -> str:
    """``1610612736`` -> ``'1.5 GiB'``."""
    for unit, size in (("TiB", 2 ** 40), ("GiB", 2 ** 30), ("MiB", 2 ** 20), ("KiB", 2 ** 10)):
        if n >= size:
            return f"{n / size:.3g} {unit}"
    return f"{int(n)} bytes"


def _parse_size(text: str) -> int:
    match = re.fullmatch(r"\s*(\d+(?:\.\d+)?)\s*([KMGT]?)i?B?\s*", text, flags=re.IGNORECASE)
    if not match:
        raise InputError(f"{MEMORY_ENV}={text!r} is not a memory size (for example 6G, 800M or a number of bytes)")
    return int(float(match.group(1)) * _UNITS[match.group(2).upper()])


def _meminfo_available() -> int | None:
    try:
        text = Path("/proc/meminfo").read_text()
    except OSError:
        return None
    match = re.search(r"^MemAvailable:\s+(\d+)\s+kB", text, flags=re.MULTILINE)
    return int(match.group(1)) * 1024 if match else None


def _address_space_room() -> int | None:
    soft, _ = resource.getrlimit(resource.RLIMIT_AS)
    if soft == resource.RLIM_INFINITY:
        return None
    try:
        match = re.search(r"^VmSize:\s+(\d+)\s+kB", Path("/proc/self/status").read_text(), flags=re.MULTILINE)
    except OSError:
        match = None
    used = int(match.group(1)) * 1024 if match else 0
    return max(soft - used, 0)


def _cgroup_room() -> int | None:
    try:
        lines = Path("/proc/self/cgroup").read_text().splitlines()
        group = next(line.split("::", 1)[1] for line in lines if line.startswith("0::"))
        folder = Path("/sys/fs/cgroup") / group.lstrip("/")
        limit = (folder / "memory.max").read_text().strip()
        if limit == "max":
            return None
        return max(int(limit) - int((folder / "memory.current").read_text()), 0)
    except (OSError, StopIteration, ValueError):
        return None


def memory_budget() -> MemoryBudget:
    """The memory the process may count on now (see the module text)."""
    given = os.environ.get(MEMORY_ENV)
    if given:
        return MemoryBudget(_parse_size(given), f"{MEMORY_ENV}={given}")
    known = [(room, what) for room, what in ((_meminfo_available(), "MemAvailable"),
                                            (_address_space_room(), "the process's address-space limit"),
                                            (_cgroup_room(), "the control group's memory limit"))
             if room is not None]
    if not known:
        return MemoryBudget(None, "unknown")
    room, what = min(known)
    return MemoryBudget(room, what)


def check_image_memory(path, shape, what: str = "image") -> None:
    """Refuse an image whose float32 working size does not fit the memory budget (before reading it).

    Raises
    ------
    MemoryLimitError
        Naming the file, the working size and the memory available.
    """
    working = math.prod(int(n) for n in shape) * 4
    budget = memory_budget()
    if budget.fits(working):
        return
    raise MemoryLimitError(
        f"the {what} is too large for the memory available: {tuple(int(n) for n in shape)} voxels are "
        f"{format_bytes(working)} as float32, and a job needs about {WORKING_COPIES} such copies "
        f"({format_bytes(working * WORKING_COPIES)}) but {format_bytes(budget.available_bytes)} is available "
        f"({budget.source}); it was not read (set {MEMORY_ENV} if more memory is really free)", path)


def check_inflation(path, shape, stored_bytes: int, file_bytes: int) -> None:
    """Refuse a large image whose declared data inflate over :data:`MAX_INFLATION` times its file size.

    Raises
    ------
    MemoryLimitError
        Naming the file, the declared size and the file size (not when :data:`MEMORY_ENV` is set).
    """
    working = math.prod(int(n) for n in shape) * 4
    if os.environ.get(MEMORY_ENV) or working <= INFLATION_FLOOR_BYTES or stored_bytes <= MAX_INFLATION * file_bytes:
        return
    raise MemoryLimitError(
        f"the file's {format_bytes(file_bytes)} would inflate to {format_bytes(stored_bytes)} of data "
        f"({stored_bytes / max(file_bytes, 1):.0f} times; real images compress a few times), which looks like a "
        f"decompression bomb; it was not read (set {MEMORY_ENV} to read it anyway)", path)
