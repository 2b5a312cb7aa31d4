"""Converting the command line's plain option values without loading a validation library.

Recent typer converts every value through a pydantic adapter it builds per parameter; loading
pydantic and building the adapters is about a third of the start-up of a quick command such
as ``mapper params``. The options mapper declares are simple: text, flags, whole and decimal
numbers, paths and choices. :func:`install` gives such a parameter a converter that handles
the ordinary spellings of those values itself (``12``, ``-0.5``, ``1e3``, ``up``, a file
name) and hands anything else, including every value it cannot convert, to typer's own
conversion, so an unusual spelling is read as typer reads it and a wrong value gets typer's
message. With a typer that has no such adapters there is nothing to install.
"""

from __future__ import annotations

import re
from enum import Enum
from pathlib import Path
from typing import Any

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


def _quick_value(annotation: Any, info: Any, value: Any, param: Any, ctx: Any) -> Any:
    """``value`` converted for ``annotation``, or ``_UNSURE`` to leave it to typer."""
    if annotation is str or annotation is bool:
        return value if type(value) is annotation else _UNSURE
    if annotation is int or annotation is float:
        if type(value) is annotation:
            return value
        pattern = _WHOLE if annotation is int else _DECIMAL
        if type(value) is str and pattern.fullmatch(value):
            return annotation(value)
        return _UNSURE
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
    simple = annotation in QUICK_ANNOTATIONS or (isinstance(annotation, type) and issubclass(annotation, Enum))
    plain_info = (info.parser is None and info.min is None and info.max is None and not info.clamp
                  and getattr(info, "path_type", None) is None)
    return (simple and plain_info and descriptor.file_annotation is None
            and param.nargs == 1 and not param.multiple)


def install(params: list) -> None:
    """Give each simple parameter of a command the quick converter (others keep typer's)."""
    for param in params:
        if quick(param) and param._runtime_param is None:
            descriptor = param.type_descriptor
            param._runtime_param = _QuickParam(parameter_info=descriptor.parameter_info,
                                               annotation=descriptor.annotation)
