"""Strict, declarative loading of TOML-shaped mappings into frozen dataclasses.

Used by rig profiles, fault scenarios and campaign plans.  A section is a frozen dataclass whose
fields carry their rules in ``field(metadata=...)`` (see :func:`num`, :func:`choice`).  Loading
rejects unknown keys, missing keys, wrong types (no guessing from strings, no string booleans,
``bool`` is never a number) and out-of-range values, each with a :class:`ProfileError` naming the
file, the dotted key path, the value and what was expected.
"""
from __future__ import annotations

import dataclasses
import math
import tomllib
import types
import typing
from collections.abc import Mapping
from pathlib import Path
from typing import Any, TypeVar

from .errors import ProfileError

__all__ = ["num", "choice", "text", "load_section", "load_document", "describe", "read_toml"]

T = TypeVar("T")
_MISSING = dataclasses.MISSING


def num(lo: float | None = None, hi: float | None = None, *, lo_open: bool = False,
        hi_open: bool = False, default: Any = _MISSING, doc: str = "") -> Any:
    """A numeric field with an allowed range (closed unless *_open)."""
    meta = {"lo": lo, "hi": hi, "lo_open": lo_open, "hi_open": hi_open, "doc": doc}
    if default is _MISSING:
        return dataclasses.field(metadata=meta)
    return dataclasses.field(default=default, metadata=meta)


def choice(*options: str, default: Any = _MISSING, doc: str = "") -> Any:
    """A string field that must be one of ``options``."""
    meta = {"choices": options, "doc": doc}
    if default is _MISSING:
        return dataclasses.field(metadata=meta)
    return dataclasses.field(default=default, metadata=meta)


def text(default: Any = _MISSING, doc: str = "", nonempty: bool = True) -> Any:
    meta = {"nonempty": nonempty, "doc": doc}
    if default is _MISSING:
        return dataclasses.field(metadata=meta)
    return dataclasses.field(default=default, metadata=meta)


def _range_text(meta: Mapping[str, Any]) -> str:
    lo, hi = meta.get("lo"), meta.get("hi")
    parts = []
    if lo is not None:
        parts.append(f"{'>' if meta.get('lo_open') else '>='} {lo:g}")
    if hi is not None:
        parts.append(f"{'<' if meta.get('hi_open') else '<='} {hi:g}")
    return " and ".join(parts)


def _check_range(value: float, meta: Mapping[str, Any], source: str, key: str, kind: str) -> None:
    lo, hi = meta.get("lo"), meta.get("hi")
    bad = (lo is not None and (value <= lo if meta.get("lo_open") else value < lo)) or (
        hi is not None and (value >= hi if meta.get("hi_open") else value > hi))
    if bad:
        raise ProfileError(source, key, value, f"{kind} {_range_text(meta)}")


def _convert(tp: Any, value: Any, meta: Mapping[str, Any], source: str, key: str) -> Any:
    origin = typing.get_origin(tp)
    if origin in (typing.Union, types.UnionType):
        args = [a for a in typing.get_args(tp) if a is not type(None)]
        if value is None:
            return None
        return _convert(args[0], value, meta, source, key)
    if dataclasses.is_dataclass(tp):
        if not isinstance(value, Mapping):
            raise ProfileError(source, key, value, f"a table [{key}]")
        return load_section(tp, value, source, key)
    if origin in (tuple, list):
        (item_tp, *_rest) = typing.get_args(tp)
        if not isinstance(value, list):
            raise ProfileError(source, key, value, "an array")
        items = [_convert(item_tp, v, meta, source, f"{key}[{i}]") for i, v in enumerate(value)]
        return tuple(items)
    if origin is dict or tp is dict:
        if not isinstance(value, Mapping):
            raise ProfileError(source, key, value, "a table")
        return dict(value)
    if tp is bool:
        if not isinstance(value, bool):
            raise ProfileError(source, key, value, "true or false")
        return value
    if tp is int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise ProfileError(source, key, value, "an integer" + (
                f" {_range_text(meta)}" if _range_text(meta) else ""))
        _check_range(value, meta, source, key, "an integer")
        return value
    if tp is float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise ProfileError(source, key, value, "a number" + (
                f" {_range_text(meta)}" if _range_text(meta) else ""))
        value = float(value)
        if not math.isfinite(value):
            raise ProfileError(source, key, value, "a finite number")
        _check_range(value, meta, source, key, "a number")
        return value
    if tp is str:
        if not isinstance(value, str):
            raise ProfileError(source, key, value, "a string")
        choices = meta.get("choices")
        if choices and value not in choices:
            raise ProfileError(source, key, value, "one of " + ", ".join(repr(c) for c in choices))
        if meta.get("nonempty") and not value.strip():
            raise ProfileError(source, key, value, "a non-empty string")
        return value
    raise TypeError(f"schema: unsupported field type {tp!r} at {key}")  # a bug in a schema, not input


