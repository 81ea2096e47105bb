"""Maximum clique of a consistency graph (which loop closures agree with each other).

The largest set of pairwise-consistent loop closures is a maximum clique of
the PCM consistency graph (Mangelson et al., ICRA 2018).  This module finds it
with

* a fast greedy heuristic in the spirit of Pattabiraman, Patwary,
  Gebremedhin, Liao, Choudhary, "Fast Algorithms for the Maximum Clique
  Problem on Massive Graphs with Applications to Overlapping Community
  Detection" (2015): vertices in order of decreasing core number, each grown
  greedily into a clique among neighbours whose core number can still beat
  the best clique so far;
* an exact branch and bound with greedy-colouring bounds in the style of
  Tomita and Seki (MCQ, 2003) and its bitset form (San Segundo et al.,
  BBMC, 2011), seeded by the heuristic and pruned by core numbers, under a
  budget of node expansions (and optionally seconds).

The answer is canonical, i.e. independent of the search order:

1. the largest number of vertices;
2. among those, the largest summed vertex weight (when weights are given;
   sums equal within ``weight_tie_rtol`` relative count as equal);
3. among those, the lexicographically smallest sorted list of indices.

Vertex sets are Python integers used as bitsets, which keeps the inner loops
of the search to a few big-integer operations per vertex.
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np
import scipy.sparse

from .errors import InputError

__all__ = ["CliqueOptions", "CliqueResult", "core_numbers", "heuristic_clique", "max_clique"]


@dataclass(frozen=True)
class CliqueOptions:
    """Budget and tie rules of :func:`max_clique`.

    max_expansions:
        Search nodes (greedy colourings) the exact search may expand, both
        phases together.  Deterministic: the same input and budget always give
        the same answer.
    max_seconds:
        Optional wall-clock budget in seconds; None means no time limit.  A
        time limit makes the outcome depend on machine speed.
    weight_tie_rtol:
        Summed weights within this relative tolerance count as equal, so that
        the summation order cannot change the answer.
    canonical:
        After the maximum is proven, run the second phase that picks the
        lexicographically smallest optimal clique.  False returns whichever
        optimal clique the search met first (still deterministic).
    """

    max_expansions: int = 1_000_000
    max_seconds: float | None = None
    weight_tie_rtol: float = 1e-9
    canonical: bool = True

    def __post_init__(self):
        if not (isinstance(self.max_expansions, (int, np.integer)) and self.max_expansions >= 0):
            raise InputError(f"max_expansions must be a non-negative integer, got {self.max_expansions!r}")
        if self.max_seconds is not None and not (
            isinstance(self.max_seconds, (int, float)) and self.max_seconds > 0
        ):
            raise InputError(f"max_seconds must be a positive number or None, got {self.max_seconds!r}")
        if not (isinstance(self.weight_tie_rtol, (int, float)) and 0.0 <= self.weight_tie_rtol < 1.0):
            raise InputError(f"weight_tie_rtol must be in [0, 1), got {self.weight_tie_rtol!r}")


@dataclass(frozen=True)
class CliqueResult:
    """A clique and how much is known about it.

    members: sorted (m,) int array of vertex indices.
    exact: True when the clique is proven maximum (size, then weight).
    canonical: True when, in addition, the tie rule of the module docstring
        was applied to completion (so any search order gives these members).
    expansions: search nodes expanded by the exact search (0 when the
        heuristic already met the upper bound).
    upper_bound: proven upper bound on the clique number (== size when exact).
    weight: summed weight of the members (their count when unweighted).
    """

    members: np.ndarray
    exact: bool
    canonical: bool
    expansions: int
    upper_bound: int
    weight: float

    @property
    def size(self) -> int:
        return int(len(self.members))


# --------------------------------------------------------------------------
# input


def _adjacency_csr(adjacency):
    """Validated symmetric boolean CSR adjacency without self loops."""
    if scipy.sparse.issparse(adjacency):
        a = scipy.sparse.csr_array(adjacency)
        if a.ndim != 2 or a.shape[0] != a.shape[1]:
            raise InputError(f"adjacency must be a square matrix, got shape {a.shape}")
        if a.nnz and not np.all(np.isfinite(a.data.astype(float))):
            raise InputError("adjacency must not contain NaN or infinite entries")
        a = scipy.sparse.csr_array(a != 0, dtype=bool)
    else:
        dense = np.asarray(adjacency)
        if dense.ndim != 2 or dense.shape[0] != dense.shape[1]:
            raise InputError(f"adjacency must be a square matrix, got shape {dense.shape}")
        if dense.dtype != bool:
            if not np.issubdtype(dense.dtype, np.number):
                raise InputError(f"adjacency must be boolean or numeric, got dtype {dense.dtype}")
            if not np.all(np.isfinite(dense)):
                raise InputError("adjacency must not contain NaN or infinite entries")
            dense = dense != 0
        a = scipy.sparse.csr_array(dense)
    a.setdiag(False)
    a.eliminate_zeros()
    if (a != a.T).nnz:
        raise InputError("adjacency must be symmetric (an undirected graph)")
    a.sort_indices()
    return a


def _weights(weights, n):
    if weights is None:
        return np.ones(n), False
    w = np.asarray(weights, dtype=float)
    if w.shape != (n,):
        raise InputError(f"weights must have shape ({n},), got {w.shape}")
    if not np.all(np.isfinite(w)) or np.any(w < 0):
        raise InputError("weights must be finite and non-negative")
    return w, True


def _bits(indices, n):
    row = np.zeros(n, dtype=np.uint8)
    row[indices] = 1
    return int.from_bytes(np.packbits(row, bitorder="little").tobytes(), "little")


def _members_of(bits):
    out = []
    while bits:
        low = bits & -bits
        out.append(low.bit_length() - 1)
        bits ^= low
    return out


# --------------------------------------------------------------------------
# core numbers


def _peel(a):
    """Core numbers and the peeling (degeneracy) order of a CSR adjacency.

    Repeatedly removes a vertex of smallest remaining degree (ties: smallest
    index); the core number is the largest such degree seen so far.  O(n^2)
    with vectorised steps, fine for the few thousand vertices of a
    consistency graph.
    """
    n = a.shape[0]
    deg = np.diff(a.indptr).astype(np.int64)
    removed = 2 * n + 2  # stays above any live degree after decrements
    core = np.zeros(n, dtype=np.int64)
    order = np.empty(n, dtype=np.intp)
    k = 0
    for step in range(n):
        v = int(np.argmin(deg))
        k = max(k, int(deg[v]))
        core[v] = k
        order[step] = v
        deg[v] = removed
        deg[a.indices[a.indptr[v] : a.indptr[v + 1]]] -= 1
    return core, order


def core_numbers(adjacency) -> np.ndarray:
    """Core number of each vertex: the largest k such that the vertex lies in
    a subgraph where every vertex has at least k neighbours.  A clique
    containing vertex v has at most ``core[v] + 1`` vertices."""
    return _peel(_adjacency_csr(adjacency))[0]


# --------------------------------------------------------------------------
# the search state shared by the heuristic and the exact phases


class _Graph:
    """Bitset adjacency relabelled so that bit 0 is the most promising vertex.

    Position p holds vertex ``order[p]``; positions run from the last peeled
    vertex (highest core number) to the first, so core numbers are
    non-increasing along positions and greedy colouring in position order
    sees dense vertices first (the initial ordering of MCQ/BBMC).
    """

    def __init__(self, a, w, weighted):
        self.n = a.shape[0]
        self.core, peel = _peel(a)
        self.order = peel[::-1].copy()
        self.pos = np.empty(self.n, dtype=np.intp)
        self.pos[self.order] = np.arange(self.n)
        self.a = a
        self.weighted = weighted
        self.w = w
        self.wpos = w[self.order].tolist()
        self.core_pos = self.core[self.order]
        self.nbr = [
            _bits(self.pos[a.indices[a.indptr[v] : a.indptr[v + 1]]], self.n) for v in self.order.tolist()
        ]

    def prefix_mask(self, min_core):
        """Bitset of positions whose core number is >= min_core (a prefix)."""
        count = int(np.count_nonzero(self.core_pos >= min_core))
        return (1 << count) - 1


def _better(size, weight, best_size, best_weight, weighted):
    if size != best_size:
        return size > best_size
    return weighted and weight > best_weight


def _heuristic(g: _Graph):
    """Greedy cliques grown from each vertex in decreasing core order.

    Returns (positions, size, weight).  A vertex v can only start a clique
    larger than the best when ``core[v] + 1 > best``; candidates are limited
    to neighbours with core >= best, and each step adds the candidate of
    lowest position (highest core number, then latest peeled).
    """
    best, best_size, best_w = [], 0, 0.0
    for p in range(g.n):
        limit = int(g.core_pos[p]) + 1
        if limit < best_size or (limit == best_size and not g.weighted):
            break  # core numbers only decrease from here
        cand = g.nbr[p] & g.prefix_mask(max(best_size - 1, 0))
        clique = [p]
        while cand:
            low = cand & -cand
            u = low.bit_length() - 1
            clique.append(u)
            cand &= g.nbr[u]
        size = len(clique)
        weight = sum(g.wpos[u] for u in clique)
        if _better(size, weight, best_size, best_w, g.weighted):
            best, best_size, best_w = clique, size, weight
    return best, best_size, best_w


class _Budget:
    def __init__(self, options: CliqueOptions):
        self.left = int(options.max_expansions)
        self.deadline = None if options.max_seconds is None else time.perf_counter() + options.max_seconds
        self.used = 0

    def spend(self) -> bool:
        """Count one expansion; False when the budget is gone."""
        if self.left <= 0:
            return False
        self.left -= 1
        self.used += 1
        if self.deadline is not None and (self.used & 255) == 0 and time.perf_counter() > self.deadline:
            self.left = 0
        return True


def _colour(nbr, wpos, p_bits, kmin, weighted):
    """Greedy colour classes of p_bits in position order (BBMC).

    Returns (verts, cols, wbound, all_singletons): the vertices whose colour
    k >= kmin in class order, their colour, and for each the sum over classes
    1..k of the class's largest weight (an upper bound on the weight a clique
    can collect from those classes).  ``all_singletons`` means every class
    has one vertex, i.e. p_bits is itself a clique.
    """
    verts, cols, wbound = [], [], []
    q = p_bits
    k = 0
    acc = 0.0
    singletons = True
    while q:
        k += 1
        u_bits = q
        cmax = 0.0
        count = 0
        while u_bits:
            low = u_bits & -u_bits
            v = low.bit_length() - 1
            u_bits ^= low
            u_bits &= ~nbr[v]
            q ^= low
            count += 1
            if k >= kmin:
                verts.append(v)
                cols.append(k)
            if weighted and wpos[v] > cmax:
                cmax = wpos[v]
        if count > 1:
            singletons = False
        if weighted:
            acc += cmax
            if k >= kmin:
                wbound.extend([acc] * count)
    return verts, cols, wbound, singletons


def _exact(g: _Graph, start, budget: _Budget):
    """Branch and bound for the best clique by (size, weight), seeded by start.

    Iterative (explicit stack) because cliques can be far deeper than
    Python's recursion limit.  Returns (positions, size, weight, finished,
    root_colours).
    """
    best, best_size, best_w = start
    weighted = g.weighted
    nbr, wpos = g.nbr, g.wpos
    # A clique beating the incumbent needs core >= best_size (or, to tie in
    # size with more weight, >= best_size - 1).
    root = g.prefix_mask(best_size - 1 if weighted else best_size)
    if not root:
        return best, best_size, best_w, True, 0
    if not budget.spend():
        return best, best_size, best_w, False, g.n

    def kmin_for(r):
        return max(1, best_size - r if weighted else best_size - r + 1)

    verts, cols, wb, single = _colour(nbr, wpos, root, kmin_for(0), weighted)
    root_colours = cols[-1] if cols else 0
    path, path_w = [], [0.0]
    if single:
        members = _members_of(root)
        size, weight = len(members), sum(wpos[u] for u in members)
        if _better(size, weight, best_size, best_w, weighted):
            return members, size, weight, True, root_colours
        return best, best_size, best_w, True, root_colours
    stack = [[verts, cols, wb, len(verts) - 1, root]]
    finished = True
    while stack:
        frame = stack[-1]
        idx = frame[3]
        r = len(path)
        if idx >= 0:
            c = frame[1][idx]
            bound = r + c
            if weighted:
                go = bound > best_size or (bound == best_size and path_w[-1] + frame[2][idx] > best_w)
            else:
                go = bound > best_size
        else:
            go = False
        if not go:
            stack.pop()
            if path:
                path.pop()
                path_w.pop()
            continue
        v = frame[0][idx]
        frame[3] = idx - 1
        p_bits = frame[4]
        child = p_bits & nbr[v]
        frame[4] = p_bits ^ (1 << v)
        wr = path_w[-1] + wpos[v]
        if not child:
            if _better(r + 1, wr, best_size, best_w, weighted):
                best, best_size, best_w = path + [v], r + 1, wr
            continue
        if not budget.spend():
            finished = False
            break
        path.append(v)
        path_w.append(wr)
        verts, cols, wb, single = _colour(nbr, wpos, child, kmin_for(r + 1), weighted)
        if single:
            members = path + _members_of(child)
            weight = wr + sum(wpos[u] for u in _members_of(child))
            if _better(len(members), weight, best_size, best_w, weighted):
                best, best_size, best_w = members, len(members), weight
            path.pop()
            path_w.pop()
            continue
        if not verts:
            path.pop()
            path_w.pop()
            continue
        stack.append([verts, cols, wb, len(verts) - 1, child])
    return best, best_size, best_w, finished, root_colours


def _canonical(a, w, weighted, core, size, min_weight, budget: _Budget):
    """Lexicographically smallest clique with ``size`` vertices and summed
    weight >= min_weight, in original vertex indices, or None if the budget
    runs out.

    Depth-first search that branches on candidates in increasing index and
    only extends a clique with larger indices, so cliques are met in
    lexicographic order and the first one that qualifies is the answer.
    Bounds: colouring the candidates greedily from the highest index down
    gives, for each candidate v, the number of colours among candidates >= v,
    an upper bound on the clique that can still be built from v on.
    """
    n = a.shape[0]
    keep = np.flatnonzero(core >= size - 1)
    keep_bits = _bits(keep, n)
    nbr = [0] * n
    for v in keep.tolist():
        nbr[v] = _bits(a.indices[a.indptr[v] : a.indptr[v + 1]], n) & keep_bits
    wl = w.tolist()

    def bounds(p_bits, r):
        """Branch list [(v, bound)] ascending, cut where r + bound < size,
        plus the node's weight bound and whether p_bits is a clique."""
        colour_of = {}
        q = p_bits
        k = 0
        class_max = []
        singletons = True
        while q:
            k += 1
            u_bits = q
            cmax = 0.0
            count = 0
            while u_bits:
                v = u_bits.bit_length() - 1
                bit = 1 << v
                u_bits ^= bit
                u_bits &= ~nbr[v]
                q ^= bit
                colour_of[v] = k
                count += 1
                if wl[v] > cmax:
                    cmax = wl[v]
            class_max.append(cmax)
            singletons = singletons and count == 1
        need = size - r
        wbound = sum(sorted(class_max, reverse=True)[:need]) if weighted else 0.0
        seen = set()
        ascending = []
        for v in sorted(colour_of, reverse=True):
            seen.add(colour_of[v])
            ascending.append((v, len(seen)))
        ascending.reverse()
        cut = [(v, b) for v, b in ascending if r + b >= size]
        return cut, wbound, singletons

    if not budget.spend():
        return None
    branches, wbound, single = bounds(keep_bits, 0)
    path, path_w = [], [0.0]

    def accept(members, weight):
        return len(members) == size and (not weighted or weight >= min_weight)

    if single:
        members = _members_of(keep_bits)[:size]
        return members if accept(members, sum(wl[u] for u in members)) else None
    if weighted and wbound < min_weight:
        return None
    stack = [[branches, 0, keep_bits]]
    while stack:
        frame = stack[-1]
        if frame[1] >= len(frame[0]):
            stack.pop()
            if path:
                path.pop()
                path_w.pop()
            continue
        v, _ = frame[0][frame[1]]
        frame[1] += 1
        p_bits = frame[2] & ~((1 << (v + 1)) - 1)  # candidates above v
        child = p_bits & nbr[v]
        r = len(path) + 1
        wr = path_w[-1] + wl[v]
        if r == size:
            if accept(path + [v], wr):
                return path + [v]
            continue
        if not child:
            continue
        if not budget.spend():
            return None
        cut, wbound, single = bounds(child, r)
        if single:
            members = path + [v] + _members_of(child)[: size - r]
            if accept(members, wr + sum(wl[u] for u in members[r:])):
                return members
            continue
        if not cut or (weighted and wr + wbound < min_weight):
            continue
        path.append(v)
        path_w.append(wr)
        stack.append([cut, 0, child])
    return None


