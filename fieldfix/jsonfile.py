"""JSON files: one reader with limits, one atomic writer, one converter of numpy values.

Every JSON file fieldfix reads (BIDS sidecars, its own summaries, batch markers, scenario
definitions) goes through :func:`read_json`, which refuses with a one-line
:class:`~fieldfix.errors.InputError` naming the file:

* a file larger than :data:`MAX_JSON_BYTES`;
* bytes that are not strict UTF-8;
* duplicate keys in an object (JSON parsers disagree on which one wins, so a sidecar with
  two ``PhaseEncodingDirection`` entries is ambiguous, not "the last one");
* ``NaN`` / ``Infinity`` literals (not JSON);
* nesting deeper than :data:`MAX_JSON_DEPTH` levels;
* anything but an object at the top level.

:func:`write_json` writes through :func:`fieldfix.outdir.atomic_output` (so the file joins
the output transaction and the folder's ledger); :func:`to_jsonable` turns numpy scalars and
arrays, paths and non-finite floats (as ``null``) into plain JSON values.

Examples
--------
>>> import tempfile, os
>>> path = os.path.join(tempfile.mkdtemp(), "x.json")
>>> _ = open(path, "w").write('{"EchoTime": 0.03, "EchoTime": 0.05}')
>>> read_json(path)  # doctest: +IGNORE_EXCEPTION_DETAIL
Traceback (most recent call last):
fieldfix.errors.InputError: ...: duplicate key 'EchoTime' in a JSON object; which one is meant is ambiguous
"""

from __future__ import annotations

import json
import math
import os
from pathlib import Path
from typing import Any, Iterable

import numpy as np

from .errors import InputError

__all__ = ["read_json", "write_json", "to_jsonable", "MAX_JSON_BYTES", "MAX_JSON_DEPTH"]

#: Largest JSON file read (bytes): sidecars and summaries are kilobytes.
MAX_JSON_BYTES = 32 * 1024 * 1024
#: Deepest nesting of objects and arrays accepted.
MAX_JSON_DEPTH = 64


def _no_duplicates(pairs):
    result = {}
    for key, value in pairs:
        if key in result:
            raise _Refused(f"duplicate key {key!r} in a JSON object; which one is meant is ambiguous")
        result[key] = value
    return result


class _Refused(ValueError):
    pass


def _no_constant(name):
    raise _Refused(f"{name} is not a JSON value (write null, or a number)")


def _depth(value) -> int:
    deepest, stack = 0, [(value, 1)]
    while stack:
        item, depth = stack.pop()
        if isinstance(item, (dict, list)):
            deepest = max(deepest, depth)
            if deepest > MAX_JSON_DEPTH:
                return deepest
            children = item.values() if isinstance(item, dict) else item
            stack.extend((child, depth + 1) for child in children)
    return deepest


def read_json(path: str | os.PathLike, *, what: str = "JSON object") -> dict:
    """Read a JSON object from a file, strictly; errors name the file.

    Parameters
    ----------
    path : path
    what : str
        What the file should hold, for the message when the top level is not an object.

    Raises
    ------
    InputError
        For a missing, unreadable, oversized, non-UTF-8, ambiguous (duplicate keys), too
        deeply nested or invalid file.
    """
    path = Path(path)
    try:
        size = path.stat().st_size
        if size > MAX_JSON_BYTES:
            raise InputError(f"JSON file of {size} bytes is larger than the {MAX_JSON_BYTES} bytes accepted", path)
        raw = path.read_bytes()
    except FileNotFoundError:
        raise InputError("file not found", path) from None
    except IsADirectoryError:
        raise InputError("is a folder, not a JSON file", path) from None
    except OSError as err:
        raise InputError(f"cannot read ({err.strerror or err})", path) from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as err:
        raise InputError(f"not valid UTF-8 (byte {err.start} of the file); JSON files must be UTF-8", path) from None
    try:
        value = json.loads(text, object_pairs_hook=_no_duplicates, parse_constant=_no_constant)
    except _Refused as err:
        raise InputError(str(err), path) from None
    except json.JSONDecodeError as err:
        raise InputError(f"not valid JSON ({err.msg} at line {err.lineno})", path) from None
    except RecursionError:
        raise InputError(f"JSON nested too deeply (more than {MAX_JSON_DEPTH} levels)", path) from None
    if _depth(value) > MAX_JSON_DEPTH:
        raise InputError(f"JSON nested too deeply (more than {MAX_JSON_DEPTH} levels)", path)
    if not isinstance(value, dict):
        raise InputError(f"expected a {what} at the top level, found a JSON {type(value).__name__}", path)
    return value


def to_jsonable(value: Any) -> Any:
    """Plain JSON values: numpy scalars and arrays as numbers and lists, paths as text,
    tuples as lists, non-finite floats as None, typed records (anything with a ``to_json``
    method) as their JSON.

    Examples
    --------
    >>> to_jsonable({"a": np.float32(2.5), "b": float("nan"), "c": np.arange(2)})
    {'a': 2.5, 'b': None, 'c': [0, 1]}
    """
    if callable(getattr(value, "to_json", None)) and not isinstance(value, type):
        return value.to_json()
    if isinstance(value, dict):
        return {str(k): to_jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [to_jsonable(v) for v in value]
    if isinstance(value, os.PathLike):
        return os.fspath(value)
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, np.ndarray):
        return to_jsonable(value.tolist())
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def json_text(obj: Any) -> str:
    """The text fieldfix writes for a JSON value: indented, numpy converted, a final newline."""
    return json.dumps(to_jsonable(obj), indent=2, sort_keys=False, ensure_ascii=False) + "\n"


def write_json(path: str | os.PathLike, obj: dict, *, inputs: Iterable = (), overwrite: bool = False) -> Path:
    """Write a JSON object atomically (numpy values converted, non-finite floats as null).

    The file is checked with :func:`fieldfix.outdir.output_paths_guard`, joins an active
    output transaction and is recorded in its folder's ledger.
    """
    from .outdir import atomic_output

    path = Path(path)
    text = json_text(obj)
    with atomic_output(path, inputs, overwrite) as temporary:
        temporary.write_text(text, encoding="utf-8")
    return path
