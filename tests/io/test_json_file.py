"""JSON text: the indented writer against Python's json module (the reference for every byte)."""

from __future__ import annotations

import json

import numpy as np
import pytest

from closurecheck.io.json_file import json_text, jsonable


def _random_document(rng, depth=0):
    r = rng.random()
    if depth > 3 or r < 0.3:
        return [1.5, -0.0, 1e300, 5e-324, 3, -12, True, False, None, 'a\u00e9"\\\n\t</', "", float("nan"),
                float("-inf"), np.float32(0.1), np.int64(7), np.bool_(True)][rng.integers(16)]
    if r < 0.55:
        return [_random_document(rng, depth + 1) for _ in range(rng.integers(0, 5))]
    if r < 0.65:
        return tuple(_random_document(rng, depth + 1) for _ in range(rng.integers(0, 4)))
    if r < 0.75:
        return np.arange(rng.integers(0, 4)) * 0.5
    keys = ["k", "\u00e9", 1, 2.5, None, True]
    return {keys[rng.integers(6)]: _random_document(rng, depth + 1) for _ in range(rng.integers(0, 5))}


@pytest.mark.parametrize("indent", [None, 0, 1, 2])
def test_json_text_is_what_the_json_module_writes(indent):
    # Reference: json.dumps of the plain document (Python standard library).
    rng = np.random.default_rng(5)
    for _ in range(400):
        doc = _random_document(rng)
        assert json_text(doc, indent) == json.dumps(jsonable(doc), indent=indent, allow_nan=False) + "\n"


def test_graph_like_document():
    doc = {"graph": 1, "source": "log \u00e9", "nodes": [{"id": 3, "t": 0.5, "pose": [1.0, -2.25, 0.1]}],
           "edges": [{"from": 3, "to": 4, "information": [[1.0, 0.0], [0.0, 2.0]], "checks": {}}], "empty": []}
    want = json.dumps(doc, indent=1, allow_nan=False) + "\n"
    assert json_text(doc) == want
    assert json.loads(json_text(doc)) == doc


def test_non_finite_numbers_become_null():
    assert json_text({"a": [float("nan"), float("inf"), 2.0]}, indent=None) == '{"a": [null, null, 2.0]}\n'
