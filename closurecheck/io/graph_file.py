"""The pose-graph file ``graph.json`` (docs/formats.md, "Pose graph").

Writing is atomic; reading validates the structure so that ``closurecheck
score`` and downstream scripts get one clear error for a damaged file.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import InputError
from .atomic import write_text

GRAPH_VERSION = 1
EDGE_KINDS = ("odometry", "loop")


@dataclass(frozen=True, eq=False)
class PoseGraph:
    """A pose graph as arrays.

    Attributes
    ----------
    ids : (N,) int, node ids (scan ids of the log).
    t : (N,) float, seconds.
    poses : (N, 3) optimised poses [x, y, theta] in the map frame.
    odom : (N, 3) input odometry poses of the same scans.
    src, dst : (E,) int node ids of each edge (``from``, ``to``).
    kind : (E,) str, "odometry" or "loop".
    delta : (E, 3) measured relative pose src^-1 ∘ dst, in src's frame.
    information : (E, 3, 3) inverse covariance of ``delta``, src frame.
    checks : tuple of dicts, one per edge (empty for odometry edges).
    source : name of the scan log.
    """

    ids: np.ndarray
    t: np.ndarray
    poses: np.ndarray
    odom: np.ndarray
    src: np.ndarray
    dst: np.ndarray
    kind: np.ndarray
    delta: np.ndarray
    information: np.ndarray
    checks: tuple = field(default_factory=tuple)
    source: str = ""

    @property
    def loop_mask(self) -> np.ndarray:
        return self.kind == "loop"

    def covariance(self) -> np.ndarray:
        """(E, 3, 3) covariance of each edge (inverse of its information)."""
        return np.linalg.inv(self.information)


def _matrix(m) -> list:
    return [[float(v) for v in row] for row in np.asarray(m)]


def _symmetric(m: np.ndarray) -> np.ndarray:
    return 0.5 * (m + np.swapaxes(m, -1, -2))


def graph_to_dict(graph: PoseGraph) -> dict:
    """The JSON document of ``graph`` (docs/formats.md, "Pose graph")."""
    info = _symmetric(np.asarray(graph.information, dtype=float))
    cov = _symmetric(np.linalg.inv(info)) if len(info) else info
    nodes = [{"id": int(i), "t": float(t), "pose": [float(v) for v in p], "odom": [float(v) for v in o]}
             for i, t, p, o in zip(graph.ids, graph.t, graph.poses, graph.odom)]
    edges = []
    checks = graph.checks or tuple({} for _ in range(len(graph.src)))
    for k in range(len(graph.src)):
        edge = {"from": int(graph.src[k]), "to": int(graph.dst[k]), "kind": str(graph.kind[k]),
                "delta": [float(v) for v in graph.delta[k]], "information": _matrix(info[k])}
        if edge["kind"] == "loop":
            edge["covariance"] = _matrix(cov[k])
            edge["checks"] = _jsonable(checks[k])
        edges.append(edge)
    return {"graph": GRAPH_VERSION, "source": graph.source, "nodes": nodes, "edges": edges}


def _jsonable(value):
    """Plain JSON types for the free-form checks (numpy scalars, NaN -> null)."""
    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, np.ndarray):
        return _jsonable(value.tolist())
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return float(value) if math.isfinite(value) else None
    return value if value is None or isinstance(value, str) else str(value)


def write_graph(path, graph: PoseGraph) -> None:
    """Write ``graph`` to ``path`` atomically as graph.json."""
    write_text(path, json.dumps(graph_to_dict(graph), indent=1, allow_nan=False) + "\n")


def _pose(value, where, path) -> list:
    if (not isinstance(value, list) or len(value) != 3
            or not all(isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)
                       for v in value)):
        raise InputError(f"{where} must be [x, y, theta] of finite numbers", path)
    return value


def read_graph(path) -> PoseGraph:
    """Read and validate a graph.json file (docs/formats.md, "Pose graph").

    Returns a :class:`PoseGraph`: node ids (scan ids), times (s), optimised
    and odometry poses (m, m, rad), and the edges with their deltas
    (``from^-1 ∘ to`` in the ``from`` frame) and 3x3 information matrices.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> import closurecheck
    >>> out = pathlib.Path(tempfile.mkdtemp())
    >>> result = closurecheck.run(closurecheck.simulate_log("ring", seed=4, scans=60), out, jobs=1)
    >>> graph = closurecheck.read_graph(out / "graph.json")
    >>> len(graph.ids) == len(result.keyframes), int(graph.loop_mask.sum()) == int(result.verdicts.accepted.sum())
    (True, True)
    """
    path = Path(path)
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise InputError("no such file", path) from None
    except IsADirectoryError:
        raise InputError("is a directory, expected graph.json", path) from None
    except (ValueError, UnicodeDecodeError) as exc:
        raise InputError(f"not a JSON document ({exc})", path) from None
    if not isinstance(doc, dict) or doc.get("graph") != GRAPH_VERSION:
        raise InputError('not a pose graph of version 1 (missing "graph": 1)', path)
    nodes, edges = doc.get("nodes"), doc.get("edges")
    if not isinstance(nodes, list) or not isinstance(edges, list):
        raise InputError('"nodes" and "edges" must be lists', path)
    ids, ts, poses, odoms = [], [], [], []
    for k, n in enumerate(nodes):
        if not isinstance(n, dict) or not isinstance(n.get("id"), int):
            raise InputError(f"node {k}: needs an integer id", path)
        ids.append(n["id"])
        ts.append(float(n.get("t", math.nan)))
        poses.append(_pose(n.get("pose"), f"node {n['id']} pose", path))
        odoms.append(_pose(n.get("odom"), f"node {n['id']} odom", path))
    known = set(ids)
    if len(known) != len(ids):
        raise InputError("duplicate node ids", path)
    src, dst, kind, delta, info, checks = [], [], [], [], [], []
    for k, e in enumerate(edges):
        if not isinstance(e, dict):
            raise InputError(f"edge {k}: not an object", path)
        if e.get("from") not in known or e.get("to") not in known:
            raise InputError(f"edge {k}: from/to must be node ids", path)
        if e.get("kind") not in EDGE_KINDS:
            raise InputError(f"edge {k}: kind must be one of {', '.join(EDGE_KINDS)}", path)
        m = np.asarray(e.get("information"), dtype=float) if isinstance(e.get("information"), list) else None
        if m is None or m.shape != (3, 3) or not np.isfinite(m).all():
            raise InputError(f"edge {k}: information must be a 3x3 matrix of numbers", path)
        src.append(e["from"])
        dst.append(e["to"])
        kind.append(e["kind"])
        delta.append(_pose(e.get("delta"), f"edge {k} delta", path))
        info.append(m)
        checks.append(e.get("checks", {}))
    return PoseGraph(
        ids=np.asarray(ids, dtype=np.int64), t=np.asarray(ts), poses=np.asarray(poses, float).reshape(-1, 3),
        odom=np.asarray(odoms, float).reshape(-1, 3), src=np.asarray(src, dtype=np.int64),
        dst=np.asarray(dst, dtype=np.int64), kind=np.asarray(kind, dtype=object),
        delta=np.asarray(delta, float).reshape(-1, 3), information=np.asarray(info, float).reshape(-1, 3, 3),
        checks=tuple(checks), source=str(doc.get("source", "")))
