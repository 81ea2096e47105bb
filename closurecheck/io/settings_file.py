"""Settings files: TOML in (one-line errors naming the file), TOML out (one table per options record)."""

from __future__ import annotations

import dataclasses
import math
import sys

from ..errors import InputError, one_line
from .files import check_regular_file

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - exercised on Python 3.10 only
    import tomli as tomllib


def load_toml(path) -> dict:
    """Parse a TOML file; syntax errors become one-line InputErrors."""
    path = check_regular_file(path, "TOML file")
    try:
        with open(path, "rb") as fh:
            return tomllib.load(fh)
    except RecursionError:
        raise InputError("not valid TOML (nested too deeply)", path) from None
    except FileNotFoundError:
        raise InputError("no such file", path) from None
    except IsADirectoryError:
        raise InputError("is a directory, expected a TOML file", path) from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"not valid TOML ({one_line(exc, 200)})", path) from None
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
        return _toml_string(v)
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if v is None:
        raise ValueError("None cannot be written to TOML")
    return _toml_value(str(v))


def _toml_string(text: str) -> str:
    """A TOML basic string: quote, backslash and control characters escaped (TOML 1.0, "String")."""
    out = []
    for ch in text:
        if ch in '"\\':
            out.append("\\" + ch)
        elif ord(ch) < 0x20 or ord(ch) == 0x7F:
            out.append(f"\\u{ord(ch):04X}")
        else:
            out.append(ch)
    return '"' + "".join(out) + '"'


def _toml_setting(name: str, v) -> str:
    """``name = value``; a list of lists (rows of a table) gets one row per line."""
    if isinstance(v, (list, tuple)) and v and all(isinstance(x, (list, tuple)) for x in v):
        return f"{name} = [\n" + "".join(f"  {_toml_value(x)},\n" for x in v) + "]"
    return f"{name} = {_toml_value(v)}"


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
            scalars.append(_toml_setting(f.name, v))
    lines += scalars
    for name, sub in tables:
        lines.append("")
        lines.append(f"[{name}]")
        for g in dataclasses.fields(sub):
            v = getattr(sub, g.name)
            if v is not None and not dataclasses.is_dataclass(v):
                lines.append(_toml_setting(g.name, v))
    return "\n".join(lines) + "\n"
