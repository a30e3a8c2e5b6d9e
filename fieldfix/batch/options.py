"""Processing options given once for a whole dataset, on the command line or in a config file.

:class:`BatchOptions` holds the choices the single commands offer (phase units, smoothing,
unwrap method, interpolation, the dropout protocol, which masks are used). Each option
enters the parameters of the tasks it affects, so the provenance records it and changing
it redoes exactly those tasks (and the reports that show them).

A config file is JSON or TOML (by its extension) with these keys, quantities with their
units as in the command line::

    phase_units = "rad"          # rad, deg, counts4096, counts8192; default: detected
    smooth = "4mm"               # field-map smoothing (FWHM)
    unwrap = "quality"           # or "laplacian"
    interp = "cubic"             # or "linear", "sinc"
    align = true                 # align each field map to its runs (false: scanner coordinates only)
    motion = false               # follow head motion through each run (per-volume poses, motion tables)
    dropout_te = "30ms"          # default: each run's EchoTime
    dropout_thickness = "3mm"    # default: SliceThickness, else the voxel size across slices
    dropout_tilt = "0deg"
    masks = "fieldmap"           # "fieldmap": the field map's mask for statistics and dropout; "none"

Its path and the SHA-256 of its content are recorded in the batch summary and log.

Examples
--------
>>> BatchOptions(smooth_mm=2.0).fieldmap_params()["smooth_mm"]
2.0
"""

from __future__ import annotations

import dataclasses
import os
import tomllib
from dataclasses import dataclass
from pathlib import Path

from ..errors import FieldfixError, InputError, check_choice
from ..jsonfile import read_json
from ..outdir import sha256_file
from ..outputs import ConfigRecord
from ..phase import phase_units as lookup_phase_units
from ..units import parse_quantity
from ..unwarp import INTERPOLATIONS
from ..unwrap import METHODS

__all__ = ["BatchOptions", "read_batch_config", "merge_options", "MASK_CHOICES"]

#: Where the statistics and dropout masks come from.
MASK_CHOICES = ("fieldmap", "none")

#: Config-file keys -> (field, dimension of the quantity or None for text).
_CONFIG_KEYS = {
    "phase_units": ("phase_units", None), "smooth": ("smooth_mm", "length"), "unwrap": ("unwrap_method", None),
    "interp": ("interp", None), "dropout_te": ("dropout_te_s", "time"),
    "dropout_thickness": ("dropout_thickness_mm", "length"), "dropout_tilt": ("dropout_tilt_deg", "angle"),
    "masks": ("masks", None), "align": ("align_fieldmap", "bool"), "motion": ("motion", "bool"),
}


