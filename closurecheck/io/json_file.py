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
    return json.dumps(jsonable(obj), indent=indent, allow_nan=False) + "\n"


def write_json(path, obj, indent: int | None = 1) -> None:
    """Write :func:`json_text` of ``obj`` to ``path`` atomically."""
    write_text(path, json_text(obj, indent))
