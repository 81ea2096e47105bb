"""Run configuration: nested frozen dataclasses <-> TOML.

A run's configuration is one dataclass whose fields are the option
dataclasses of the stages (one TOML table each).  ``--config FILE`` loads a
TOML file over the defaults, command-line options go on top, and the
effective configuration is written next to the outputs so that a run can be
reproduced with ``--config DIR/config.toml``.
"""

from __future__ import annotations

import dataclasses
import math
import sys
import typing
from pathlib import Path

from .errors import InputError

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - exercised on Python 3.10 only
    import tomli as tomllib


def _field_types(cls) -> dict:
    return typing.get_type_hints(cls)


def _coerce(value, typ, where: str, path):
    """Check a TOML value against a field's annotated type."""
    origin = typing.get_origin(typ)
    args = typing.get_args(typ)
    if origin is typing.Union or (origin is not None and str(origin) == "<class 'types.UnionType'>"):
        if value is None and type(None) in args:
            return None
        last = None
        for a in args:
            if a is type(None):
                continue
            try:
                return _coerce(value, a, where, path)
            except InputError as exc:
                last = exc
        raise last or InputError(f"{where}: unsupported value {value!r}", path)
    if origin is typing.Literal:
        if value not in args:
            raise InputError(f"{where}: must be one of {', '.join(map(repr, args))}, got {value!r}", path)
        return value
    if origin in (tuple, list):
        if not isinstance(value, (list, tuple)):
            raise InputError(f"{where}: expected a list, got {value!r}", path)
        inner = args[0] if args else float
        return tuple(_coerce(v, inner, where, path) for v in value)
    if typ is bool:
        if not isinstance(value, bool):
            raise InputError(f"{where}: expected true or false, got {value!r}", path)
        return value
    if typ is int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise InputError(f"{where}: expected an integer, got {value!r}", path)
        return value
    if typ is float:
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
            raise InputError(f"{where}: expected a finite number, got {value!r}", path)
        return float(value)
    if typ is str:
        if not isinstance(value, str):
            raise InputError(f"{where}: expected a string, got {value!r}", path)
        return value
    return value


def merge(obj, updates: dict, path=None, prefix: str = ""):
    """Return a copy of dataclass ``obj`` with ``updates`` (nested dicts) applied.

    Unknown keys and values of the wrong type raise :class:`InputError`.
    """
    if not isinstance(updates, dict):
        raise InputError(f"{prefix or 'config'}: expected a table", path)
    names = {f.name: f for f in dataclasses.fields(obj)}
    types = _field_types(type(obj))
    changes = {}
    for key, value in updates.items():
        where = f"{prefix}.{key}" if prefix else key
        if key not in names:
            known = ", ".join(sorted(names))
            raise InputError(f"unknown setting '{where}' (known here: {known})", path)
        current = getattr(obj, key)
        if dataclasses.is_dataclass(current):
            changes[key] = merge(current, value, path, where)
        else:
            changes[key] = _coerce(value, types[key], where, path)
    try:
        new = dataclasses.replace(obj, **changes)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{prefix or 'config'}: {exc}", path) from None
    return new


def load_toml(path) -> dict:
    """Parse a TOML file; syntax errors become one-line InputErrors."""
    path = Path(path)
    try:
        with open(path, "rb") as fh:
            return tomllib.load(fh)
    except FileNotFoundError:
        raise InputError("no such file", path) from None
    except IsADirectoryError:
        raise InputError("is a directory, expected a TOML file", path) from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"not valid TOML ({exc})", path) from None
    except UnicodeDecodeError:
        raise InputError("not valid UTF-8 text", path) from None


def _toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        return repr(v) if math.isfinite(v) else ('inf' if v > 0 else '-inf') if not math.isnan(v) else "nan"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if v is None:
        raise ValueError("None cannot be written to TOML")
    return _toml_value(str(v))


def to_toml(obj, header: str = "") -> str:
    """Serialise a dataclass of option dataclasses as TOML (one table each).

    Fields whose value is None are left out (TOML has no null); loading the
    file then falls back to the same default.
    """
    lines = [f"# {line}" for line in header.splitlines()] if header else []
    scalars = []
    tables = []
    for f in dataclasses.fields(obj):
        v = getattr(obj, f.name)
        if dataclasses.is_dataclass(v):
            tables.append((f.name, v))
        elif v is not None:
            scalars.append(f"{f.name} = {_toml_value(v)}")
    lines += scalars
    for name, sub in tables:
        lines.append("")
        lines.append(f"[{name}]")
        for g in dataclasses.fields(sub):
            v = getattr(sub, g.name)
            if v is not None and not dataclasses.is_dataclass(v):
                lines.append(f"{g.name} = {_toml_value(v)}")
    return "\n".join(lines) + "\n"