def load_section(cls: type[T], mapping: Mapping[str, Any], source: str, prefix: str = "") -> T:
    """Build dataclass ``cls`` from ``mapping`` strictly; ``prefix`` is the dotted key path."""
    if not isinstance(mapping, Mapping):
        raise ProfileError(source, prefix or "<top>", mapping, "a table")
    hints = typing.get_type_hints(cls)
    fields = {f.name: f for f in dataclasses.fields(cls) if f.init}
    dotted = (lambda k: f"{prefix}.{k}" if prefix else k)
    for key in mapping:
        if key not in fields:
            allowed = ", ".join(sorted(fields))
            raise ProfileError(source, dotted(key), mapping[key], f"no such key here; allowed: {allowed}")
    values = {}
    for name, f in fields.items():
        if name not in mapping:
            if f.default is _MISSING and f.default_factory is _MISSING:
                raise ProfileError(source, dotted(name), "<missing>", _expect_text(hints[name], f))
            continue
        values[name] = _convert(hints[name], mapping[name], f.metadata, source, dotted(name))
    obj = cls(**values)
    check = getattr(obj, "_validate", None)
    if check is not None:
        check(source, prefix)
    return obj


def _expect_text(tp: Any, f: dataclasses.Field) -> str:
    meta = f.metadata
    if meta.get("choices"):
        return "a required key, one of " + ", ".join(repr(c) for c in meta["choices"])
    rng = _range_text(meta)
    name = getattr(tp, "__name__", str(tp))
    return f"a required key ({name}{', ' + rng if rng else ''})"


def describe(cls: type, prefix: str = "") -> list[str]:
    """One line per key with its type, range and doc: the reference shown by ``flapctl check --keys``."""
    lines = []
    hints = typing.get_type_hints(cls)
    for f in dataclasses.fields(cls):
        if not f.init:
            continue
        key = f"{prefix}.{f.name}" if prefix else f.name
        tp = hints[f.name]
        base = tp
        if typing.get_origin(tp) in (typing.Union, types.UnionType):
            base = [a for a in typing.get_args(tp) if a is not type(None)][0]
        if typing.get_origin(base) in (tuple, list):
            base = typing.get_args(base)[0]
            key += "[]"
        if dataclasses.is_dataclass(base):
            lines.extend(describe(base, key))
            continue
        meta = f.metadata
        desc = getattr(base, "__name__", str(base))
        if meta.get("choices"):
            desc = " | ".join(repr(c) for c in meta["choices"])
        rng = _range_text(meta)
        default = "" if f.default is _MISSING else f" (default {f.default!r})"
        doc = f"  {meta['doc']}" if meta.get("doc") else ""
        lines.append(f"{key}: {desc}{' ' + rng if rng else ''}{default}{doc}")
    return lines


def read_toml(path: str | Path) -> tuple[dict[str, Any], str]:
    """(parsed mapping, raw text) of a TOML file; ProfileError naming the file otherwise."""
    path = Path(path)
    try:
        raw = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        why = getattr(exc, "strerror", None) or str(exc)
        raise ProfileError(str(path), "<file>", str(path), f"a readable UTF-8 file ({why})") from exc
    try:
        return tomllib.loads(raw), raw
    except tomllib.TOMLDecodeError as exc:
        raise ProfileError(str(path), "<syntax>", str(exc), "valid TOML") from exc


def load_document(cls: type[T], data: Mapping[str, Any], source: str, text_: str, version: int,
                  what: str) -> T:
    """A whole versioned file: check ``schema_version``, load ``cls`` strictly, and keep the
    file's name and text on the result (its ``source`` and ``text`` fields, which are not keys)."""
    if not isinstance(data, Mapping):
        raise ProfileError(source, "<top>", data, "a table")
    found = data.get("schema_version", "<missing>")
    if isinstance(found, bool) or found != version:
        raise ProfileError(source, "schema_version", found,
                           f"{version} (the only {what} version this flapctl reads)")
    obj = load_section(cls, data, source)
    object.__setattr__(obj, "source", source)
    object.__setattr__(obj, "text", text_)
    return obj
