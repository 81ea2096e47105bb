"""Sparse Levenberg-Marquardt on SE(2) pose graphs, with robust kernels, GNC and a final chi-square check.

The graph is given as plain arrays:

* ``poses`` (N, 3): initial absolute poses ``[x, y, theta]`` (m, m, rad) in
  one fixed world frame.
* ``src``, ``dst`` (E,): 0-based node indices of each edge.
* ``delta`` (E, 3): measured relative pose ``x_src^-1 ∘ x_dst`` in the frame
  of the ``src`` node.
* ``information`` (E, 3, 3): symmetric positive definite information of the
  delta, rows/columns ordered (x, y, theta), in the ``src`` frame
  (units 1/m^2, 1/(m rad), 1/rad^2).
* ``robust`` (E,) bool: edges that get the robust kernel or GNC weights
  (loop closures); the others (odometry) are plain least squares.

The edge error is ``e = between(x_src, x_dst) - delta`` with its angle wrapped
to (-pi, pi], so ``information`` applies to ``[x, y, theta]`` of the delta
exactly as the file format defines it.  Node 0 is held fixed (the gauge);
nodes that no edge connects to node 0 keep their initial poses.

The normalised residual of an edge is its Mahalanobis distance
``r = sqrt(e^T Omega e)`` (dimensionless); robust kernels and GNC act on it.

The public functions check their arrays (shapes, finite values, symmetric
positive definite information) and raise InputError; a caller that built
the arrays itself from checked data (the verification stage, which solves
the same graph many times) passes ``check=False`` and skips the checks,
among them an eigen-decomposition of every information matrix.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np
import scipy.sparse as sp
import scipy.sparse.csgraph as csgraph
import scipy.sparse.linalg as spla

from ..core import se2
from ..core.kernels import Kernel
from ..core.options import options, setting
from ..core.stats import POSE_DOF, chi2_threshold
from ..errors import InputError
from .ordering import nested_dissection_order, node_graph

# ---------------------------------------------------------------------------
# Options and results


@options
class SolverOptions:
    """Levenberg-Marquardt settings.

    max_iterations : linearisations at most.
    relative_cost_tolerance : stop when an accepted step lowers the cost by
        less than this fraction of the cost.  IRLS with a robust kernel
        converges linearly; 1e-8 leaves about 1e-4 m of position error on a
        5,000-node graph (measured), far below measurement noise.
    step_tolerance : stop when the largest update component is below this
        (metres for x, y; radians for theta).
    initial_damping : starting lambda, relative to the diagonal of J^T W J
        (Marquardt's scaling); small values start close to Gauss-Newton.
        On large graphs the default 1e-5 costs iterations: lambda times
        the diagonal holds back the long, flat deformations of the graph
        (the smallest eigenvalues of J^T W J are far below its diagonal),
        and falling by at most a third per accepted step it does so for
        many steps.  1e-10 reaches the same optimum (closer, in fact,
        under the same stopping rule) in 7 instead of 21 iterations at
        100,000 nodes from the odometry chain, 3 instead of 8 from
        :func:`closurecheck.graph.initial.heading_first_poses`, 4 instead
        of 6 at 5,000 nodes (benchmarks/optimizer.py), so 1e-10 is the
        default (it was 1e-5: the demo's verdicts stayed the same and its
        poses moved by at most 9 nm).  A rejected step still raises lambda.
    max_damping : give up (not converged) when rejected steps push lambda
        above this.
    linear_solver : ``"cholmod"`` (sparse Cholesky: CHOLMOD's supernodal
        factorisation through cvxopt, fill-reducing ordering and symbolic
        analysis once per sparsity pattern, a numeric refactorisation per
        solve; 0.38-0.40 of SuperLU's run time at 5,000 nodes and
        0.15-0.17 at 100,000, measured side by side in
        benchmarks/optimizer.py; docs/architecture.md says why this
        package),
        ``"splu"`` (factorise with SuperLU, ordering ``permc_spec``),
        ``"spsolve"``, or ``"splu_pcg"``: from the third
        solve of a run on, conjugate gradients preconditioned by the latest
        SuperLU factor (of an earlier iteration's matrix) instead of a new
        factorisation; refactorises when that takes more than
        ``pcg_max_iterations``.  Same optimum to round-off, not to the bit.
    pcg_tolerance : relative residual at which ``"splu_pcg"`` stops.
    pcg_max_iterations : conjugate-gradient iterations ``"splu_pcg"`` spends
        before it factorises afresh.  From the third LM iteration on, 5-12
        iterations reach 1e-12 with the previous iteration's factor at
        5,000 nodes, each about 7 ms (a product and a triangular solve
        pair) against 170-180 ms for a factorisation in the same loaded
        run; at 20,000 nodes 9-15 iterations of 40 ms against 1.4 s
        (measured, benchmarks/optimizer.py graphs).
    permc_spec : SuperLU column ordering for ``"splu"``.
    supernode_relax, panel_size : SuperLU's ``relax`` and ``panel_size``
        for ``"splu"``.  Pose graphs couple 3x3 node blocks with little
        fill, so small relaxed supernodes and panels (one node's 3 columns)
        factor faster than SuperLU's defaults: 6.5 instead of 11.3 ms per
        factorisation at 6,667 nodes (measured, benchmarks/verification_scaling.py
        graphs).
    """

    max_iterations: int = setting(100, at_least=0)
    relative_cost_tolerance: float = setting(1e-8, at_least=0.0)
    step_tolerance: float = setting(1e-9, at_least=0.0)
    initial_damping: float = setting(1e-10, at_least=0.0)
    max_damping: float = setting(1e12, at_least=0.0)
    linear_solver: str = setting("cholmod", choices=("cholmod", "splu", "spsolve", "splu_pcg"))
    permc_spec: str = setting("MMD_AT_PLUS_A", choices=("NATURAL", "MMD_ATA", "MMD_AT_PLUS_A", "COLAMD"))
    supernode_relax: int = setting(3, at_least=1)
    panel_size: int = setting(3, at_least=1)
    pcg_tolerance: float = setting(1e-12, above=0.0, below=1.0)
    pcg_max_iterations: int = setting(15, at_least=1)


@options
class GncOptions:
    """Graduated non-convexity settings (Yang, Antonante, Tzoumas, Carlone, RA-L 2020).

    surrogate : ``"geman_mcclure"`` or ``"truncated_least_squares"``.
    inlier_probability : the inlier bound ``c`` on the normalised residual is
        ``sqrt(chi2.ppf(inlier_probability, 3))`` unless ``inlier_bound`` is
        given.
    inlier_bound : explicit ``c`` (Mahalanobis distance, dimensionless).
    mu_factor : factor by which the control parameter mu moves per round
        (the paper uses 1.4).
    max_rounds : upper bound on weight updates.
    weight_tolerance : the TLS schedule stops once every weight is within
        this of 0 or 1.
    iterations_per_round : LM iterations of the weighted solve in each round
        (warm started; the paper solves each round to optimality, but one or
        two steps track the slowly moving optimum just as well here).
    solver : Levenberg-Marquardt settings of the initial least-squares solve
        and of the final solve with the last weights.
    """

    surrogate: str = setting("geman_mcclure", choices=("geman_mcclure", "truncated_least_squares"))
    inlier_probability: float = setting(0.99, above=0.0, below=1.0)
    inlier_bound: float | None = setting(None, above=0.0)
    mu_factor: float = setting(1.4, above=1.0)
    max_rounds: int = setting(200, at_least=0)
    weight_tolerance: float = setting(1e-6, at_least=0.0)
    iterations_per_round: int = setting(2, at_least=1)
    solver: SolverOptions = field(default_factory=SolverOptions)

    @property
    def bound(self) -> float:
        """Inlier bound c on the Mahalanobis distance."""
        if self.inlier_bound is not None:
            return float(self.inlier_bound)
        return float(np.sqrt(chi2_threshold(self.inlier_probability, POSE_DOF)))


def _readonly(a):
    a = np.array(a, copy=True)
    a.setflags(write=False)
    return a


@dataclass(frozen=True, eq=False)
class GraphSolution:
    """Result of optimising a pose graph.

    poses : (N, 3) optimised ``[x, y, theta]`` in the world frame of the
        input, theta wrapped to (-pi, pi]; node 0 equals its input.
    iterations : linearisations performed (summed over GNC rounds).
    cost : final cost, ``sum 0.5 r^2`` over plain edges plus the kernel cost
        ``rho(r)`` (or, for GNC, ``0.5 w r^2``) over robust edges.
    initial_cost : the same cost at the input poses.
    converged : True when a tolerance (not the iteration cap) ended the run.
    weights : (E,) final weight of each edge in [0, 1]: IRLS kernel weight or
        GNC weight for robust edges, 1 for plain edges, 0 for removed edges.
    residuals_sq : (E,) squared Mahalanobis distance ``e^T Omega e`` of each
        edge at ``poses`` (unweighted).
    """

    poses: np.ndarray
    iterations: int
    cost: float
    initial_cost: float
    converged: bool
    weights: np.ndarray
    residuals_sq: np.ndarray


@dataclass(frozen=True, eq=False)
class PruneResult:
    """Result of :func:`prune_inconsistent_edges`.

    solution : the final optimisation with the removed edges excluded (their
        weight is 0; their ``residuals_sq`` are still evaluated).
    kept : (E,) bool, False for removed edges.
    removed : (K,) edge indices in the order they were removed.
    removed_residuals_sq : (K,) squared Mahalanobis residual of each removed
        edge at the moment it was removed.
    threshold : the chi-square bound on ``e^T Omega e`` (3 DoF).
    """

    solution: GraphSolution
    kept: np.ndarray
    removed: np.ndarray
    removed_residuals_sq: np.ndarray
    threshold: float


# ---------------------------------------------------------------------------
# Validation (public boundary only)


def _validate(poses, src, dst, delta, information, robust):
    poses = np.asarray(poses, dtype=float)
    if poses.ndim != 2 or poses.shape[1] != 3 or len(poses) == 0:
        raise InputError(f"poses must have shape (N, 3) with N >= 1, got {poses.shape}")
    if not np.all(np.isfinite(poses)):
        raise InputError("poses contain non-finite values")
    n = len(poses)

    def index_array(a, name):
        a = np.asarray(a)
        if a.ndim != 1:
            raise InputError(f"{name} must be a 1-D array of node indices, got shape {a.shape}")
        if a.size and not np.issubdtype(a.dtype, np.integer):
            if not (np.issubdtype(a.dtype, np.floating) and np.all(np.isfinite(a)) and np.all(a == np.round(a))):
                raise InputError(f"{name} must hold integer node indices")
        a = a.astype(np.int64)
        bad = np.flatnonzero((a < 0) | (a >= n))
        if bad.size:
            raise InputError(f"{name}[{bad[0]}] = {a[bad[0]]} is not a node index in [0, {n})")
        return a

    src = index_array(src, "src")
    dst = index_array(dst, "dst")
    e = len(src)
    if len(dst) != e:
        raise InputError(f"src and dst differ in length ({e} vs {len(dst)})")
    same = np.flatnonzero(src == dst)
    if same.size:
        raise InputError(f"edge {same[0]} joins node {src[same[0]]} to itself")
    delta = np.asarray(delta, dtype=float)
    if delta.shape != (e, 3):
        raise InputError(f"delta must have shape ({e}, 3), got {delta.shape}")
    if not np.all(np.isfinite(delta)):
        raise InputError("delta contains non-finite values")
    information = np.asarray(information, dtype=float)
    if information.shape != (e, 3, 3):
        raise InputError(f"information must have shape ({e}, 3, 3), got {information.shape}")
    if not np.all(np.isfinite(information)):
        raise InputError("information contains non-finite values")
    if e:
        scale = np.abs(information).max(axis=(1, 2))
        asym = np.abs(information - np.swapaxes(information, 1, 2)).max(axis=(1, 2))
        bad = np.flatnonzero(asym > 1e-9 * np.maximum(scale, 1e-300))
        if bad.size:
            raise InputError(f"information of edge {bad[0]} is not symmetric")
        eig_min = np.linalg.eigvalsh(information)[:, 0]
        bad = np.flatnonzero(~(eig_min > 0))
        if bad.size:
            raise InputError(f"information of edge {bad[0]} is not positive definite "
                             f"(smallest eigenvalue {eig_min[bad[0]]:.3g})")
        # Symmetrise exactly so the normal matrix is symmetric to the last bit.
        information = 0.5 * (information + np.swapaxes(information, 1, 2))
    if robust is None:
        robust = np.ones(e, dtype=bool)
    else:
        robust = np.asarray(robust)
        if robust.shape != (e,):
            raise InputError(f"robust must have shape ({e},), got {robust.shape}")
        if robust.dtype != bool:
            if not np.all(np.isin(robust, (0, 1))):
                raise InputError("robust must be a boolean mask")
            robust = robust.astype(bool)
    return poses, src, dst, delta, information, robust


def _check_kernel(kernel):
    if kernel is not None and not isinstance(kernel, Kernel):
        raise InputError(f"kernel must be a closurecheck.core.kernels.Kernel or None, got {type(kernel).__name__}")


def _inputs(poses, src, dst, delta, information, robust, check: bool):
    """The arrays of a graph problem: validated at the public boundary, taken as they are from trusted callers."""
    if check:
        return _validate(poses, src, dst, delta, information, robust)
    e = len(src)
    return (np.asarray(poses, dtype=float), np.asarray(src, dtype=np.int64), np.asarray(dst, dtype=np.int64),
            np.asarray(delta, dtype=float), np.asarray(information, dtype=float),
            np.ones(e, dtype=bool) if robust is None else np.asarray(robust, dtype=bool))


# ---------------------------------------------------------------------------
# Problem internals (trust their inputs)


class _Layout:
    """Sparsity pattern of the gauge-fixed normal matrix and where each edge block lands.

    Variables are the nodes in ``free`` (3 per node, order x, y, theta).  The
    pattern never changes between iterations, so the scatter of the (E, 4, 3,
    3) edge blocks into CSC storage is computed once here and every iteration
    is a single ``np.bincount``.
    """

    def __init__(self, n_nodes, src, dst, free):
        var = np.full(n_nodes, -1, dtype=np.int64)
        n_free = int(np.count_nonzero(free))
        var[free] = np.arange(n_free)
        self.free = free
        self.size = POSE_DOF * n_free
        vi, vj = var[src], var[dst]
        k = np.arange(POSE_DOF)
        # Blocks per edge in the order (ii, ij, ji, jj).  The pattern is found
        # on 3x3 node blocks, a ninth of the keys to sort (0.4-0.5 s instead
        # of 2.0-3.9 s at 100,000 nodes and 200,000 edges; 15 instead of
        # 37-64 ms at 5,000; measured), and expanded: every block is dense,
        # so scalar column 3j+b holds rows 3i+a of each block row i of block
        # column j, in order, exactly as sorting the scalar entries would.
        brow = np.stack([vi, vi, vj, vj], axis=1)
        bcol = np.stack([vi, vj, vi, vj], axis=1)
        valid = (brow >= 0) & (bcol >= 0)
        self.block_valid = np.broadcast_to(valid[:, :, None, None], valid.shape + (POSE_DOF, POSE_DOF)).reshape(-1)
        mb = max(n_free, 1)
        ublocks, bslot = np.unique(bcol[valid] * mb + brow[valid], return_inverse=True)
        ub_row, ub_col = ublocks % mb, ublocks // mb
        per_col = np.bincount(ub_col, minlength=n_free)  # block rows in each block column
        block_ptr = np.zeros(n_free + 1, dtype=np.int64)
        np.cumsum(per_col, out=block_ptr[1:])
        rank = np.arange(len(ublocks)) - block_ptr[ub_col]
        # Position of entry (a, b) of unique block u in CSC data: the columns
        # before 3j hold 9 * block_ptr[j] entries, column 3j+b starts 3 * b *
        # per_col[j] later, and block u's rows come after 3 * rank[u] others.
        base = POSE_DOF * POSE_DOF * block_ptr[ub_col] + POSE_DOF * rank
        stride = POSE_DOF * per_col[ub_col]
        pos = base[:, None, None] + k[None, :, None] + k[None, None, :] * stride[:, None, None]  # (U, a, b)
        self.nnz = POSE_DOF * POSE_DOF * len(ublocks)
        slot = pos[bslot].reshape(-1)
        # The scatter as a 0/1 matrix: row = CSC slot, columns = the entries of the flat (E, 4, 3, 3) block
        # array that land there, ascending.  Its product with the flat blocks adds each slot's entries in
        # the order np.bincount(slot, weights=...) adds them (starting from 0, 1.0 * x exact), so the sums
        # are identical to the bit, without the masked copy of every block entry that bincount needed:
        # 0.033 instead of 0.058 s per assembly at 100,000 nodes, the layout no slower (0.56 s, made
        # once; measured on the benchmarks/optimizer.py graph, load 4).
        # scipy's COO to CSR conversion is a counting sort that keeps the input order within a row.
        self.scatter = sp.coo_matrix((np.ones(len(slot)), (slot, np.flatnonzero(self.block_valid))),
                                     shape=(self.nnz, self.block_valid.size)).tocsr()
        self.indices = np.empty(self.nnz, dtype=np.int32)
        self.indices[pos.reshape(-1)] = np.broadcast_to(POSE_DOF * ub_row[:, None, None] + k[None, :, None],
                                                        pos.shape).reshape(-1)
        self.indptr = np.empty(self.size + 1, dtype=np.int32)
        self.indptr[:-1] = (POSE_DOF * POSE_DOF * block_ptr[:-1, None]
                            + POSE_DOF * k[None, :] * per_col[:, None]).reshape(-1)
        self.indptr[-1] = self.nnz
        self.orderings = {}  # permc_spec -> (order, source slots, indices, indptr), filled by _splu_solve
        self.cholesky = None  # _Cholesky of this pattern, made by the first "cholmod" solve
        col_of = np.repeat(np.arange(self.size), np.diff(self.indptr))
        self.diag_slots = np.flatnonzero(self.indices == col_of)
        # Gradient scatter: (E, 2, 3) entries for nodes (src, dst).
        grow = POSE_DOF * np.stack([vi, vj], axis=1)[:, :, None] + k[None, None, :]
        self.grad_valid = (np.stack([vi, vj], axis=1)[:, :, None] >= 0).repeat(POSE_DOF, axis=2).reshape(-1)
        self.grad_rows = grow.reshape(-1)[self.grad_valid]

    def assemble(self, blocks):
        """CSC data array of the normal matrix from (E, 4, 3, 3) edge blocks."""
        return self.scatter @ blocks.reshape(-1)

    def csc(self, data):
        return sp.csc_matrix((data, self.indices, self.indptr), shape=(self.size, self.size))

    def gradient(self, gblocks):
        return np.bincount(self.grad_rows, weights=gblocks.reshape(-1)[self.grad_valid], minlength=self.size)


def _reachable_free(n_nodes, src, dst, active):
    """Nodes connected to node 0 through active edges, excluding node 0 itself."""
    a = sp.coo_matrix((np.ones(np.count_nonzero(active)), (src[active], dst[active])), shape=(n_nodes, n_nodes))
    _, labels = csgraph.connected_components(a, directed=False)
    free = labels == labels[0]
    free[0] = False
    return free


class _Graph:
    def __init__(self, poses, src, dst, delta, information, robust):
        self.n = len(poses)
        self.src, self.dst = src, dst
        self.delta, self.information, self.robust = delta, information, robust
        self._layout_key = self._layout = None

    def layout(self, active):
        """Layout for the nodes reachable through ``active`` edges; reused while that set is unchanged."""
        free = _reachable_free(self.n, self.src, self.dst, active)
        key = free.tobytes()
        if key != self._layout_key:
            self._layout_key, self._layout = key, _Layout(self.n, self.src, self.dst, free)
        return self._layout

    def errors(self, poses):
        pred = se2.between(poses[self.src], poses[self.dst])
        e = pred - self.delta
        e[:, 2] = se2.wrap(e[:, 2])
        s = np.einsum("ei,eij,ej->e", e, self.information, e)
        return e, s

    def linearise(self, poses, e, weights, layout):
        ja, jb = se2.between_jacobians(poses[self.src], poses[self.dst])
        w_info = weights[:, None, None] * self.information
        wa = w_info @ ja
        wb = w_info @ jb
        ja_t = np.swapaxes(ja, 1, 2)
        # Written in place rather than stacked: one pass over the (E, 4, 3, 3) array instead of two.
        blocks = np.empty((len(ja), 4, POSE_DOF, POSE_DOF))
        np.matmul(ja_t, wa, out=blocks[:, 0])
        np.matmul(ja_t, wb, out=blocks[:, 1])
        blocks[:, 2] = np.swapaxes(blocks[:, 1], 1, 2)
        np.matmul(np.swapaxes(jb, 1, 2), wb, out=blocks[:, 3])
        # W symmetric: J^T W e = (W J)^T e.
        gblocks = np.stack([np.einsum("eki,ek->ei", wa, e), np.einsum("eki,ek->ei", wb, e)], axis=1)
        return layout.assemble(blocks), layout.gradient(gblocks)


class _LinearSolver:
    """Solves the damped normal equations of one LM run; keeps the latest factor for ``"splu_pcg"``."""

    def __init__(self, layout, options):
        self.layout, self.options = layout, options
        self.factor = None  # solve function of the latest SuperLU factorisation
        self.factorisations = 0

    def __call__(self, data, rhs):
        options = self.options
        if options.linear_solver == "cholmod":
            if self.layout.cholesky is None:
                self.layout.cholesky = _Cholesky(self.layout)
            self.factorisations += 1
            x = self.layout.cholesky.solve(data, rhs)
            if not np.all(np.isfinite(x)):
                raise np.linalg.LinAlgError("non-finite solution")
            return x
        a = self.layout.csc(data)
        x = None
        if options.linear_solver == "spsolve":
            x = spla.spsolve(a, rhs, permc_spec=options.permc_spec)
        elif options.linear_solver == "splu_pcg" and self.factorisations >= 2:
            # The first steps move the poses most, so an old factor preconditions them poorly (78 iterations
            # at the second solve of the 5,000-node benchmark, 5-12 from the third on, measured).
            x, info = spla.cg(a, rhs, M=spla.LinearOperator(a.shape, matvec=self.factor, dtype=float),
                              rtol=options.pcg_tolerance, atol=0.0, maxiter=options.pcg_max_iterations)
            if info != 0:
                x = None
        if x is None:
            x, self.factor = _splu_solve(self.layout, a, rhs, options)
            self.factorisations += 1
        if not np.all(np.isfinite(x)):
            raise np.linalg.LinAlgError("non-finite solution")
        return x


class _Cholesky:
    """Sparse Cholesky ``A = P^T L L^T P`` of the matrices of one layout, by CHOLMOD (through cvxopt).

    The ordering and the symbolic analysis (elimination tree, supernodes)
    depend only on the sparsity pattern, which a layout fixes, so they are
    done once; each solve refactorises numerically into the same storage.
    The ordering is METIS's nested dissection of the nodes
    (:func:`closurecheck.graph.ordering.nested_dissection_order`), each
    node's three variables kept together, instead of CHOLMOD's own choice
    (AMD on these graphs): on the 100,000-node benchmark graph the same 7
    iterations took 7.3-7.5 s instead of 10.6-11.8 s (the same cost, poses
    within 3e-14 m), at 20,000 nodes 0.83-0.90 s instead of 0.93-0.99 s, at
    5,000 the same time (docs/performance.md, tenth round).  CHOLMOD reads the lower
    triangle in compressed-column order, as the layout stores it.

    The factorisation is supernodal ``L L^T`` whatever cvxopt's options say:
    a matrix that is not positive definite (a pivot <= 0) raises
    ``numpy.linalg.LinAlgError``; it never yields a solution.  The damped
    normal matrix is positive definite in exact arithmetic (node 0 fixes the
    gauge, only nodes connected to it are variables, and Marquardt's damping
    adds lambda times a positive diagonal), so this happens only with round-off
    on a nearly singular matrix (zero-weight edges, tiny lambda), and the
    Levenberg-Marquardt loop answers it by raising lambda, as it does for a
    SuperLU failure.
    """

    def __init__(self, layout):
        try:
            import cvxopt
            import cvxopt.cholmod
        except ImportError as exc:  # pragma: no cover - cvxopt is a dependency in pyproject.toml
            raise ImportError('linear_solver="cholmod" needs cvxopt (pip install cvxopt); '
                              'linear_solver="splu" works without it') from exc
        self._cvxopt, self._cholmod = cvxopt, cvxopt.cholmod
        col = np.repeat(np.arange(layout.size, dtype=np.int64), np.diff(layout.indptr))
        lower = np.flatnonzero(layout.indices >= col)
        # Build the matrix from its slot numbers and read them back in cvxopt's storage order, so the
        # map from the layout's data array does not rely on both orders agreeing.
        tagged = cvxopt.spmatrix(cvxopt.matrix((lower + 1).astype(float)),
                                 cvxopt.matrix(layout.indices[lower].astype(np.int64)), cvxopt.matrix(col[lower]),
                                 (layout.size, layout.size))
        self.slots = np.asarray(tagged.V, dtype=float).ravel().astype(np.int64) - 1
        self.matrix = tagged
        # Supernodal is always L L^T, which stops at a pivot <= 0.  CHOLMOD's simplicial form is L D L^T
        # and accepts an indefinite matrix without a word, so the choice cvxopt makes by default
        # (supernodal) is pinned here in case a caller changed cvxopt's global options.
        options = cvxopt.cholmod.options
        saved = dict(options)
        options["supernodal"] = 2
        pattern = sp.csc_matrix((np.ones(len(layout.indices), dtype=np.int8), layout.indices, layout.indptr),
                                shape=(layout.size, layout.size))
        nodes = nested_dissection_order(node_graph(pattern, POSE_DOF))
        perm = (POSE_DOF * nodes[:, None] + np.arange(POSE_DOF)).ravel()
        try:
            self.symbolic = cvxopt.cholmod.symbolic(tagged, p=cvxopt.matrix(perm.astype(int)), uplo="L")
        finally:
            options.clear()
            options.update(saved)

    def solve(self, data, rhs):
        """Factorise the layout's matrix with values ``data`` and solve it for ``rhs`` (1-D)."""
        cvxopt = self._cvxopt
        self.matrix.V = cvxopt.matrix(data[self.slots])
        try:
            self._cholmod.numeric(self.matrix, self.symbolic)
        except ArithmeticError as exc:
            raise np.linalg.LinAlgError(f"normal matrix is not positive definite (CHOLMOD stopped at column "
                                        f"{exc})") from exc
        x = cvxopt.matrix(np.asarray(rhs, dtype=float))
        self._cholmod.solve(self.symbolic, x)
        return np.asarray(x).ravel()


def _solve(layout, data, rhs, options):
    return _LinearSolver(layout, options)(data, rhs)


def _splu_solve(layout, a, rhs, options):
    """Solve with SuperLU; the fill-reducing ordering is computed once per layout and reused.

    The ordering depends only on the sparsity pattern, which a layout fixes,
    so later solves hand SuperLU the matrix already permuted (ordering
    ``NATURAL``) and skip the minimum-degree search (about a fifth of the
    factorisation time on pose graphs).  The damped normal matrix is
    symmetric positive definite: symmetric mode with diagonal pivoting keeps
    SuperLU's fill close to a Cholesky factor's.  Returns the solution and a
    function that applies the same factor to another right-hand side.
    """
    kwargs = {"diag_pivot_thresh": 0.0, "options": {"SymmetricMode": True}, "relax": options.supernode_relax,
              "panel_size": options.panel_size}
    cached = layout.orderings.get(options.permc_spec)
    if cached is None:
        lu = spla.splu(a, permc_spec=options.permc_spec, **kwargs)
        order = np.argsort(lu.perm_c)
        # Where each entry of the permuted matrix comes from in the layout's data array.
        tagged = sp.csc_matrix((np.arange(1, layout.nnz + 1, dtype=float), layout.indices, layout.indptr),
                               shape=(layout.size, layout.size))
        permuted = tagged[order][:, order].tocsc()
        permuted.sort_indices()
        layout.orderings[options.permc_spec] = (order, permuted.data.astype(np.int64) - 1, permuted.indices,
                                                permuted.indptr)
        return lu.solve(rhs), lu.solve
    order, source, indices, indptr = cached
    permuted = sp.csc_matrix((a.data[source], indices, indptr), shape=a.shape)
    lu = spla.splu(permuted, permc_spec="NATURAL", **kwargs)

    def solve(b):
        x = np.empty_like(b)
        x[order] = lu.solve(b[order])
        return x

    return solve(rhs), solve


def _more_damping(lam, nu):
    """Marquardt's increase after a rejected or failed step: lambda times nu, nu doubled.

    From lambda = 0 (``initial_damping=0``, pure Gauss-Newton) the product
    stays 0 and the loop would retry the same step forever; it restarts
    from the machine epsilon instead and grows as usual from there.
    """
    return (lam * nu if lam > 0.0 else np.finfo(float).eps), nu * 2.0


def _levenberg_marquardt(graph, poses, weight_fn, cost_fn, active, options):
    """Minimise ``cost_fn(s)`` by IRLS-weighted LM; ``weight_fn(s)`` gives per-edge weights.

    Returns (poses, iterations, cost, initial_cost, converged).
    """
    layout = graph.layout(active)
    x = poses.copy()
    x[:, 2] = se2.wrap(x[:, 2])
    e, s = graph.errors(x)
    cost = initial_cost = cost_fn(s)
    if layout.size == 0 or options.max_iterations == 0:
        return x, 0, cost, initial_cost, layout.size == 0
    free = layout.free
    solve = _LinearSolver(layout, options)
    lam, nu = options.initial_damping, 2.0
    converged = False
    iterations = 0
    need_linearise = True
    while iterations < options.max_iterations:
        if need_linearise:
            data, grad = graph.linearise(x, e, weight_fn(s), layout)
            iterations += 1
            diag = data[layout.diag_slots]
            # A floor keeps damping effective for a variable whose edges all
            # carry (near) zero weight.
            damp_diag = np.maximum(diag, 1e-12 * max(diag.max(), 1.0))
            need_linearise = False
        if not np.any(grad):
            converged = True
            break
        damped = data.copy()
        damped[layout.diag_slots] += lam * damp_diag
        try:
            step = solve(damped, -grad)
        except (RuntimeError, np.linalg.LinAlgError):
            lam, nu = _more_damping(lam, nu)
            if lam > options.max_damping:
                break
            continue
        x_new = x.copy()
        x_new[free] += step.reshape(-1, POSE_DOF)
        x_new[:, 2] = se2.wrap(x_new[:, 2])
        e_new, s_new = graph.errors(x_new)
        cost_new = cost_fn(s_new)
        # Decrease predicted by the damped quadratic model.
        predicted = 0.5 * step @ (lam * damp_diag * step - grad)
        actual = cost - cost_new
        small_step = np.max(np.abs(step)) <= options.step_tolerance
        if actual > 0 and predicted > 0:
            ratio = actual / predicted
            x, e, s = x_new, e_new, s_new
            old_cost, cost = cost, cost_new
            lam *= max(1.0 / 3.0, 1.0 - (2.0 * ratio - 1.0) ** 3)
            nu = 2.0
            need_linearise = True
            if actual <= options.relative_cost_tolerance * old_cost or small_step:
                converged = True
                break
        else:
            if small_step or cost <= 0.0:
                # No representable improvement left at this point.
                converged = True
                break
            lam, nu = _more_damping(lam, nu)
            if lam > options.max_damping:
                break
    return x, iterations, cost, initial_cost, converged


def _kernel_fns(graph, kernel, active):
    robust = graph.robust & active if kernel is not None else np.zeros_like(active)
    plain = active & ~robust

    def weight_fn(s):
        w = plain.astype(float)
        if kernel is not None:
            w[robust] = kernel.weight(np.sqrt(s[robust]))
        return w

    def cost_fn(s):
        c = 0.5 * np.sum(s[plain])
        if kernel is not None:
            c += np.sum(kernel.rho(np.sqrt(s[robust])))
        return float(c)

    return weight_fn, cost_fn


def _optimise(graph, poses, kernel, active, options):
    weight_fn, cost_fn = _kernel_fns(graph, kernel, active)
    x, its, cost, cost0, conv = _levenberg_marquardt(graph, poses, weight_fn, cost_fn, active, options)
    _, s = graph.errors(x)
    return GraphSolution(_readonly(x), its, cost, cost0, conv, _readonly(weight_fn(s)), _readonly(s))


# ---------------------------------------------------------------------------
# Public API


def edge_residuals(poses, src, dst, delta, information, *, check: bool = True):
    """Errors and squared Mahalanobis distances of every edge.

    Returns ``(e, s)``: ``e`` (E, 3) is ``between(x_src, x_dst) - delta``
    (m, m, rad; angle wrapped) in the ``src`` frame, ``s`` (E,) is
    ``e^T Omega e`` (dimensionless).
    """
    args = _inputs(poses, src, dst, delta, information, None, check)
    return _Graph(*args).errors(args[0])


def normal_matrix(poses, src, dst, delta, information, weights=None, *, check: bool = True):
    """Gauge-fixed normal equations ``(J^T W J, J^T W e)`` at ``poses``.

    Node 0 is removed (its three columns are not variables); variables are
    ordered by node index, then x, y, theta.  ``weights`` (E,) scale each
    edge's information (default 1).  Returns a ``scipy.sparse`` CSC matrix of
    shape (3M, 3M) and the gradient (3M,), where M is the number of nodes
    connected to node 0 (excluding it).
    """
    poses, src, dst, delta, information, robust = _inputs(poses, src, dst, delta, information, None, check)
    graph = _Graph(poses, src, dst, delta, information, robust)
    w = np.ones(len(src)) if weights is None else np.asarray(weights, dtype=float)
    if w.shape != (len(src),) or not np.all(np.isfinite(w)) or np.any(w < 0):
        raise InputError(f"weights must be {len(src)} finite non-negative numbers")
    layout = graph.layout(np.ones(len(src), dtype=bool))
    e, _ = graph.errors(poses)
    data, grad = graph.linearise(poses, e, w, layout)
    return layout.csc(data), grad


def optimize_graph(poses, src, dst, delta, information, robust=None, kernel: Kernel | None = None,
                   options: SolverOptions = SolverOptions(), *, check: bool = True) -> GraphSolution:
    """Optimise a pose graph by Levenberg-Marquardt with IRLS robust weights.

    Parameters follow the module docstring: ``poses`` (N, 3) initial world
    poses, ``src``/``dst`` (E,) node indices, ``delta`` (E, 3) measured
    ``x_src^-1 ∘ x_dst`` in the src frame, ``information`` (E, 3, 3) SPD in
    the src frame, ``robust`` (E,) bool (default: all edges) selecting the
    edges that ``kernel`` applies to.  With ``kernel=None`` every edge is
    plain least squares.  Node 0 stays fixed.

    The kernel acts on the Mahalanobis distance ``sqrt(e^T Omega e)``; each
    iteration reweights robust edges by ``kernel.weight`` at the current
    poses (iteratively reweighted least squares).
    """
    if check:
        _check_kernel(kernel)
    args = _inputs(poses, src, dst, delta, information, robust, check)
    graph = _Graph(*args)
    return _optimise(graph, args[0], kernel, np.ones(len(args[1]), dtype=bool), options)


def _gnc_weights(r2, mu, c2, surrogate):
    if surrogate == "geman_mcclure":
        return np.square(mu * c2 / (r2 + mu * c2))
    lower = mu / (mu + 1.0) * c2
    upper = (mu + 1.0) / mu * c2
    with np.errstate(divide="ignore"):
        middle = np.sqrt(c2 / r2 * mu * (mu + 1.0)) - mu
    return np.where(r2 <= lower, 1.0, np.where(r2 >= upper, 0.0, np.clip(middle, 0.0, 1.0)))


def optimize_gnc(poses, src, dst, delta, information, robust=None,
                 options: GncOptions = GncOptions(), *, check: bool = True) -> GraphSolution:
    """Optimise with graduated non-convexity on the robust edges.

    Yang, Antonante, Tzoumas and Carlone, "Graduated Non-Convexity for Robust
    Spatial Perception: From Non-Minimal Solvers to Global Outlier
    Rejection", RA-L 2020.  Starting from the least-squares solution, the
    robust edges get weights from a surrogate of the Geman-McClure or
    truncated-least-squares cost whose non-convexity grows with each round
    (control parameter mu); each round solves the weighted least-squares
    problem by LM, warm started.  The surrogate acts on the Mahalanobis
    distance ``r`` with inlier bound ``c = options.bound``.  Plain edges
    (``robust`` False) keep weight 1.

    Returns a :class:`GraphSolution` whose ``weights`` hold the final GNC
    weight of each robust edge in [0, 1] (near 0: outlier).
    """
    args = _inputs(poses, src, dst, delta, information, robust, check)
    graph = _Graph(*args)
    e_count = len(args[1])
    active = np.ones(e_count, dtype=bool)
    robust = graph.robust
    c2 = options.bound ** 2
    weights = np.ones(e_count)

    def fixed(w):
        return (lambda s: w), (lambda s: float(0.5 * np.sum(w * s)))

    wf, cf = fixed(weights)
    x, total_its, cost, initial_cost, conv = _levenberg_marquardt(graph, args[0], wf, cf, active, options.solver)
    _, s = graph.errors(x)
    if np.any(robust):
        r2 = s[robust]
        r2_max = float(r2.max())
        if options.surrogate == "geman_mcclure":
            mu = max(2.0 * r2_max / c2, 1.0)
        else:
            # All residuals inside the bound: least squares is already the answer.
            mu = c2 / (2.0 * r2_max - c2) if 2.0 * r2_max > c2 else None
        rounds = 0
        per_round = replace(options.solver, max_iterations=options.iterations_per_round)
        while mu is not None and rounds < options.max_rounds:
            rounds += 1
            weights = np.ones(e_count)
            weights[robust] = _gnc_weights(s[robust], mu, c2, options.surrogate)
            wf, cf = fixed(weights)
            x, its, cost, _, conv = _levenberg_marquardt(graph, x, wf, cf, active, per_round)
            total_its += its
            _, s = graph.errors(x)
            if options.surrogate == "geman_mcclure":
                if mu <= 1.0:
                    break
                mu = max(mu / options.mu_factor, 1.0)
            else:
                wr = weights[robust]
                if np.all(np.minimum(wr, 1.0 - wr) <= options.weight_tolerance):
                    break
                mu *= options.mu_factor
        if rounds:
            # Converge the weighted problem at the final weights.
            x, its, cost, _, conv = _levenberg_marquardt(graph, x, wf, cf, active, options.solver)
            total_its += its
            _, s = graph.errors(x)
    return GraphSolution(_readonly(x), total_its, float(cost), float(initial_cost), bool(conv),
                         _readonly(weights), _readonly(s))


def prune_inconsistent_edges(poses, src, dst, delta, information, robust=None, kernel: Kernel | None = None,
                             probability: float = 0.99, options: SolverOptions = SolverOptions(), *,
                             check: bool = True) -> PruneResult:
    """Final check: drop robust edges whose residual fails a chi-square test, worst first.

    Optimises the graph (with ``kernel`` on robust edges, or plain least
    squares), computes each kept robust edge's squared Mahalanobis residual
    ``e^T Omega e`` and compares it with ``chi2.ppf(probability, 3)``.  While
    any fails, the worst one is removed and the graph re-optimised (warm
    started).  Plain edges (odometry) are never removed.

    Returns a :class:`PruneResult` with the removal order and the residual
    of each removed edge when it was removed.
    """
    if check:
        _check_kernel(kernel)
    threshold = chi2_threshold(probability, POSE_DOF)
    args = _inputs(poses, src, dst, delta, information, robust, check)
    graph = _Graph(*args)
    kept = np.ones(len(args[1]), dtype=bool)
    removed, removed_s = [], []
    x = args[0]
    total_its = 0
    initial_cost = None
    while True:
        sol = _optimise(graph, x, kernel, kept, options)
        total_its += sol.iterations
        if initial_cost is None:
            initial_cost = sol.initial_cost
        x = sol.poses
        candidates = np.flatnonzero(kept & graph.robust)
        s = sol.residuals_sq[candidates]
        failing = s > threshold
        if not np.any(failing):
            break
        worst = candidates[np.argmax(np.where(failing, s, -np.inf))]
        removed.append(int(worst))
        removed_s.append(float(sol.residuals_sq[worst]))
        kept[worst] = False
    final = GraphSolution(sol.poses, total_its, sol.cost, initial_cost, sol.converged, sol.weights, sol.residuals_sq)
    return PruneResult(final, _readonly(kept), _readonly(np.array(removed, dtype=np.int64)),
                       _readonly(np.array(removed_s, dtype=float)), threshold)