def _result(members, w, exact, canonical, expansions, upper_bound):
    m = np.sort(np.asarray(members, dtype=np.intp))
    return CliqueResult(
        members=m,
        exact=bool(exact),
        canonical=bool(canonical),
        expansions=int(expansions),
        upper_bound=int(upper_bound),
        weight=float(w[m].sum()) if len(m) else 0.0,
    )


def heuristic_clique(adjacency, weights=None) -> CliqueResult:
    """Greedy clique by core order (fast, no optimality guarantee).

    Parameters
    ----------
    adjacency : (n, n) scipy.sparse matrix or array
        Undirected graph; any nonzero entry is an edge; the diagonal is
        ignored; must be symmetric.
    weights : (n,) array of non-negative floats, optional
        Vertex weights, used to break ties in size.

    Returns
    -------
    CliqueResult with ``exact`` True only when the clique reaches the
    core-number bound (max core + 1) and the graph is unweighted.
    """
    a = _adjacency_csr(adjacency)
    w, weighted = _weights(weights, a.shape[0])
    if a.shape[0] == 0:
        return _result([], w, True, True, 0, 0)
    g = _Graph(a, w, weighted)
    best, size, _ = _heuristic(g)
    bound = int(g.core.max()) + 1
    exact = size == bound and not weighted
    return _result(g.order[best], w, exact, False, 0, bound)


