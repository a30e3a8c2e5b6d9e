"""The B0 map option and the modelled-field options shared by ``plan`` and ``dropout``.

Without ``--b0`` the field is modelled (:mod:`fieldfix.plan_field`): the built-in head, or a label
image with a susceptibility table, at a field strength and head pitch. With ``--b0`` the options
that only shape the model are refused (one line, exit status 2).
"""

from __future__ import annotations

import argparse

#: Library parameters of the model -> the options that set them (for error messages).
MODEL_FLAGS = {"field_strength_t": "--field-strength", "pitch_deg": "--pitch", "table_ppm": "--model-table",
               "brain_labels": "--model-brain"}
#: The options that only shape the modelled field (refused with --b0), as argparse destinations.
_MODEL_ONLY = ("pitch", "model_labels", "model_table", "model_brain")


def add_field_options(parser: argparse.ArgumentParser, *, field_strength_help: str) -> None:
    """``--b0`` and, in their own group, the options of the field modelled without it."""
    parser.add_argument("--b0", default=None, metavar="B0_HZ",
                        help="B0 map in Hz (3D NIfTI); without it the field is modelled (see 'modelled field' "
                             "below) and the outputs say 'modelled'")
    group = parser.add_argument_group("modelled field (without --b0)")
    group.add_argument("--field-strength", metavar="FIELD", default=None,
                       help=f"main field, e.g. 7T: {field_strength_help}")
    group.add_argument("--pitch", metavar="ANGLE", default=None,
                       help="head pitch of the modelled field, e.g. 10deg (positive: chin towards the chest; "
                            "default 0deg)")
    group.add_argument("--model-labels", metavar="LABELS", default=None,
                       help="a label image whose field is modelled instead of the built-in head")
    group.add_argument("--model-table", metavar="TABLE", default=None,
                       help="susceptibility of each label in ppm, e.g. 0=0.36,1=-9.05,4=-9.04 (with --model-labels)")
    group.add_argument("--model-brain", metavar="VALUES", default=None,
                       help="labels of --model-labels that are brain (the shim region and brain mask), e.g. 4")


def whole_numbers(text: str, flag: str) -> list[int]:
    """'11,12' -> [11, 12], refusing anything else with the option's name."""
    from fieldfix.errors import InputError

    try:
        return [int(v) for v in text.split(",") if v.strip()]
    except ValueError:
        raise InputError(f"{flag}: cannot read {text!r} as whole numbers, e.g. 11,12") from None


def field_strength_t(args, default: float | None = 3.0) -> float | None:
    """The --field-strength in T, else `default`."""
    from fieldfix.units import parse_checked

    return parse_checked(args.field_strength, "field_strength_t") if args.field_strength else default


def _label_model(args) -> dict:
    """The label-image fields of the modelled field (empty without --model-labels)."""
    from fieldfix.errors import InputError

    if args.model_labels is None:
        stray = [flag for flag, value in (("--model-table", args.model_table), ("--model-brain", args.model_brain))
                 if value is not None]
        if stray:
            raise InputError(f"{', '.join(stray)}: describes the label image of --model-labels, which is missing")
        return {}
    if not args.model_table or not args.model_brain:
        raise InputError("--model-labels needs --model-table and --model-brain")
    try:
        table = tuple((int(k), float(v)) for k, v in (item.split("=") for item in args.model_table.split(",")))
    except ValueError:
        raise InputError(f"--model-table: cannot read {args.model_table!r}; write label=ppm pairs, e.g. "
                         "0=0.36,4=-9.04") from None
    return {"labels_path": args.model_labels, "table_ppm": table,
            "brain_labels": tuple(whole_numbers(args.model_brain, "--model-brain"))}


def modelled_field_of(args):
    """How to model the field (a :class:`fieldfix.plan_field.ModelledField`), or None with --b0.

    Raises
    ------
    InputError
        For model options given with --b0, or an incomplete or unreadable label model.
    """
    from fieldfix.errors import InputError
    from fieldfix.plan_field import ModelledField
    from fieldfix.units import parse_checked

    if args.b0 is not None:
        given = [f"--{name.replace('_', '-')}" for name in _MODEL_ONLY if getattr(args, name) is not None]
        if given:
            raise InputError(f"{', '.join(given)}: for a modelled field, used only without --b0; give the B0 map "
                             "or the model, not both")
        return None
    pitch_deg = parse_checked(args.pitch, "tilt_deg", "pitch_deg") if args.pitch is not None else 0.0
    return ModelledField(field_strength_t=field_strength_t(args), pitch_deg=pitch_deg, **_label_model(args))
