"""The options of ``grovekeeper tune``: one per job field, made from
``vocabulary/job_fields.py`` (name, help, default, bounds, choices), and the request body
they make."""

from __future__ import annotations

import argparse
import json
from collections.abc import Callable
from typing import Any

from vocabulary import DECLARED_KINDS
from vocabulary.job_fields import JOB_FIELDS, JobField, show


def _pair(text: str, *, last: bool = False) -> tuple[str, str]:
    key, sep, value = text.rpartition("=") if last else text.partition("=")
    if not sep or not key or not value:
        raise argparse.ArgumentTypeError(f"expected NAME=VALUE, got {text!r}")
    return key, value


def read_kind(text: str) -> tuple[str, str]:
    column, kind = _pair(text, last=True)
    if kind not in DECLARED_KINDS:
        raise argparse.ArgumentTypeError(f"kind must be one of {', '.join(DECLARED_KINDS)}, "
                                         f"got {kind!r}")
    return column, kind


def _direction(text: str) -> tuple[str, int]:
    column, value = _pair(text, last=True)
    if value not in ("1", "-1", "+1"):
        raise argparse.ArgumentTypeError(f"direction must be 1 or -1, got {value!r}")
    return column, int(value)


def _fixed(text: str) -> tuple[str, Any]:
    name, value = _pair(text)
    try:
        return name, json.loads(value)  # numbers, true/false, lists
    except ValueError:
        return name, value  # a bare word such as gbdt


def read_columns(text: str) -> list[str]:
    columns = [c.strip() for c in text.split(",") if c.strip()]
    if not columns:
        raise argparse.ArgumentTypeError("expected columns separated by commas")
    return columns


def _json_object(text: str) -> dict[str, Any]:
    try:
        value = json.loads(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a JSON object, got {text!r}") from None
    if not isinstance(value, dict):
        raise argparse.ArgumentTypeError(f"expected a JSON object, got {text!r}")
    return value


def _bounded(kind: type, spec: JobField) -> Callable[[str], Any]:
    """Numbers within the field's bounds (the server checks them again)."""
    def parse(text: str) -> Any:
        try:
            value = kind(text)
        except ValueError:
            word = "a whole number" if kind is int else "a number"
            raise argparse.ArgumentTypeError(f"expected {word}, got {text!r}") from None
        low, high = spec.minimum, spec.maximum
        if low is not None and (value <= low if spec.above_minimum else value < low):
            raise argparse.ArgumentTypeError(
                f"must be {'more than' if spec.above_minimum else 'at least'} {show(low)}, "
                f"got {text}")
        if high is not None and value > high:
            raise argparse.ArgumentTypeError(f"must be at most {show(high)}, got {text}")
        return value

    return parse


#: How the repeatable options of map and list fields read one value each.
_ITEM_PARSERS: dict[str, tuple[Callable[[str], Any], str]] = {
    "column_kinds": (read_kind, "COLUMN=KIND"),
    "monotone": (_direction, "COLUMN=1|-1"),
    "fixed": (_fixed, "PARAMETER=VALUE"),
    "interaction_constraints": (read_columns, "COL,COL,..."),
    "features": (str, "COLUMN"),
    "exclude": (str, "COLUMN"),
    "segments": (str, "COLUMN"),
}


def option_dest(spec: JobField) -> str:
    """The attribute of the parsed arguments that holds a job field."""
    return "job_" + spec.name.replace(".", "__")


def add_job_options(p: argparse.ArgumentParser) -> None:
    """One option per job field (vocabulary/job_fields.py), help and default from it."""
    for spec in JOB_FIELDS.values():
        if not spec.options:
            continue  # dataset_id: the positional argument
        shown = spec.shown_default
        text = f"{spec.description} ({shown if spec.required else 'default: ' + shown})"
        if spec.choices and spec.type == "string":
            text += f"; one of {', '.join(spec.choices)}"
        common: dict[str, Any] = {"dest": option_dest(spec)}
        if spec.required and "." not in spec.name:
            common["required"] = True
        metavar = spec.name.rpartition(".")[2].upper()
        if spec.type == "boolean":
            p.add_argument(*spec.options, action=argparse.BooleanOptionalAction, default=None,
                           help=text, **common)
        elif spec.name in _ITEM_PARSERS:
            parse, metavar = _ITEM_PARSERS[spec.name]
            if spec.name == "column_kinds":
                text += f"; kinds: {', '.join(DECLARED_KINDS)}"
            p.add_argument(*spec.options, action="append", type=parse, metavar=metavar,
                           help=f"{text} (repeatable)", **common)
        elif spec.type == "map":
            p.add_argument(*spec.options, type=_json_object, metavar="JSON", help=text,
                           **common)
        elif spec.type in ("integer", "number"):
            kind = int if spec.type == "integer" else float
            p.add_argument(*spec.options, type=_bounded(kind, spec), metavar=metavar,
                           help=text, **common)
        else:
            p.add_argument(*spec.options, choices=spec.choices, metavar=metavar, help=text,
                           **common)


def job_request(args: argparse.Namespace) -> dict[str, Any]:
    """The request body of ``tune``: the fields its options set, nothing else (the server
    fills the rest with the same defaults)."""
    body: dict[str, Any] = {"dataset_id": args.dataset_id}
    for spec in JOB_FIELDS.values():
        if not spec.options:
            continue
        value = getattr(args, option_dest(spec))
        if value is None:
            continue
        if spec.type == "map" and spec.name in _ITEM_PARSERS:
            value = dict(value)
        group, _, leaf = spec.name.rpartition(".")
        (body.setdefault(group, {}) if group else body)[leaf] = value
    return body
