"""Build frozen dataclasses from parsed YAML, checking every key on the way.

The config schema is declared once, as frozen dataclasses (see ``config.py``).
Each field's type annotation says how its YAML value is read; optional field
metadata adds constraints:

``doc``      one line shown in errors and in the generated reference
``min``      inclusive lower bound for numbers
``max``      inclusive upper bound for numbers
``gt``       exclusive lower bound for numbers
``check``    callable(value) -> str | None, returning a problem description

Supported annotations: ``str``, ``int``, ``float``, ``bool``, ``Month``,
``FilePath``, ``Literal[...]``, ``X | None``, ``tuple[X, ...]``,
``dict[str, X]``, and nested frozen dataclasses. A dataclass may define
``_validate(self) -> list`` for checks across fields: each problem is text about
the dataclass, or a pair ``(key, text)`` about one of its keys.

All problems are collected in one pass and raised together as one
``ConfigError``.
"""

from __future__ import annotations

import dataclasses
import math
import os
import types
import typing
from pathlib import Path
from typing import Any, Literal, get_args, get_origin

from ..errors import did_you_mean
from ..months import format_month, parse_month


class Month(int):
    """A calendar month held as its integer index (``year * 12 + month - 1``)."""

    def __repr__(self) -> str:
        return f"Month({format_month(self)})"

    def __str__(self) -> str:
        return format_month(self)


class FilePath(type(Path())):  # type: ignore[misc]
    """A path read from the config, resolved against the config file's folder."""




def _join(path: str, key) -> str:
    if isinstance(key, int):
        return f"{path}[{key}]"
    return f"{path}.{key}" if path else str(key)


def _type_name(tp) -> str:
    origin = get_origin(tp)
    if origin is Literal:
        return "one of " + ", ".join(repr(a) for a in get_args(tp))
    if origin in (types.UnionType, typing.Union):
        return " or ".join(_type_name(a) for a in get_args(tp) if a is not type(None))
    if origin is tuple:
        return f"a list of {_type_name(get_args(tp)[0])}"
    if origin is dict:
        return f"a mapping of names to {_type_name(get_args(tp)[1])}"
    if dataclasses.is_dataclass(tp):
        return "a mapping"
    return {
        str: "text",
        int: "an integer",
        float: "a number",
        bool: "true or false",
        Month: "a month YYYY-MM",
        FilePath: "a file path",
    }.get(tp, getattr(tp, "__name__", str(tp)))