def max_clique(adjacency, weights=None, options: CliqueOptions = CliqueOptions()) -> CliqueResult:
    """Maximum clique of an undirected graph (exact within a budget).

    Parameters
    ----------
    adjacency : (n, n) scipy.sparse matrix or array
        Undirected graph, e.g. ``PairConsistency.adjacency``; any nonzero
        entry is an edge; the diagonal is ignored; must be symmetric.
    weights : (n,) array of non-negative floats, optional
        Vertex weights (e.g. a registration quality score): among cliques of
        the largest size the one with the largest summed weight wins.
    options : CliqueOptions
        Expansion / time budget and tie rules.

    Returns
    -------
    CliqueResult
        ``members`` follow the rule of the module docstring when
        ``canonical`` is True.  When the budget runs out before the maximum is
        proven, the best clique found so far (at least the heuristic's) is
        returned with ``exact=False`` and ``upper_bound`` says how far from
        optimal it can be.
    """
    a = _adjacency_csr(adjacency)
    n = a.shape[0]
    w, weighted = _weights(weights, n)
    if n == 0:
        return _result([], w, True, True, 0, 0)
    budget = _Budget(options)
    g = _Graph(a, w, weighted)
    start = _heuristic(g)
    core_bound = int(g.core.max()) + 1
    if start[1] == core_bound and not weighted:
        best, size, weight, finished, root_colours = start[0], start[1], start[2], True, start[1]
    else:
        best, size, weight, finished, root_colours = _exact(g, start, budget)
    members = g.order[best]
    if not finished:
        upper = max(size, min(core_bound, root_colours))
        return _result(members, w, False, False, budget.used, upper)
    canonical = False
    if options.canonical:
        min_weight = weight - options.weight_tie_rtol * max(1.0, abs(weight))
        found = _canonical(a, w, weighted, g.core, size, min_weight, budget)
        if found is not None:
            members, canonical = found, True
    return _result(members, w, True, canonical, budget.used, size)