@dataclass(frozen=True)
class BatchOptions:
    """Processing options for every task of a batch (SI units; degrees for the tilt).

    Attributes
    ----------
    phase_units : str, optional
        Phase convention of every phase image; default: detected per image, and a
        sidecar ``Units`` that the values contradict is refused.
    smooth_mm : float
        Field-map smoothing, FWHM in mm.
    unwrap_method : {"quality", "laplacian"}
    interp : {"linear", "cubic", "sinc"}
        Interpolation of the unwarping.
    dropout_te_s, dropout_thickness_mm : float, optional
        Protocol of the dropout prediction; default: each run's own.
    dropout_tilt_deg : float
    masks : {"fieldmap", "none"}
        Use the field map's mask for the shift statistics and the dropout maps, or none.
    align_fieldmap : bool
        Align each field map's magnitude to each run before correcting it (see
        :class:`fieldfix.workflows.unwarp.UnwarpSettings`).
    motion : bool
        Follow head motion through each run (per-volume poses, one interpolation, motion tables).
    """

    phase_units: str | None = None
    smooth_mm: float = 4.0
    unwrap_method: str = "quality"
    interp: str = "cubic"
    dropout_te_s: float | None = None
    dropout_thickness_mm: float | None = None
    dropout_tilt_deg: float = 0.0
    masks: str = "fieldmap"
    align_fieldmap: bool = True
    motion: bool = False

    def check(self) -> None:
        """Refuse impossible values before anything is planned."""
        if self.phase_units is not None:
            lookup_phase_units(self.phase_units)
        check_choice("unwrap_method", self.unwrap_method, METHODS)
        check_choice("interp", self.interp, INTERPOLATIONS, "interpolation")
        check_choice("masks", self.masks, MASK_CHOICES, "mask choice")
        if not self.smooth_mm >= 0:
            raise InputError(f"smoothing width must be zero or positive, got {self.smooth_mm}", parameter="smooth_mm")
        for name in ("dropout_te_s", "dropout_thickness_mm"):
            value = getattr(self, name)
            if value is not None and not value > 0:
                raise InputError(f"must be positive, got {value}", parameter=name)

    def fieldmap_params(self) -> dict:
        return {"phase_units": self.phase_units, "smooth_mm": self.smooth_mm, "unwrap_method": self.unwrap_method}

    def unwarp_params(self) -> dict:
        return {"interp": self.interp, "masks": self.masks, "align_fieldmap": self.align_fieldmap,
                "motion": self.motion}

    def dropout_params(self) -> dict:
        return {"te_s_option": self.dropout_te_s, "thickness_mm_option": self.dropout_thickness_mm,
                "tilt_deg": self.dropout_tilt_deg, "masks": self.masks}

    def changed(self) -> dict:
        """The fields that differ from the defaults."""
        default = BatchOptions()
        return {f.name: getattr(self, f.name) for f in dataclasses.fields(self)
                if getattr(self, f.name) != getattr(default, f.name)}


def _config_values(path: Path) -> dict:
    if path.suffix.lower() == ".toml":
        try:
            data = tomllib.loads(path.read_bytes().decode("utf-8"))
        except (OSError, UnicodeDecodeError, tomllib.TOMLDecodeError) as err:
            raise InputError(f"not a readable TOML config ({err})", path) from None
        return data
    if path.suffix.lower() == ".json":
        return read_json(path, what="JSON object (a batch config)")
    raise InputError("a batch config must be a .json or .toml file", path)


def read_batch_config(path: str | os.PathLike) -> tuple[BatchOptions, ConfigRecord]:
    """Read a batch config file (JSON or TOML) into options and a record of the file.

    Raises
    ------
    InputError
        For a missing or unreadable file, an unknown key, or a value without its unit;
        the message names the file and the key.
    """
    path = Path(path)
    if not path.is_file():
        raise InputError("config file not found", path)
    values = _config_values(path)
    changes = {}
    for key, value in values.items():
        if key not in _CONFIG_KEYS:
            raise InputError(f"unknown key {key!r} in the batch config; known keys: {', '.join(_CONFIG_KEYS)}", path)
        name, dimension = _CONFIG_KEYS[key]
        if dimension == "bool":
            if not isinstance(value, bool):
                raise InputError(f"{key}: must be true or false, got {value!r}", path)
            changes[name] = value
            continue
        try:
            changes[name] = parse_quantity(value, dimension) if dimension else (None if value is None else str(value))
        except FieldfixError as err:
            raise InputError(f"{key}: {err.message}", path) from None
    options = BatchOptions(**changes)
    try:
        options.check()
    except FieldfixError as err:
        raise InputError(err.message if err.parameter is None else f"{err.parameter}: {err.message}", path) from None
    return options, ConfigRecord(path=str(path.resolve()), sha256=sha256_file(path), values=options.changed())


def merge_options(options: BatchOptions | None, config: str | os.PathLike | None
                  ) -> tuple[BatchOptions, ConfigRecord | None]:
    """The options of a batch: the config file's, then every field of `options` that differs from
    the defaults on top (the command line wins over the file)."""
    base, record = read_batch_config(config) if config is not None else (BatchOptions(), None)
    merged = dataclasses.replace(base, **(options.changed() if options is not None else {}))
    merged.check()
    return merged, record
