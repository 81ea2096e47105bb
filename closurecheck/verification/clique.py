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

Consistency graphs of loop closures are nearly complete among the correct
closures (a correct pair fails a 0.99 test 1% of the time), which makes
colouring bounds weak.  Their complement, however, is sparse and falls apart:
two vertices in different connected components of the complement are
adjacent, so the search runs on each component alone (closures consistent
with every other candidate form single-vertex components and need no search).

The rule that picks the answer (``CliqueResult.canonical`` True):

1. the largest number of vertices;
2. among those, the largest summed vertex weight (when weights are given;
   sums equal within ``weight_tie_rtol`` relative count as equal, compared
   per complement component);
3. among those, the lexicographically smallest sorted list of indices.

Rule 3 is a separate tie phase with its own budget; on dense graphs with
very many optimal cliques it can run out, and the result is then an optimal
clique that the (deterministic) search reached, with ``canonical`` False.
The same input and options always give the same members either way.

Vertex sets are Python integers used as bitsets, which keeps the inner loops
of the search to a few big-integer operations per vertex.
"""

from __future__ import annotations

import bisect
import time
from dataclasses import dataclass

import numpy as np
import scipy.sparse

from ..core.options import options, setting
from ..errors import InputError
from ._clique_kernels import greedy_starts, is_symmetric, konig_reach, lex_improve_conflicts, maximum_matching

__all__ = ["CliqueOptions", "CliqueResult", "core_numbers", "heuristic_clique", "max_clique", "max_clique_of_conflicts"]


@options
class CliqueOptions:
    """Budget and tie rules of :func:`max_clique`.

    max_expansions:
        Search nodes (greedy colourings) the search for the maximum may
        expand.  Deterministic: the same input and budget always give the
        same answer.
    tie_max_expansions:
        Search nodes the tie phase (rule 3 of the module docstring) may
        expand once the maximum is proven.  Dense graphs with many optimal
        cliques can need many; when the budget runs out the result keeps
        ``exact=True`` but reports ``canonical=False``.
    max_seconds:
        Optional wall-clock budget in seconds for both phases; None means no
        time limit.  A time limit makes the outcome depend on machine speed.
    weight_tie_rtol:
        Summed weights within this relative tolerance count as equal, so that
        the summation order cannot change the answer.
    canonical:
        Run the tie phase.  False returns the optimal clique the search met
        first (improved by single swaps towards smaller indices; still
        deterministic, but dependent on the search order).
    tie_max_vertices:
        The tie phase runs only on complement components (conflict
        components) of at most this many vertices; wider ones keep the
        cheap improvement of ``canonical`` False and report
        ``canonical=False``.  Each tie expansion colours bitsets as wide as
        the component: on a 15,593-vertex component of a long log the tie
        phase ran for more than 17 minutes without finishing, while the
        maximum itself is proven in 0.3 s (see :func:`_kernel_search`).
    """

    max_expansions: int = setting(1_000_000, at_least=0)
    tie_max_expansions: int = setting(100_000, at_least=0)
    max_seconds: float | None = setting(None, above=0.0)
    weight_tie_rtol: float = setting(1e-9, at_least=0.0, below=1.0)
    canonical: bool = setting(True)
    tie_max_vertices: int = setting(4096, at_least=0)


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
        if a.dtype != bool or not a.data.all():
            # Copies are avoided for boolean input without stored zeros:
            # consistency graphs of long logs hold tens of millions of edges.
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
    if a.diagonal().any():
        a = a.copy()  # never modify the caller's matrix
        a.setdiag(False)
        a.eliminate_zeros()
    a.sum_duplicates()  # sorted, distinct indices (what the symmetry check reads); no-op when canonical
    if not is_symmetric(a.indptr, a.indices):
        raise InputError("adjacency must be symmetric (an undirected graph)")
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
        self.conflicts = None
        self._nbr = [
            _bits(self.pos[a.indices[a.indptr[v] : a.indptr[v + 1]]], self.n) for v in self.order.tolist()
        ]

    @property
    def nbr(self):
        """Bitset of each position's neighbours (by position); built on first use for a conflict graph."""
        if self._nbr is None:
            c, n = self.conflicts, self.n
            full = (1 << n) - 1
            self._nbr = [full ^ _bits(self.pos[c.indices[c.indptr[v]:c.indptr[v + 1]]], n) ^ (1 << int(self.pos[v]))
                         for v in self.order.tolist()]
        return self._nbr

    def prefix_mask(self, min_core):
        """Bitset of positions whose core number is >= min_core (a prefix)."""
        count = int(np.count_nonzero(self.core_pos >= min_core))
        return (1 << count) - 1


