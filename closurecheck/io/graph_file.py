"""The pose-graph file ``graph.json`` (docs/formats.md, "Pose graph").

Writing is atomic; reading validates the structure so that ``closurecheck
score`` and downstream scripts get one clear error for a damaged file.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field

import numpy as np

from ..errors import InputError, one_line
from .files import check_regular_file
from .json_file import jsonable, write_json

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

    def rows(a):
        # One tolist per array gives the same Python floats as float() of each number, without a call per number.
        return np.asarray(a, dtype=float).tolist()

    nodes = [{"id": int(i), "t": t, "pose": p, "odom": o}
             for i, t, p, o in zip(graph.ids, rows(graph.t), rows(graph.poses), rows(graph.odom))]
    edges = []
    checks = graph.checks or tuple({} for _ in range(len(graph.src)))
    loops = set(np.flatnonzero(np.asarray(graph.kind).astype(str) == "loop").tolist())
    for k, (s, d, kind, delta, information) in enumerate(zip(graph.src, graph.dst, graph.kind, rows(graph.delta),
                                                             info.tolist())):
        edge = {"from": int(s), "to": int(d), "kind": str(kind), "delta": delta, "information": information}
        if k in loops:
            edge["covariance"] = cov[k].tolist()
            edge["checks"] = jsonable(checks[k])
        edges.append(edge)
    return {"graph": GRAPH_VERSION, "source": graph.source, "nodes": nodes, "edges": edges}


def write_graph(path, graph: PoseGraph) -> None:
    """Write ``graph`` to ``path`` atomically as graph.json."""
    write_json(path, graph_to_dict(graph))


def _finite_number(v) -> bool:
    if not isinstance(v, (int, float)) or isinstance(v, bool):
        return False
    try:
        return math.isfinite(v)
    except OverflowError:  # an integer beyond float64
        return False


def _pose(value, where, path) -> list:
    if not isinstance(value, list) or len(value) != 3 or not all(_finite_number(v) for v in value):
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
    path = check_regular_file(path, "graph.json file")
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except RecursionError:
        raise InputError("not a JSON document (nested too deeply)", path) from None
    except FileNotFoundError:
        raise InputError("no such file", path) from None
    except IsADirectoryError:
        raise InputError("is a directory, expected graph.json", path) from None
    except (ValueError, UnicodeDecodeError) as exc:
        raise InputError(f"not a JSON document ({one_line(exc, 200)})", path) from None
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
        t = n.get("t", math.nan)
        if not isinstance(t, (int, float)) or isinstance(t, bool):
            raise InputError(f"node {n['id']}: t must be a number", path)
        try:
            ts.append(float(t))
        except OverflowError:
            raise InputError(f"node {n['id']}: t is out of the range of numbers", path) from None
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
        try:
            m = np.asarray(e.get("information"), dtype=float) if isinstance(e.get("information"), list) else None
        except (TypeError, ValueError, OverflowError):
            m = None
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
