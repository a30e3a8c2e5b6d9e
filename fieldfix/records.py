"""Typed records that travel between layers and through JSON files.

:class:`Record` is the base of every summary and file list fieldfix writes and reads back:
a frozen dataclass with :meth:`Record.to_json` and a strict :meth:`Record.from_json`. The
reader checks every key against the dataclass fields and every value against the field's
type: an unknown key, a missing one or a value of the wrong type is a
:class:`SummaryError` naming the file and the key. A writer and a reader therefore cannot
drift apart silently: renaming a field renames it for both, and a JSON file that does not
match is refused, never half-read.

Supported field types: ``str``, ``int``, ``float`` (an int is accepted), ``bool``, ``None``
in unions (``float | None``), ``list[T]``, ``tuple[T, ...]`` (read as a tuple),
``dict[str, T]``, nested :class:`Record` subclasses, and ``object`` for a free-form JSON
value (a table's rows, a provenance record).

Examples
--------
>>> from dataclasses import dataclass
>>> @dataclass(frozen=True)
... class Point(Record):
...     x_mm: float
...     label: str | None = None
>>> Point.from_json({"x_mm": 2}).x_mm
2.0
>>> Point.from_json({"x_mm": 2, "y_mm": 3})  # doctest: +IGNORE_EXCEPTION_DETAIL
Traceback (most recent call last):
fieldfix.records.SummaryError: unexpected key 'y_mm' in Point
"""

from __future__ import annotations

import dataclasses
import os
import types
import typing
from pathlib import Path
from typing import Any, ClassVar

from .errors import InputError
from .jsonfile import to_jsonable

__all__ = ["Record", "SummaryError", "fields_of"]


class SummaryError(InputError):
    """A JSON record does not match the typed record it should hold."""


def _type_name(tp) -> str:
    return getattr(tp, "__name__", None) or str(tp).replace("typing.", "")


def _convert(value, tp, where: str):
    """Check `value` against the annotation `tp`; return it as the field should hold it."""
    origin = typing.get_origin(tp)
    if origin in (typing.Union, types.UnionType):
        options = typing.get_args(tp)
        if value is None and type(None) in options:
            return None
        errors = []
        for option in options:
            if option is type(None):
                continue
            try:
                return _convert(value, option, where)
            except SummaryError as err:
                errors.append(err)
        raise errors[0] if errors else SummaryError(f"{where} must not be null")
    if tp is Any or tp is object:  # any JSON value (tables and free-form provenance)
        return value
    if isinstance(tp, type) and issubclass(tp, Record):
        if isinstance(value, tp):
            return value
        if not isinstance(value, dict):
            raise SummaryError(f"{where} must be an object ({tp.__name__})")
        return tp._from_mapping(value, where)
    if origin in (list, tuple):
        if not isinstance(value, (list, tuple)):
            raise SummaryError(f"{where} must be a list")
        args = typing.get_args(tp)
        item = args[0] if args else Any
        items = [_convert(v, item, f"{where}[{i}]") for i, v in enumerate(value)]
        return tuple(items) if origin is tuple else items
    if origin is dict:
        if not isinstance(value, dict):
            raise SummaryError(f"{where} must be an object")
        args = typing.get_args(tp)
        item = args[1] if len(args) == 2 else Any
        return {str(k): _convert(v, item, f"{where}.{k}") for k, v in value.items()}
    if tp is float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise SummaryError(f"{where} must be a number, found {type(value).__name__}")
        return float(value)
    if tp is int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise SummaryError(f"{where} must be a whole number, found {type(value).__name__}")
        return value
    if tp is bool:
        if not isinstance(value, bool):
            raise SummaryError(f"{where} must be true or false")
        return value
    if tp is str:
        if not isinstance(value, str):
            raise SummaryError(f"{where} must be text, found {type(value).__name__}")
        return value
    raise TypeError(f"unsupported field type {_type_name(tp)} at {where}")


def fields_of(record, part: type) -> dict:
    """The values of `record` for the fields of the dataclass `part` (one of its bases), by name.

    A report entry that extends a job summary's numbers (:class:`fieldfix.outputs.ShiftNumbers`,
    ...) is built from them with this, so no field is copied by hand.

    Examples
    --------
    >>> from fieldfix.outputs import MapStatistics
    >>> fields_of(MapStatistics(median=0.8, percent_below_threshold=12.5, voxels=400), MapStatistics)
    {'median': 0.8, 'percent_below_threshold': 12.5, 'voxels': 400}
    """
    if not isinstance(record, part):
        raise TypeError(f"{type(record).__name__} is not a {part.__name__}")
    return {f.name: getattr(record, f.name) for f in dataclasses.fields(part)}


@dataclasses.dataclass(frozen=True)
class Record:
    """Base of typed records; subclasses are frozen dataclasses.

    A subclass that sets ``KIND`` is a top-level record: its JSON carries ``"kind"`` and
    ``"format"`` keys, checked on reading.
    """

    KIND: ClassVar[str | None] = None
    FORMAT: ClassVar[int] = 1

    def to_json(self) -> dict:
        """The record as plain JSON values (nested records included)."""
        data = {f.name: to_jsonable(getattr(self, f.name)) for f in dataclasses.fields(self)}
        if self.KIND is not None:
            data = {"kind": self.KIND, "format": self.FORMAT, **data}
        return data

    @classmethod
    def _hints(cls) -> dict:
        cached = cls.__dict__.get("_hints_cache")
        if cached is None:
            cached = typing.get_type_hints(cls)
            setattr(cls, "_hints_cache", cached)
        return cached

    @classmethod
    def _from_mapping(cls, data: dict, where: str):
        hints = cls._hints()
        names = {f.name: f for f in dataclasses.fields(cls)}
        data = dict(data)
        if cls.KIND is not None:
            kind, fmt = data.pop("kind", None), data.pop("format", None)
            if kind != cls.KIND:
                raise SummaryError(f"{where} is a {kind!r} record, not {cls.KIND!r}")
            if fmt != cls.FORMAT:
                raise SummaryError(f"{where} has format {fmt!r}; this fieldfix reads format {cls.FORMAT}")
        unknown = sorted(set(data) - set(names))
        if unknown:
            raise SummaryError(f"unexpected key {unknown[0]!r} in {where}")
        values = {}
        for name, field in names.items():
            if name in data:
                values[name] = _convert(data[name], hints[name], f"{where}.{name}")
            elif field.default is dataclasses.MISSING and field.default_factory is dataclasses.MISSING:
                raise SummaryError(f"missing key {name!r} in {where}")
        return cls(**values)

    @classmethod
    def from_json(cls, data: dict, path: str | os.PathLike | None = None):
        """Read a record from JSON values, strictly (see the module docstring).

        Raises
        ------
        SummaryError
            Naming `path` (when given) and the offending key.
        """
        try:
            return cls._from_mapping(data, cls.__name__)
        except SummaryError as err:
            raise SummaryError(err.message, path) from None

    @classmethod
    def read(cls, path: str | os.PathLike):
        """Read the record from a JSON file (through :func:`fieldfix.jsonfile.read_json`)."""
        from .jsonfile import read_json

        return cls.from_json(read_json(path), Path(path))