def _better(size, weight, best_size, best_weight, weighted):
    if size != best_size:
        return size > best_size
    return weighted and weight > best_weight


_HEURISTIC_STARTS = 64


def _heuristic(g: _Graph):
    """Greedy cliques grown from the first vertices in decreasing core order.

    Returns (positions, size, weight).  A vertex v can only start a clique
    larger than the best when ``core[v] + 1 > best``; candidates are limited
    to neighbours with core >= best, and each step adds the candidate of
    lowest position (highest core number, then latest peeled).  At most
    ``_HEURISTIC_STARTS`` start vertices are tried: the result is only the
    exact search's first lower bound, and on the near-complete consistency
    graphs of long logs (10,000 closures, cliques of 7,000) growing a clique
    from every vertex cost a minute while the first few already find the
    best.
    """
    best, best_size, best_w = [], 0, 0.0
    for p in range(min(g.n, _HEURISTIC_STARTS)):
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


_WIDTH_UNIT = 512


def _expansion_cost(width: int) -> int:
    """Budget units one expansion costs on a component of ``width`` vertices.

    An expansion colours bitsets as wide as the component, so its work grows
    with the square of the width: 1 unit up to 512 vertices (as before this
    rule), (width / 512)^2 rounded up beyond.  Without it the default budget
    of 200,000 expansions meant hours on the 8,679-vertex component of a
    drifted log (measured: 40 s without reaching the budget's first percent).
    """
    return max(1, -(-width // _WIDTH_UNIT)) ** 2


class _Budget:
    def __init__(self, expansions, deadline):
        self.left = int(expansions)
        self.deadline = deadline
        self.used = 0
        self.cost = 1
        self.calls = 0

    def spend(self) -> bool:
        """Count one expansion (``cost`` units); False when the budget is gone."""
        if self.left < self.cost:
            self.left = 0
            return False
        self.left -= self.cost
        self.used += self.cost
        self.calls += 1
        if self.deadline is not None and (self.calls & 255) == 0 and time.perf_counter() > self.deadline:
            self.left = 0
        return True


def _classes(nbr, p_bits) -> list:
    """Greedy colour classes of p_bits in position order (BBMC): a list of vertex lists.

    Each class takes, in position order, every vertex not adjacent to one
    already in it, so a clique has at most one vertex per class.  Both
    searches read their bounds from these lists; building them costs about
    15% more than the two hand-fused loops it replaced (300 vertices, density
    0.7, 200,000 expansions: 14.0 s against 12.1 s), which is small next to
    the consistency test that builds the graph.
    """
    classes = []
    q = p_bits
    while q:
        u_bits = q
        members = []
        while u_bits:
            low = u_bits & -u_bits
            v = low.bit_length() - 1
            u_bits ^= low
            u_bits &= ~nbr[v]
            q ^= low
            members.append(v)
        classes.append(members)
    return classes


def _colour(nbr, wpos, p_bits, kmin, weighted):
    """Colour classes of p_bits as the branch and bound reads them.

    Returns (verts, cols, wbound, all_singletons): the vertices whose colour
    k >= kmin in class order, their colour, and for each the sum over classes
    1..k of the class's largest weight (an upper bound on the weight a clique
    can collect from those classes).  ``all_singletons`` means every class
    has one vertex, i.e. p_bits is itself a clique.
    """
    verts, cols, wbound = [], [], []
    acc = 0.0
    singletons = True
    for k, members in enumerate(_classes(nbr, p_bits), start=1):
        if len(members) > 1:
            singletons = False
        if weighted:
            acc += max(0.0, max(wpos[v] for v in members))
        if k >= kmin:
            verts.extend(members)
            cols.extend([k] * len(members))
            if weighted:
                wbound.extend([acc] * len(members))
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


def _lex_less(path_sorted, extra, best):
    """Is sorted(path_sorted ∪ extra) lexicographically smaller than best?

    ``path_sorted`` and ``extra`` are sorted lists of original indices, best
    a sorted list of the same total length.
    """
    i = j = 0
    for b in best:
        if i < len(path_sorted) and (j >= len(extra) or path_sorted[i] < extra[j]):
            x = path_sorted[i]
            i += 1
        else:
            x = extra[j]
            j += 1
        if x != b:
            return x < b
    return False


def _lex_improve(g: _Graph, members, min_weight):
    """Cheap local improvement of a maximum clique towards the tie rule:
    swap a member for a smaller-index non-member adjacent to all the others
    while the weight stays above min_weight.  Positions in, positions out.
    On a conflict graph whose bitsets were not needed so far, the same scan
    runs on the conflict lists (:func:`_clique_kernels.lex_improve_conflicts`)."""
    if g._nbr is None:
        member = np.zeros(g.n, dtype=bool)
        member[np.asarray(members, dtype=np.intp)] = True
        weight = sum(g.wpos[p] for p in members)
        c = g.conflicts
        return np.flatnonzero(lex_improve_conflicts(c.indptr, c.indices, g.order, g.pos, member,
                                                    np.asarray(g.wpos, dtype=float), float(weight),
                                                    float(min_weight))).tolist()
    idx = g.order
    bits = 0
    for p in members:
        bits |= 1 << p
    weight = sum(g.wpos[p] for p in members)
    by_index = g.pos.tolist()  # positions in increasing original index
    improved = True
    while improved:
        improved = False
        for u in by_index:
            ub = 1 << u
            if bits & ub:
                continue
            missing = bits & ~g.nbr[u]
            if missing and not (missing & (missing - 1)):
                m = missing.bit_length() - 1
                if idx[m] > idx[u] and weight - g.wpos[m] + g.wpos[u] >= min_weight:
                    bits ^= missing | ub
                    weight += g.wpos[u] - g.wpos[m]
                    improved = True
                    break
    return _members_of(bits)


def _lex_colour(g: _Graph, p_bits):
    """Colour classes of p_bits (position order) as the tie phase reads them.

    Returns (verts, cols, class_min, class_wmax, singletons): all vertices in
    class order with their colour, and per class (index k - 1) the smallest
    original index and the largest weight of its members.
    """
    order, wpos = g.order, g.wpos
    verts, cols, class_min, class_wmax = [], [], [], []
    singletons = True
    for k, members in enumerate(_classes(g.nbr, p_bits), start=1):
        verts.extend(members)
        cols.extend([k] * len(members))
        class_min.append(min(g.n, min(int(order[v]) for v in members)))
        class_wmax.append(max(0.0, max(wpos[v] for v in members)))
        singletons = singletons and len(members) == 1
    return verts, cols, class_min, class_wmax, singletons


def _tie_break(g: _Graph, size, min_weight, incumbent, budget: _Budget):
    """Lexicographically smallest clique (sorted original indices) with
    ``size`` vertices and summed weight >= min_weight; positions or None if
    the budget runs out.

    Branch and bound in the same position order and colouring as the main
    search, starting from ``incumbent`` (such a clique).  A branch whose
    candidates lie in colour classes 1..c can at best complete the path with
    one vertex from each of ``need`` distinct classes, so (i) its weight is at
    most the sum of the ``need`` largest class maxima and (ii) the sorted
    clique is, element by element, no smaller than the path merged with the
    ``need`` smallest class minima (the k-th smallest index of any valid
    completion is at least the k-th smallest class minimum).  Both bounds
    only weaken as c decreases, so the first failing branch ends the node.
    """
    order = g.order
    best_pos = _lex_improve(g, incumbent, min_weight)
    best = sorted(int(order[p]) for p in best_pos)
    version = [0]
    weighted = g.weighted
    nbr, wpos = g.nbr, g.wpos

    def offer(positions, weight):
        nonlocal best_pos, best
        if len(positions) != size or (weighted and weight < min_weight):
            return
        cand = sorted(int(order[p]) for p in positions)
        if cand < best:
            best_pos, best = list(positions), cand
            version[0] += 1

    def floor_level(frame, r, path_sorted, w_path):
        """Smallest colour c such that a branch of colour >= c passes both bounds."""
        if frame[6] == version[0]:
            return frame[5]
        class_min, class_wmax = frame[3], frame[4]
        need = size - r

        def ok(c):
            if weighted and w_path + sum(sorted(class_wmax[:c], reverse=True)[:need]) < min_weight:
                return False
            return _lex_less(path_sorted, sorted(class_min[:c])[:need], best)

        lo, hi = max(need, 1), len(class_min)
        if hi < lo or not ok(hi):
            level = hi + 1
        else:
            while lo < hi:  # ok is monotone in c
                mid = (lo + hi) // 2
                if ok(mid):
                    hi = mid
                else:
                    lo = mid + 1
            level = lo
        frame[5], frame[6] = level, version[0]
        return level

    root = g.prefix_mask(size - 1)
    if not budget.spend():
        return None
    verts, cols, cmin, cwmax, single = _lex_colour(g, root)
    if single:
        return best_pos  # the candidates form one clique: nothing to choose
    # frame: [verts, cols, p_bits, class_min, class_wmax, floor, floor_version, idx]
    stack = [[verts, cols, root, cmin, cwmax, 0, -1, len(verts) - 1]]
    path, path_w, path_sorted = [], [0.0], []
    while stack:
        frame = stack[-1]
        idx = frame[7]
        r = len(path)
        go = idx >= 0 and r + frame[1][idx] >= size
        if go:
            go = frame[1][idx] >= floor_level(frame, r, path_sorted, path_w[-1])
        if not go:
            stack.pop()
            if path:
                v_old = path.pop()
                path_w.pop()
                path_sorted.remove(int(order[v_old]))
            continue
        v = frame[0][idx]
        frame[7] = idx - 1
        p_bits = frame[2]
        child = p_bits & nbr[v]
        frame[2] = p_bits ^ (1 << v)
        wr = path_w[-1] + wpos[v]
        if r + 1 == size:
            offer(path + [v], wr)
            continue
        if not child:
            continue
        if not budget.spend():
            return None
        verts, cols, cmin, cwmax, single = _lex_colour(g, child)
        if single:
            members = _members_of(child)
            if r + 1 + len(members) == size:
                offer(path + [v] + members, wr + sum(wpos[u] for u in members))
            continue
        path.append(v)
        path_w.append(wr)
        bisect.insort(path_sorted, int(order[v]))
        stack.append([verts, cols, child, cmin, cwmax, 0, -1, len(verts) - 1])
    return best_pos


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


def _complement_components(nbr, n):
    """Connected components of the complement graph (bitset search).

    Any two vertices in different components are adjacent, so a maximum
    clique is the union of a maximum clique of each component.  Components
    come in order of their smallest vertex, each as a sorted list.
    """
    remaining = (1 << n) - 1
    comps = []
    while remaining:
        low = remaining & -remaining
        remaining ^= low
        comp = low
        frontier = [low.bit_length() - 1]
        while frontier:
            v = frontier.pop()
            new = remaining & ~nbr[v]
            if new:
                remaining ^= new
                comp |= new
                frontier.extend(_members_of(new))
        comps.append(_members_of(comp))
    return comps


@dataclass
class _PartResult:
    members: list  # original indices
    size: int
    finished: bool
    canonical: bool
    upper: int


def _graph_of_conflicts(c, w, weighted) -> _Graph:
    """The :class:`_Graph` of the complement of the CSR graph ``c``, never forming the complement.

    Same core numbers, order and bitsets as ``_Graph(complement)``; memory
    is the n^2 / 8 bytes of the bitsets instead of a dense boolean matrix
    and a CSR of the (nearly complete) complement, and only once a step
    asks for them (``nbr``): where the Nemhauser-Trotter split decides the
    search they are never built (690 MB, the clique's peak and then held
    by the allocator, at the 74,637 closures of the 100,000-scan log).
    """
    g = _Graph.__new__(_Graph)
    n = c.shape[0]
    g.n = n
    g.core, peel = _peel_conflicts(c)
    g.order = peel[::-1].copy()
    g.pos = np.empty(n, dtype=np.intp)
    g.pos[g.order] = np.arange(n)
    g.a = None
    g.weighted = weighted
    g.w = w
    g.wpos = w[g.order].tolist()
    g.core_pos = g.core[g.order]
    g.conflicts = c
    g._nbr = None
    return g


def _lp_split(c):
    """Nemhauser-Trotter split of the graph ``c`` (CSR, symmetric) for a maximum independent set.

    An optimal half-integral solution of the linear relaxation of minimum
    vertex cover, read off a maximum matching of the bipartite double cover
    (left copy of each vertex joined to the right copy of its neighbours;
    Konig's theorem gives a minimum cover of it, and x_v is half the number of
    v's copies in that cover).  Returns boolean masks (zero, half): x_v = 0
    and x_v = 1/2 (the rest have x_v = 1).  Nemhauser and Trotter, "Vertex
    packings: structural properties and algorithms", Math. Programming 8
    (1975): some maximum independent set contains every x = 0 vertex and no
    x = 1 vertex, so alpha(c) = |zero| + alpha(c[half]); and alpha(c[half])
    <= |half| / 2.  Time O(m sqrt(n)) (Hopcroft-Karp, compiled in
    :mod:`closurecheck.verification._clique_kernels`), no dense matrix.
    """
    n = c.shape[0]
    match_l, match_r = maximum_matching(c.indptr, c.indices, n)
    reached_l, reached_r = konig_reach(c.indptr, c.indices, match_l, match_r)
    twice_x = (~reached_l).astype(np.int8) + reached_r  # Konig's cover: unreached left, reached right
    return twice_x == 0, twice_x == 1


def _kernel_search(a, conflicts, start, budget, options):
    """Prove (or improve) an unweighted clique through the Nemhauser-Trotter split of the conflicts.

    ``a`` is the component's graph (``conflicts`` False) or its conflict
    graph, ``start`` the incumbent (positions, size, weight).  The maximum
    clique is a maximum independent set of the conflict graph; by
    :func:`_lp_split` its size is |zero| + alpha(kernel), and only the kernel
    (on long logs about 1% of the closures: 120 of 15,593) is searched.
    Returns None when the split leaves the whole component as kernel (the
    caller then searches it as before), else (members as local vertex
    indices, size, finished, upper bound).  With ``finished`` the size is the
    maximum; ``members`` is a maximum clique only when ``size`` exceeds the
    incumbent's (otherwise the incumbent already is one).
    """
    if 2 * start[1] <= a.shape[0]:
        # x = 1/2 on every vertex is feasible, so the bound is never below
        # half the vertices and cannot prove such an incumbent; the matching
        # is then not worth its cost (11 s on the 8,679 closures and 1.6 M
        # conflicts of a drifted log, where the clique holds a third).
        return None
    if conflicts:
        c = a
    else:
        dense = ~a.toarray()
        np.fill_diagonal(dense, False)
        c = scipy.sparse.csr_array(dense)
    zero, half = _lp_split(c)
    base = int(np.count_nonzero(zero))
    kernel = np.flatnonzero(half)
    if base + len(kernel) // 2 <= start[1]:
        return [], start[1], True, start[1]  # the LP bound already meets the incumbent
    if len(kernel) == c.shape[0]:
        return None
    sub = c[kernel][:, kernel]
    seconds = None if budget.deadline is None else max(budget.deadline - time.perf_counter(), 1e-9)
    inner = max_clique_of_conflicts(sub, options=CliqueOptions(
        max_expansions=budget.left, tie_max_expansions=0, max_seconds=seconds, canonical=False))
    budget.left -= inner.expansions
    budget.used += inner.expansions
    members = np.sort(np.concatenate([np.flatnonzero(zero), kernel[inner.members]]))
    return members, base + inner.size, inner.exact, base + inner.upper_bound


def _solve_part(a, w, weighted, seed, budget, tie_budget, options, conflicts=False):
    """Both phases on one complement component (CSR ``a``, local indices).

    ``seed`` is a clique (local indices) the answer must not fall below.
    With ``conflicts`` True, ``a`` is the component's conflict graph (the
    complement of the graph searched).
    """
    g = _graph_of_conflicts(a, w, weighted) if conflicts else _Graph(a, w, weighted)
    budget.cost = tie_budget.cost = _expansion_cost(g.n)
    try:
        return _solve_graph(g, a, weighted, seed, budget, tie_budget, options, conflicts)
    finally:
        budget.cost = tie_budget.cost = 1


def _solve_graph(g, a, weighted, seed, budget, tie_budget, options, conflicts):
    """:func:`_solve_part` once the component's bitset graph ``g`` is built."""
    if conflicts:
        # The same greedy cliques from the conflict lists: O(n + m) per start
        # instead of bitset operations over n bits per step (which grow with
        # the square of the width).  Equal cost at 15,623 closures (3.2 s
        # against 2.9 s for the whole call, same members); cheaper beyond.
        verts, size, weight = _heuristic_conflicts(a, g.core, g.order[::-1], g.w, weighted)
        start = ([int(p) for p in g.pos[verts]], size, weight)
    else:
        start = _heuristic(g)
    seed_pos = [int(p) for p in g.pos[seed]]
    seed_w = sum(g.wpos[p] for p in seed_pos)
    if _better(len(seed_pos), seed_w, start[1], start[2], weighted):
        start = (seed_pos, len(seed_pos), seed_w)
    core_bound = int(g.core.max()) + 1
    kernel = None
    if start[1] == core_bound and not weighted:
        best, size, weight, finished, upper = start[0], start[1], start[2], True, start[1]
    elif not weighted and (kernel := _kernel_search(a, conflicts, start, budget, options)) is not None:
        members, size, finished, upper = kernel
        if size > start[1]:
            best = [int(p) for p in g.pos[members]]
        else:
            best, size = start[0], start[1]
        weight = sum(g.wpos[p] for p in best)
        upper = min(upper, core_bound)
    else:
        best, size, weight, finished, root_colours = _exact(g, start, budget)
        upper = max(size, min(core_bound, root_colours))
    if not finished:
        return _PartResult(g.order[best].tolist(), size, False, False, max(size, upper))
    min_weight = weight - options.weight_tie_rtol * max(1.0, abs(weight))
    if options.canonical and g.n <= options.tie_max_vertices:
        found = _tie_break(g, size, min_weight, best, tie_budget)
        if found is not None:
            return _PartResult(g.order[found].tolist(), size, True, True, size)
    return _PartResult(g.order[_lex_improve(g, best, min_weight)].tolist(), size, True, False, size)


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


def _start(matrix, weights, options: CliqueOptions):
    """The graph as CSR, its vertex weights, and the two search budgets of one call."""
    a = _adjacency_csr(matrix)
    w, weighted = _weights(weights, a.shape[0])
    deadline = None if options.max_seconds is None else time.perf_counter() + options.max_seconds
    return a, w, weighted, _Budget(options.max_expansions, deadline), _Budget(options.tie_max_expansions, deadline)


def _solve_components(components, keep, sub, seed_local, w, weighted, budget, tie_budget, options,
                      conflicts: bool) -> CliqueResult:
    """Solve each component (positions into ``keep``) alone and join their cliques.

    ``sub`` is the graph (or, with ``conflicts``, the conflict graph) among
    ``keep``; ``seed_local`` the heuristic's clique as positions into ``keep``.
    """
    members, finished, canonical, upper = [], True, True, 0
    seed_local = np.asarray(seed_local, dtype=np.intp)
    for comp in components:
        idx = keep[comp]
        if len(comp) == 1:
            members.append(int(idx[0]))
            upper += 1
            continue
        comp_local = np.full(len(keep), -1, dtype=np.intp)
        comp_local[comp] = np.arange(len(comp))
        in_comp = comp_local[seed_local]
        part_seed = in_comp[in_comp >= 0]
        part = _solve_part(sub[comp][:, comp], w[idx], weighted, part_seed, budget, tie_budget, options,
                           conflicts=conflicts)
        members.extend(idx[part.members].tolist())
        finished &= part.finished
        canonical &= part.canonical
        upper += part.upper
    expansions = budget.used + tie_budget.used
    if not finished:
        return _result(members, w, False, False, expansions, max(upper, len(members)))
    return _result(members, w, True, canonical, expansions, len(members))


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
    a, w, weighted, budget, tie_budget = _start(adjacency, weights, options)
    n = a.shape[0]
    if n == 0:
        return _result([], w, True, True, 0, 0)
    g = _Graph(a, w, weighted)
    seed, seed_size, _ = _heuristic(g)
    # Every clique at least as large as the heuristic's lies among the
    # vertices of core number >= seed_size - 1; split those by the
    # components of their complement graph and solve each part alone.
    keep = np.flatnonzero(g.core >= seed_size - 1)
    seed_orig = np.sort(g.order[seed])
    local = np.full(n, -1, dtype=np.intp)
    local[keep] = np.arange(len(keep))
    sub = a if len(keep) == n else a[keep][:, keep]
    sub_bits = [_bits(sub.indices[sub.indptr[v] : sub.indptr[v + 1]], len(keep)) for v in range(len(keep))]
    return _solve_components(_complement_components(sub_bits, len(keep)), keep, sub, local[seed_orig], w, weighted,
                             budget, tie_budget, options, conflicts=False)


# --------------------------------------------------------------------------
# the same search, given the complement graph (the pairs that conflict)


def _peel_conflicts(c):
    """:func:`_peel` of the complement of the CSR graph ``c`` (same order and core numbers).

    A heap for sparse conflict graphs (O((n + m) log n), but a Python step
    per conflict), vectorised O(n^2 + m) steps when the conflicts are many
    (more than 16 per vertex: 1,000 vertices with 440,000 conflicts took
    1.2 s on the heap, 0.02 s vectorised).
    """
    if c.nnz > 16 * c.shape[0]:
        return _peel_conflicts_dense(c)
    return _peel_conflicts_heap(c)


def _peel_conflicts_dense(c):
    """:func:`_peel_conflicts` by one argmax over the vertices per step."""
    n = c.shape[0]
    left = np.diff(c.indptr).astype(np.int64)
    removed = -1  # below any live count
    core = np.zeros(n, dtype=np.int64)
    order = np.empty(n, dtype=np.intp)
    k = 0
    for step in range(n):
        v = int(np.argmax(left))  # most conflicts left = smallest degree; ties: smallest index
        k = max(k, n - step - 1 - int(left[v]))
        core[v] = k
        order[step] = v
        left[v] = removed
        nb = c.indices[c.indptr[v]:c.indptr[v + 1]]
        live = left[nb] >= 0
        left[nb[live]] -= 1
    return core, order


def _peel_conflicts_heap(c):
    """:func:`_peel` of the complement of the CSR graph ``c``, in O((n + m) log n).

    In the complement the remaining degree of v is ``remaining - 1 -
    conflicts_left(v)``, so the vertex of smallest degree is the one with the
    most conflicts left (ties: smallest index), and removing it lowers only
    its conflict neighbours' counts.  A heap with lazy deletion gives the
    same order and core numbers as the quadratic :func:`_peel` of the
    complement, without forming the complement.
    """
    import heapq

    n = c.shape[0]
    left = np.diff(c.indptr).astype(np.int64)
    heap = [(-int(d), v) for v, d in enumerate(left.tolist())]
    heapq.heapify(heap)
    alive = np.ones(n, dtype=bool)
    core = np.zeros(n, dtype=np.int64)
    order = np.empty(n, dtype=np.intp)
    indptr, indices = c.indptr, c.indices
    k = 0
    for step in range(n):
        while True:
            neg, v = heapq.heappop(heap)
            if alive[v] and -neg == left[v]:
                break
        remaining = n - step
        k = max(k, remaining - 1 - int(left[v]))
        core[v] = k
        order[step] = v
        alive[v] = False
        nb = indices[indptr[v]:indptr[v + 1]]
        nb = nb[alive[nb]]
        if len(nb):
            left[nb] -= 1
            for u, d in zip(nb.tolist(), left[nb].tolist()):
                heapq.heappush(heap, (-d, u))
    return core, order


def _heuristic_conflicts(c, core, order, w, weighted):
    """:func:`_heuristic` on the complement of ``c`` (positions as in :class:`_Graph`).

    Returns (clique as original vertex indices, size, weight).  Each start
    costs O(n + conflicts) instead of bitset operations over n bits; the
    loop is compiled (:mod:`closurecheck.verification._clique_kernels`).
    """
    n = c.shape[0]
    pos_order = np.ascontiguousarray(order[::-1], dtype=np.int64)
    pos = np.empty(n, dtype=np.int64)
    pos[pos_order] = np.arange(n)
    core_pos = np.ascontiguousarray(core[pos_order], dtype=np.int64)
    wpos = np.ascontiguousarray(w[pos_order], dtype=np.float64)
    best, best_size, best_w = greedy_starts(c.indptr, c.indices, pos, pos_order, core_pos, wpos,
                                            _HEURISTIC_STARTS, bool(weighted))
    return pos_order[best], int(best_size), float(best_w)


def max_clique_of_conflicts(conflicts, weights=None, options: CliqueOptions = CliqueOptions()) -> CliqueResult:
    """:func:`max_clique` of the complement of ``conflicts``, without forming it.

    Consistency graphs are nearly complete; what sets them apart is the
    sparse graph of the pairs that conflict (``PairConsistency.conflicts``).
    This runs the same steps as :func:`max_clique` on the complement (core
    numbers and peeling order, the greedy heuristic, the split into
    components of the conflict graph among the vertices that can still
    matter, each component searched exactly), so the result, members and
    flags, is the same as ``max_clique(complement)``; only the components
    of the conflict graph are ever made dense.  Time and memory grow with
    the vertices and conflicts; a component of the conflict graph with s
    vertices takes s^2 / 8 bytes of bitsets during its search (not a dense
    matrix and a CSR of its nearly complete complement).

    Parameters
    ----------
    conflicts : (n, n) scipy.sparse matrix or array
        Symmetric; a nonzero entry marks two vertices that are NOT adjacent
        in the graph whose clique is wanted; the diagonal is ignored.
    weights, options : as in :func:`max_clique`.

    Returns
    -------
    CliqueResult

    Examples
    --------
    >>> import numpy as np
    >>> conflicts = np.zeros((5, 5), dtype=bool)
    >>> conflicts[0, 3] = conflicts[3, 0] = True  # 0 and 3 disagree
    >>> max_clique_of_conflicts(conflicts).members.tolist()
    [0, 1, 2, 4]
    """
    from scipy.sparse.csgraph import connected_components

    c, w, weighted, budget, tie_budget = _start(conflicts, weights, options)
    n = c.shape[0]
    if n == 0:
        return _result([], w, True, True, 0, 0)
    core, order = _peel_conflicts(c)
    seed_orig, seed_size, _ = _heuristic_conflicts(c, core, order, w, weighted)
    keep = np.flatnonzero(core >= seed_size - 1)
    seed_orig = np.sort(seed_orig)
    local = np.full(n, -1, dtype=np.intp)
    local[keep] = np.arange(len(keep))
    sub = c if len(keep) == n else c[keep][:, keep]
    _, labels = connected_components(sub, directed=False)
    # Components in order of their smallest vertex, as _complement_components gives them.
    first_seen = np.full(labels.max() + 1, len(keep), dtype=np.int64)
    np.minimum.at(first_seen, labels, np.arange(len(keep)))
    comp_order = np.argsort(first_seen, kind="stable")
    by_label = np.argsort(labels, kind="stable")
    bounds = np.searchsorted(labels[by_label], np.arange(labels.max() + 2))
    components = (by_label[bounds[lab]:bounds[lab + 1]] for lab in comp_order.tolist())
    return _solve_components(components, keep, sub, local[seed_orig], w, weighted, budget, tie_budget, options,
                             conflicts=True)
