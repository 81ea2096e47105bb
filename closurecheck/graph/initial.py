"""A starting point for the optimiser from two linear problems: headings first, then positions.

Levenberg-Marquardt started from the odometry chain pays for the chain's
drift: at 100,000 nodes the chain is 56 m (RMS) from the truth and the
heading errors make the problem strongly non-linear (21 iterations with the
default damping, benchmarks/optimizer.py).  Fixing the headings first turns
the rest into a linear problem, as in the two linear stages of Carlone,
Aragues, Castellanos and Bona, "A fast and accurate approximation for planar
pose graph optimization", IJRR 2014:

1. headings: weighted least squares on the measured heading differences
   ``theta_dst - theta_src = delta_theta + 2 pi k``, where ``k`` is the
   integer that brings the measurement closest to the difference of the
   initial headings (the paper regularises against a spanning tree; the
   odometry chain is one);
2. positions: with those headings fixed, ``t_dst - t_src = R(theta_src)
   delta_xy`` is linear in the positions; weighted least squares with the
   translation block of each edge's covariance, rotated into the world
   frame.

Both are sparse symmetric positive definite solves (CHOLMOD through cvxopt).
The result is a start, not an optimum: hand it to
:func:`closurecheck.graph.solver.optimize_graph`.  Every edge counts fully,
so a wrong loop closure bends the start as much as it would bend a least
squares solution; use it on edges that have been checked.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp

from ..core import se2
from .solver import _inputs, _reachable_free


def _spd_solve(a, b):
    """Solve ``a x = b`` for a scipy sparse SPD ``a`` and a 2-D ``b`` with CHOLMOD (cvxopt)."""
    import cvxopt
    import cvxopt.cholmod

    low = sp.tril(a, format="coo")
    k = cvxopt.spmatrix(cvxopt.matrix(low.data), cvxopt.matrix(low.row.astype(np.int64)),
                        cvxopt.matrix(low.col.astype(np.int64)), low.shape)
    x = cvxopt.matrix(np.asarray(b, dtype=float))
    options = cvxopt.cholmod.options
    saved = dict(options)
    options["supernodal"] = 2  # L L^T: refuses a matrix that is not positive definite instead of solving it
    try:
        cvxopt.cholmod.linsolve(k, x)
    finally:
        options.clear()
        options.update(saved)
    return np.asarray(x)


def _difference_least_squares(var, n_var, src, dst, w, b, known):
    """Minimise ``sum_e (x_dst - x_src - b_e)^T w_e (x_dst - x_src - b_e)`` over the free nodes.

    var (N,): variable index of each node, -1 for a node held at ``known``
    (N, d).  w (E, d, d) SPD, b (E, d).  Edges with no free end must be
    left out by the caller.  Returns (n_var, d).
    """
    d = b.shape[1]
    vi, vj = var[src], var[dst]
    fixed_i, fixed_j = vi < 0, vj < 0
    bb = b.copy()
    bb[fixed_i] += known[src[fixed_i]]
    bb[fixed_j] -= known[dst[fixed_j]]
    wb = np.einsum("eab,eb->ea", w, bb)
    k = np.arange(d)
    rhs = np.zeros((n_var, d))
    for a in range(d):
        rhs[:, a] = (np.bincount(vj[~fixed_j], weights=wb[~fixed_j, a], minlength=n_var)
                     - np.bincount(vi[~fixed_i], weights=wb[~fixed_i, a], minlength=n_var))
    # Blocks (ii, +w), (jj, +w), (ij, -w), (ji, -w) of each edge, those with both ends free.
    rows, cols, vals = [], [], []
    for p, q, sign in ((vi, vi, 1.0), (vj, vj, 1.0), (vi, vj, -1.0), (vj, vi, -1.0)):
        ok = (p >= 0) & (q >= 0)
        rows.append((d * p[ok, None, None] + k[None, :, None]).repeat(d, axis=2).reshape(-1))
        cols.append((d * q[ok, None, None] + k[None, None, :]).repeat(d, axis=1).reshape(-1))
        vals.append(sign * w[ok].reshape(-1))
    size = d * n_var
    a = sp.coo_matrix((np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))), shape=(size, size))
    return _spd_solve(a.tocsc(), rhs.reshape(-1, 1)).reshape(n_var, d)


def heading_first_poses(poses, src, dst, delta, information, *, check: bool = True):
    """Start poses from a linear heading estimate, then a linear position estimate given those headings.

    Parameters
    ----------
    poses : (N, 3) array
        Initial world poses ``[x, y, theta]`` (m, m, rad), typically the
        odometry chain.  Node 0 keeps its pose (the gauge); the headings
        only choose the multiple of 2 pi of each measured heading
        difference, the positions are not used for the free nodes.
    src, dst : (E,) int arrays
        Edge ends (0-based node indices).
    delta : (E, 3) array
        Measured ``x_src^-1 ∘ x_dst`` in the src frame (m, m, rad).
    information : (E, 3, 3) array
        SPD information of each delta, in the src frame.
    check : bool
        Validate the arrays (the optimiser's checks); False for trusted
        callers.

    Returns
    -------
    (N, 3) array
        World poses, theta wrapped to (-pi, pi].  Nodes no edge path joins
        to node 0 keep their input poses.  With measurements that agree
        exactly (no noise) and initial headings within pi of the truth
        along every edge, this is the truth.

    Examples
    --------
    >>> import numpy as np
    >>> from closurecheck.graph.initial import heading_first_poses
    >>> delta = np.array([[1.0, 0.0, 2 * np.pi / 3]] * 3)   # round a triangle with 1 m sides
    >>> src, dst = np.arange(3), np.array([1, 2, 0])
    >>> info = np.tile(np.eye(3), (3, 1, 1))
    >>> odometry = np.array([[0.0, 0.0, 0.0], [1.1, 0.1, 2.2], [0.4, 1.0, -2.0]])
    >>> np.round(heading_first_poses(odometry, src, dst, delta, info), 6) + 0.0
    array([[ 0.      ,  0.      ,  0.      ],
           [ 1.      ,  0.      ,  2.094395],
           [ 0.5     ,  0.866025, -2.094395]])
    """
    poses, src, dst, delta, information, _ = _inputs(poses, src, dst, delta, information, None, check)
    n = len(poses)
    out = poses.copy()
    out[:, 2] = se2.wrap(out[:, 2])
    free = _reachable_free(n, src, dst, np.ones(len(src), dtype=bool))
    n_var = int(np.count_nonzero(free))
    if n_var == 0:
        return out
    var = np.full(n, -1, dtype=np.int64)
    var[free] = np.arange(n_var)
    # Edges between nodes cut off from node 0 play no part; every other edge has a free end.
    use = free[src] | free[dst]
    src, dst, delta = src[use], dst[use], delta[use]
    cov = np.linalg.inv(information[use])
    theta0 = out[:, 2]
    turns = np.round((theta0[dst] - theta0[src] - delta[:, 2]) / (2.0 * np.pi))
    measured = delta[:, 2] + 2.0 * np.pi * turns
    # Heading stage: the marginal variance of each measured heading difference.
    theta = theta0.copy()
    theta[free] = _difference_least_squares(var, n_var, src, dst, 1.0 / cov[:, 2:3, 2:3], measured[:, None],
                                            theta0[:, None])[:, 0]
    # Position stage: t_dst - t_src = R(theta_src) delta_xy, information (R cov_xy R^T)^-1 = R cov_xy^-1 R^T.
    rot = se2.rotation(theta[src])
    step = np.einsum("eij,ej->ei", rot, delta[:, :2])
    w_xy = rot @ np.linalg.inv(cov[:, :2, :2]) @ np.swapaxes(rot, 1, 2)
    w_xy = 0.5 * (w_xy + np.swapaxes(w_xy, 1, 2))
    out[free, :2] = _difference_least_squares(var, n_var, src, dst, w_xy, step, out[:, :2])
    out[free, 2] = se2.wrap(theta[free])
    return out
