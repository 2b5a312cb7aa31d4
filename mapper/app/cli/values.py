"""Converting the command line's plain option values without loading a validation library.

Recent typer converts every value through a pydantic adapter it builds per parameter; loading
pydantic and building the adapters is about a third of the start-up of a quick command such
as ``mapper params``. The options mapper declares are simple: text, flags, whole and decimal
numbers (some with bounds), paths and choices, alone or as lists and pairs. :func:`install`
gives such a parameter a converter that handles the ordinary spellings of those values itself
(``12``, ``-0.5``, ``1e3``, ``up``, a file name) and hands anything else, including every
value it cannot convert or that is out of bounds, to typer's own conversion, so an unusual
spelling is read as typer reads it and a wrong value gets typer's message. With a typer that
has no such adapters there is nothing to install.
"""

from __future__ import annotations

import re
from enum import Enum
from pathlib import Path
from typing import Any, get_args, get_origin

try:  # typer >= 0.2x: conversion through pydantic adapters, built on a parameter's first value
    from typer._coercion import RuntimeParam, build_runtime_param
    from typer._param_types import coerce_cli_choice, coerce_cli_path
except ImportError:  # an older typer converts through click's own types: nothing to bypass
    RuntimeParam = None  # type: ignore[assignment,misc]

__all__ = ["install", "quick", "QUICK_ANNOTATIONS"]

QUICK_ANNOTATIONS = (str, bool, int, float, Path)  # and Enum subclasses (choices)

_WHOLE = re.compile(r"[+-]?[0-9]+")
_DECIMAL = re.compile(r"[+-]?(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][+-]?[0-9]+)?")
_UNSURE = object()


def _simple(annotation: Any) -> bool:
    return annotation in QUICK_ANNOTATIONS or (isinstance(annotation, type) and issubclass(annotation, Enum))


def _items(annotation: Any, value: Any) -> tuple | None:
    """The annotation of each item of a list or tuple value (None: not such a value)."""
    origin, kinds = get_origin(annotation), get_args(annotation)
    if not isinstance(value, (list, tuple)):
        return None
    if origin is list and len(kinds) == 1:
        return kinds * len(value)
    if origin is tuple and len(kinds) == len(value) and Ellipsis not in kinds:
        return kinds
    return None


def _quick_value(annotation: Any, info: Any, value: Any, param: Any, ctx: Any) -> Any:
    """``value`` converted for ``annotation``, or ``_UNSURE`` to leave it to typer."""
    if get_origin(annotation) in (list, tuple):  # several values: each converted, or all left to typer
        kinds = _items(annotation, value)
        if kinds is None:
            return _UNSURE
        items = [_quick_value(kind, info, item, param, ctx) for kind, item in zip(kinds, value)]
        if any(item is _UNSURE for item in items):
            return _UNSURE
        return items if get_origin(annotation) is list else tuple(items)
    if annotation is str or annotation is bool:
        return value if type(value) is annotation else _UNSURE
    if annotation is int or annotation is float:
        pattern = _WHOLE if annotation is int else _DECIMAL
        if type(value) is annotation:
            number = value
        elif type(value) is str and pattern.fullmatch(value):
            number = annotation(value)
        else:
            return _UNSURE
        inside = ((info.min is None or number >= info.min) and (info.max is None or number <= info.max))
        return number if inside else _UNSURE  # out of bounds: typer's message
    if annotation is Path:
        if isinstance(value, str) and value:
            value = Path(value)
        if not isinstance(value, Path):
            return _UNSURE
        return coerce_cli_path(value, info, path_type=Path, param=param, ctx=ctx)  # typer's checks
    if isinstance(annotation, type) and issubclass(annotation, Enum):
        try:
            return coerce_cli_choice(value, choices=tuple(annotation), case_sensitive=info.case_sensitive,
                                     ctx=ctx)
        except ValueError:
            return _UNSURE
    return _UNSURE


if RuntimeParam is not None:
    class _QuickParam(RuntimeParam):
        """Typer's runtime conversion of one parameter, with the plain values converted here."""

        def _coerce_value(self, value: Any, param: Any, ctx: Any) -> Any:
            converted = _quick_value(self.annotation, self.parameter_info, value, param, ctx)
            if converted is not _UNSURE:
                return converted
            return build_runtime_param(param.type_descriptor)._coerce_value(value, param=param, ctx=ctx)


def quick(param: Any) -> bool:
    """True when ``param`` (a typer parameter) is one :func:`install` converts itself."""
    descriptor = getattr(param, "type_descriptor", None)
    if RuntimeParam is None or descriptor is None or not hasattr(param, "_runtime_param"):
        return False
    info, annotation = descriptor.parameter_info, descriptor.annotation
    origin, kinds = get_origin(annotation), get_args(annotation)
    if origin is list and len(kinds) == 1 and _simple(kinds[0]):
        shape = param.nargs == -1  # an argument taking any number of values
    elif origin is tuple and kinds and Ellipsis not in kinds and all(_simple(k) for k in kinds):
        shape = param.nargs == len(kinds)
    else:
        shape = _simple(annotation) and param.nargs == 1
    plain_info = (info.parser is None and not info.clamp and getattr(info, "path_type", None) is None)
    return shape and plain_info and descriptor.file_annotation is None and not param.multiple


def install(params: list) -> None:
    """Give each simple parameter of a command the quick converter (others keep typer's)."""
    for param in params:
        if quick(param) and param._runtime_param is None:
            descriptor = param.type_descriptor
            param._runtime_param = _QuickParam(parameter_info=descriptor.parameter_info,
                                               annotation=descriptor.annotation)