class _Builder:
    def __init__(self, base_dir: Path):
        self.base_dir = base_dir
        self.problems: list[str] = []

    def problem(self, path: str, text: str) -> None:
        # Problems of the whole config (from Config._validate) name their own keys.
        self.problems.append(f"{path}: {text}" if path else text)

    def build(self, tp, value: Any, path: str):
        """Return ``value`` read as ``tp``, or ``None`` after recording a problem."""
        origin = get_origin(tp)
        if origin in (types.UnionType, typing.Union):
            args = [a for a in get_args(tp) if a is not type(None)]
            if value is None:
                return None
            if len(args) == 1:
                return self.build(args[0], value, path)
            # A union of a scalar and a list, e.g. ``str | tuple[str, ...]``:
            # pick by the shape of the value.
            for arg in args:
                want_list = get_origin(arg) is tuple
                if want_list == isinstance(value, list):
                    return self.build(arg, value, path)
            self.problem(path, f"expected {_type_name(tp)}, got {value!r}")
            return None
        if value is None:
            self.problem(path, f"expected {_type_name(tp)}, got nothing (null)")
            return None
        if origin is Literal:
            choices = get_args(tp)
            if value not in choices:
                self.problem(
                    path,
                    f"{value!r} is not one of {', '.join(map(str, choices))}"
                    + did_you_mean(value, choices),
                )
                return None
            return value
        if origin is tuple:
            if isinstance(value, dict):
                self.problem(path, "expected a list, got a mapping")
                return None
            if not isinstance(value, list):
                value = [value]
            (item_tp, *_rest) = get_args(tp)
            return tuple(self.build(item_tp, v, _join(path, i)) for i, v in enumerate(value))
        if origin is dict:
            if not isinstance(value, dict):
                self.problem(path, f"expected a mapping, got {value!r}")
                return None
            item_tp = get_args(tp)[1]
            return {str(k): self.build(item_tp, v, _join(path, k)) for k, v in value.items()}
        if dataclasses.is_dataclass(tp):
            return self.build_dataclass(tp, value, path)
        return self.build_scalar(tp, value, path)

    def build_scalar(self, tp, value, path):
        if tp is bool:
            if isinstance(value, bool):
                return value
        elif tp is int:
            if isinstance(value, int) and not isinstance(value, bool):
                return value
        elif tp is float:
            if isinstance(value, (int, float)) and not isinstance(value, bool):
                if not math.isfinite(value):
                    # YAML .nan and .inf would pass every bound check below and spread through the run.
                    self.problem(path, f"expected a finite number, got {value}")
                    return None
                return float(value)
        elif tp is str:
            if isinstance(value, (str, int, float)) and not isinstance(value, bool):
                return str(value)
        elif tp is Month:
            try:
                return Month(parse_month(value if not isinstance(value, int) else str(value)))
            except ValueError:
                pass
        elif tp is FilePath:
            if isinstance(value, str) and value.strip():
                # Lexical resolution (no symlinks followed): a path names the file the config names, so a
                # reproduction can lay the same relative paths over linked files elsewhere.
                p = Path(value).expanduser()
                return FilePath(os.path.normpath(p if p.is_absolute() else self.base_dir / p))
        else:  # pragma: no cover - a schema bug, not a user error
            raise TypeError(f"unsupported schema type {tp!r} at {path}")
        self.problem(path, f"expected {_type_name(tp)}, got {value!r}")
        return None

    def build_dataclass(self, cls, value, path):
        if not isinstance(value, dict):
            self.problem(path, f"expected a mapping of keys, got {value!r}")
            return None
        fields = {f.name: f for f in dataclasses.fields(cls) if is_key(f)}
        hints = typing.get_type_hints(cls, include_extras=False)
        for key in value:
            if key not in fields:
                self.problem(
                    _join(path, key),
                    f"unknown key (valid keys: {', '.join(fields)})" + did_you_mean(key, fields),
                )
        kwargs = {}
        before = len(self.problems)
        for name, f in fields.items():
            sub = _join(path, name)
            if name not in value:
                if f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING:
                    self.problem(sub, f"missing required key ({f.metadata.get('doc', _type_name(hints[name]))})")
                continue
            built = self.build(hints[name], value[name], sub)
            if built is not None:
                self.check_field(f, built, sub)
            kwargs[name] = built
        if len(self.problems) > before:
            return None
        obj = cls(**kwargs)
        for text in getattr(obj, "_validate", lambda: [])():
            if isinstance(text, tuple):  # (key, text): a problem of one key, named by its full path
                self.problem(_join(path, text[0]), text[1])
            else:
                self.problem(path, text)
        return obj

    def check_field(self, f: dataclasses.Field, value, path: str) -> None:
        meta = f.metadata
        values = value if isinstance(value, tuple) else (value,)
        for i, v in enumerate(values):
            p = _join(path, i) if isinstance(value, tuple) else path
            if isinstance(v, (int, float)) and not isinstance(v, bool):
                if "min" in meta and v < meta["min"]:
                    self.problem(p, f"{v} is below the minimum {meta['min']}")
                if "max" in meta and v > meta["max"]:
                    self.problem(p, f"{v} is above the maximum {meta['max']}")
                if "gt" in meta and not v > meta["gt"]:
                    self.problem(p, f"{v} must be greater than {meta['gt']}")
        if "check" in meta:
            text = meta["check"](value)
            if text:
                self.problem(path, text)


def build(cls, data: dict, base_dir: Path):
    """Build ``cls`` from ``data``; return ``(obj_or_None, problems)``."""
    builder = _Builder(base_dir)
    obj = builder.build(cls, data, "")
    return obj, builder.problems


def is_key(f: dataclasses.Field) -> bool:
    """Whether a schema field is a config key (not state the loader sets, such as the config's folder)."""
    return f.init and not f.metadata.get("loader_state", False)


def describe(cls, prefix: str = "") -> list[tuple[str, str, str, str]]:
    """Rows ``(key path, type, default, doc)`` for every key of the schema."""
    rows = []
    hints = typing.get_type_hints(cls)
    for f in dataclasses.fields(cls):
        if not is_key(f):
            continue
        path = _join(prefix, f.name)
        tp = hints[f.name]
        if f.default is not dataclasses.MISSING:
            default = repr(f.default)
        elif f.default_factory is not dataclasses.MISSING:
            default = "(see below)"
        else:
            default = "required"
        rows.append((path, _type_name(tp), default, f.metadata.get("doc", "")))
        inner = tp
        for arg in get_args(tp) or ():
            if dataclasses.is_dataclass(arg):
                inner = arg
        if get_origin(tp) is tuple and dataclasses.is_dataclass(get_args(tp)[0]):
            rows.extend(describe(get_args(tp)[0], path + "[]"))
        elif dataclasses.is_dataclass(inner):
            rows.extend(describe(inner, path))
    return rows
