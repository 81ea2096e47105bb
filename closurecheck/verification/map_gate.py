"""Gate candidates against the optimised map instead of raw odometry.

Once a core of verified closures has pinned the trajectory, the relative
pose between two keyframes is known far better from the optimised graph
than from the odometry chain alone.  The posterior covariance of the
relative pose ``x_i^-1 ∘ x_j`` follows from the inverse of the gauge-fixed
normal matrix H (Gauss-Newton's Laplace approximation):
``C = J [[S_ii, S_ij], [S_ji, S_jj]] J^T`` with ``S = H^-1`` and J the
Jacobian of ``between``.  Only the needed 3x3 blocks of ``H^-1`` are
computed (:mod:`closurecheck.graph.selected_inverse`: a block LDL^T factor in
nested-dissection order and the columns of its inverse factor along the
elimination tree), so time and memory stay near-linear in N rather than
O(N^2).
"""

from __future__ import annotations

import numpy as np

from ..core import se2
from ..graph.selected_inverse import inverse_blocks
from ..graph.solver import normal_matrix


def _posterior_blocks(h, pair_i, pair_j):
    """Blocks ``S_ii, S_jj, S_ij`` of ``S = H^-1`` for node pairs (node 0, the gauge, has S = 0).

    H is the gauge-fixed normal matrix (variables: nodes 1..n-1).  The blocks
    come from :func:`closurecheck.graph.selected_inverse.inverse_blocks`, whose
    time grows with the graph's size times its elimination-tree depth, not
    with the graph's size times the number of nodes asked for; its memory
    with the factor and the depth of the nodes asked for.
    """
    if h.shape[0] == 0:
        zero = np.zeros((len(pair_i), 3, 3))
        return zero, zero.copy(), zero.copy()
    gauge_i, gauge_j = pair_i == 0, pair_j == 0
    vi, vj = np.maximum(pair_i - 1, 0), np.maximum(pair_j - 1, 0)
    p = len(pair_i)
    blocks = inverse_blocks(h, 3, np.concatenate([vi, vj, vi]), np.concatenate([vi, vj, vj]))
    sii, sjj, sij = blocks[:p], blocks[p:2 * p], blocks[2 * p:]
    sii[gauge_i] = 0.0
    sjj[gauge_j] = 0.0
    sij[gauge_i | gauge_j] = 0.0
    return sii, sjj, sij


def relative_posterior(poses, src, dst, delta, information, pair_i, pair_j):
    """Relative poses and their posterior covariances for node pairs.

    Parameters
    ----------
    poses : (N, 3) optimised poses (node 0 is the fixed gauge node).
    src, dst, delta, information : the graph's edges (see
        :func:`closurecheck.graph.solver.optimize_graph`).
    pair_i, pair_j : (P,) node indices.

    Returns
    -------
    rel : (P, 3) ``poses[i]^-1 ∘ poses[j]`` in the frame of i.
    cov : (P, 3, 3) its posterior covariance on [x, y, theta], frame of i.
    """
    poses = np.asarray(poses, dtype=float)
    n = len(poses)
    pair_i = np.asarray(pair_i, dtype=np.intp)
    pair_j = np.asarray(pair_j, dtype=np.intp)
    h, _ = normal_matrix(poses, src, dst, delta, information, check=False)
    m = h.shape[0] // 3  # variables are nodes 1..n-1 (node 0 is the gauge)
    if m != n - 1:
        raise ValueError("every node must be connected to node 0")
    sii, sjj, sij = _posterior_blocks(h, pair_i, pair_j)
    rel = se2.between(poses[pair_i], poses[pair_j])
    ja, jb = se2.between_jacobians(poses[pair_i], poses[pair_j])
    t = np.swapaxes
    cov = (ja @ sii @ t(ja, -1, -2) + jb @ sjj @ t(jb, -1, -2) + ja @ sij @ t(jb, -1, -2)
           + jb @ t(sij, -1, -2) @ t(ja, -1, -2))
    return rel, 0.5 * (cov + t(cov, -1, -2))


def map_gate_distance(rel, rel_cov, measured, measured_cov):
    """Squared Mahalanobis distance of measured deltas from the map's relative poses.

    The error is ``between(rel, measured)``; its covariance is the
    first-order sum of the map's and the measurement's (independent).
    """
    err = se2.between(rel, measured)
    j_rel, j_meas = se2.between_jacobians(rel, measured)
    t = np.swapaxes
    s = j_rel @ rel_cov @ t(j_rel, -1, -2) + j_meas @ measured_cov @ t(j_meas, -1, -2)
    return se2.mahalanobis_sq(err, 0.5 * (s + t(s, -1, -2)))
