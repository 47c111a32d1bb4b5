"""The table of training options: each option is declared once, as a field of
:class:`predictor.training.TrainOptions`, with its allowed values (a ``Literal`` alias from
here), its command-line flag and its help.  The ``predictor train`` parser, the run-time check
and the workflow are derived from that table, so an option cannot drift between them.
"""

from __future__ import annotations

import argparse
import dataclasses
import typing
from typing import Any, Literal

DesignName = Literal["matched", "nndm", "blocks", "buffered", "random"]
Declustering = Literal["cell", "nearest_node", "none"]
WellTiesRule = Literal["auto", "always", "never"]
IntervalSpread = Literal["none", "features", "kriging"]
SampleMethod = Literal["bilinear", "nearest"]
MapRule = Literal["most-probable", "balanced", "proportions"]


def allowed(alias) -> tuple[str, ...]:
    """The values a ``Literal`` alias allows, in the order written."""
    return typing.get_args(alias)


def monotone_pair(text: str) -> tuple[str, int]:
    """``ATTR:-1`` or ``ATTR:1`` (the --monotone option) as (attribute, direction)."""
    name, _, direction = text.rpartition(":")
    if not name or direction not in ("-1", "1", "+1"):
        raise argparse.ArgumentTypeError(
            f"{text!r}: give an attribute and a direction, e.g. impedance:-1 "
            "(non-increasing) or impedance:1 (non-decreasing)"
        )
    return name, int(direction)


def option(default, flag: str | None, help: str, **argparse_keywords):
    """A dataclass field that is also a command-line option (``flag`` None: Python only).

    ``argparse_keywords`` go to ``add_argument`` as they are (``type``, ``action``, ``metavar``);
    choices come from the field's ``Literal`` type, so they are never written twice.
    """
    metadata = {"flag": flag, "help": help, "argparse": argparse_keywords}
    if default is dataclasses.MISSING:  # a required option
        return dataclasses.field(metadata=metadata)
    if isinstance(default, list | dict):
        return dataclasses.field(default_factory=lambda: type(default)(default), metadata=metadata)
    return dataclasses.field(default=default, metadata=metadata)


def _choices(cls, name: str) -> tuple[str, ...] | None:
    hint = typing.get_type_hints(cls)[name]
    if typing.get_origin(hint) is Literal:
        return typing.get_args(hint)
    return None


def command_line_options(cls) -> list[dataclasses.Field]:
    return [f for f in dataclasses.fields(cls) if f.metadata.get("flag")]


def add_arguments(parser: argparse.ArgumentParser, cls) -> None:
    """One ``add_argument`` per option of ``cls`` that has a flag, stored under the field's name."""
    for f in command_line_options(cls):
        keywords = dict(f.metadata["argparse"])
        choices = _choices(cls, f.name)
        default = f.default if f.default is not dataclasses.MISSING else None
        if choices:
            keywords["choices"] = list(choices)
        if isinstance(default, bool):
            keywords.setdefault("action", "store_true")
        elif "type" not in keywords and default is not None and "action" not in keywords:
            keywords["type"] = type(default)
        if "choices" not in keywords and keywords.get("action") != "store_true":
            keywords.setdefault("metavar", f.metadata["flag"].lstrip("-").upper().replace("-", "_"))
        text = f.metadata["help"]
        if default is not None and not isinstance(default, bool) and "default" not in text:
            text += f" (default {default})"
        parser.add_argument(f.metadata["flag"], dest=f.name, default=default, help=text, **keywords)


def from_arguments(args: argparse.Namespace, cls) -> dict:
    """The options of ``cls`` given on the command line, by field name."""
    return {f.name: getattr(args, f.name) for f in command_line_options(cls)}


def check_choices(obj: Any) -> None:
    """Every ``Literal``-typed option of a dataclass holds one of its allowed values."""
    from .errors import InputError

    for f in dataclasses.fields(obj):
        choices = _choices(type(obj), f.name)
        value = getattr(obj, f.name)
        if choices and value not in choices:
            flag = f.metadata.get("flag")
            where = f"{flag} / {f.name}" if flag else f.name
            raise InputError(
                f"{where} = {value!r} is not known; choose one of {', '.join(choices)}"
            )
