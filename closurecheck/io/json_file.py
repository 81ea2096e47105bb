"""The one way closurecheck writes JSON: plain types, non-finite numbers as null, strict output.

Every JSON output (graph.json, summary.json, ``score --json``) goes through
:func:`json_text`, so none of them can hold the bare ``NaN`` or
``Infinity`` tokens that Python's json module writes by default and that
strict JSON readers refuse (RFC 8259, section 6: "Numeric values that cannot
be represented ... (such as Infinity and NaN) are not permitted").
"""

from __future__ import annotations

import json
import math
from json.encoder import encode_basestring_ascii as _encode_string

import numpy as np

from .atomic import write_text


def jsonable(value):
    """``value`` as plain JSON types: numpy scalars and arrays to Python, NaN and infinities to None.

    Dict keys become strings; tuples become lists; any other object its ``str``.

    Examples
    --------
    >>> jsonable({"a": float("nan"), "b": (1, 2.5)})
    {'a': None, 'b': [1, 2.5]}
    """
    # Exact built-in types first (most values of a graph are plain floats):
    # each returns what the isinstance chain below returns for it.
    t = type(value)
    if t is float:
        return value if math.isfinite(value) else None
    if t is str or t is int or t is bool or value is None:
        return value
    if t is list or t is tuple:
        return [jsonable(v) for v in value]
    if isinstance(value, dict):
        return {str(k): jsonable(v) for k, v in value.items()}
    if isinstance(value, np.ndarray):
        return jsonable(value.tolist())
    if isinstance(value, (list, tuple)):
        return [jsonable(v) for v in value]
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return float(value) if math.isfinite(value) else None
    return value if value is None or isinstance(value, str) else str(value)


def json_text(obj, indent: int | None = 1) -> str:
    """Strict JSON text of ``obj`` (see :func:`jsonable`) with a final newline.

    Examples
    --------
    >>> json_text({"precision": float("nan")}, indent=None)
    '{"precision": null}\\n'
    """
    plain = jsonable(obj)
    if indent is None or isinstance(indent, str) or indent < 0:
        return json.dumps(plain, indent=indent, allow_nan=False) + "\n"
    return _indented(plain, " " * indent) + "\n"


def _indented(plain, step: str) -> str:
    """``json.dumps(plain, indent=len(step), allow_nan=False)`` for the output of :func:`jsonable`, faster.

    Python's json module writes indented JSON with its pure-Python encoder,
    one generator step per value; here a list of numbers (a pose, a row of
    a matrix) is joined in one call.  graph.json's text of the 5,000-scan
    warehouse log (with graph_to_dict): 0.25 s through json.dumps, 0.145 s
    here, the same bytes.
    """
    out = []
    _write_indented(plain, "\n", step, out)
    return "".join(out)


def _json_scalar(value) -> str | None:
    # json.encoder's spellings: float.__repr__, int.__repr__, ASCII-escaped strings.
    t = type(value)
    if t is float:
        if not math.isfinite(value):
            raise ValueError("Out of range float values are not JSON compliant: " + repr(value))
        return float.__repr__(value)
    if t is str:
        return _encode_string(value)
    if value is None:
        return "null"
    if value is True:
        return "true"
    if value is False:
        return "false"
    if t is int:
        return int.__repr__(value)
    return None


def _write_indented(value, newline: str, step: str, out: list) -> None:
    scalar = _json_scalar(value)
    if scalar is not None:
        out.append(scalar)
        return
    inner = newline + step
    if type(value) is list:
        if not value:
            out.append("[]")
            return
        items = [_json_scalar(v) for v in value]
        if None not in items:
            out.append("[" + inner + ("," + inner).join(items) + newline + "]")
            return
        out.append("[")
        for i, v in enumerate(value):
            out.append(("," + inner) if i else inner)
            _write_indented(v, inner, step, out)
        out.append(newline + "]")
        return
    if type(value) is dict:
        if not value:
            out.append("{}")
            return
        out.append("{")
        for i, (k, v) in enumerate(value.items()):
            if type(k) is not str:
                raise TypeError(f"keys must be str after jsonable, not {type(k).__name__}")
            out.append(("," + inner if i else inner) + _encode_string(k) + ": ")
            _write_indented(v, inner, step, out)
        out.append(newline + "}")
        return
    raise TypeError(f"Object of type {type(value).__name__} is not JSON serializable")


def write_json(path, obj, indent: int | None = 1) -> None:
    """Write :func:`json_text` of ``obj`` to ``path`` atomically."""
    write_text(path, json_text(obj, indent))
