"""Gate candidates against the optimised map instead of raw odometry.

Once a core of verified closures has pinned the trajectory, the relative
pose between two keyframes is known far better from the optimised graph
than from the odometry chain alone.  The posterior covariance of the
relative pose ``x_i^-1 ∘ x_j`` follows from the inverse of the gauge-fixed
normal matrix H (Gauss-Newton's Laplace approximation):
``C = J [[S_ii, S_ij], [S_ji, S_jj]] J^T`` with ``S = H^-1`` and J the
Jacobian of ``between``.  Only the needed 3x3 blocks of ``H^-1`` are
computed, by sparse LU solves against block columns, so memory stays
O(N * block) rather than O(N^2).
"""

from __future__ import annotations

import numpy as np
import scipy.sparse.linalg

from . import se2
from .optimize import normal_matrix

_BLOCK_NODES = 128


def relative_posterior(poses, src, dst, delta, information, pair_i, pair_j):
    """Relative poses and their posterior covariances for node pairs.

    Parameters
    ----------
    poses : (N, 3) optimised poses (node 0 is the fixed gauge node).
    src, dst, delta, information : the graph's edges (see
        :func:`closurecheck.optimize.optimize_graph`).
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
    h, _ = normal_matrix(poses, src, dst, delta, information)
    lu = scipy.sparse.linalg.splu(h.tocsc(), permc_spec="MMD_AT_PLUS_A")
    m = h.shape[0] // 3  # variables are nodes 1..n-1 (node 0 is the gauge)
    if m != n - 1:
        raise ValueError("every node must be connected to node 0")

    diag = np.zeros((n, 3, 3))
    cross = np.zeros((len(pair_i), 3, 3))
    needed = np.unique(np.concatenate([pair_i, pair_j]))
    needed = needed[needed > 0]
    for start in range(0, len(needed), _BLOCK_NODES):
        nodes = needed[start:start + _BLOCK_NODES]
        rhs = np.zeros((3 * m, 3 * len(nodes)))
        cols = (3 * (nodes - 1))[:, None] + np.arange(3)
        rhs[cols.ravel(), np.arange(3 * len(nodes))] = 1.0
        x = lu.solve(rhs)  # columns of H^-1 for these nodes
        for k, node in enumerate(nodes):
            block = x[:, 3 * k:3 * k + 3]
            diag[node] = block[3 * (node - 1):3 * node]
            # Cross blocks S_ij for the pairs whose j is this node.
            sel = np.flatnonzero(pair_j == node)
            ii = pair_i[sel]
            ok = ii > 0
            rows = (3 * (ii[ok] - 1))[:, None] + np.arange(3)
            cross[sel[ok]] = block[rows]
    rel = se2.between(poses[pair_i], poses[pair_j])
    ja, jb = se2.between_jacobians(poses[pair_i], poses[pair_j])
    sii, sjj = diag[pair_i], diag[pair_j]
    sij = cross
    t = np.swapaxes
    cov = ja @ sii @ t(ja, -1, -2) + jb @ sjj @ t(jb, -1, -2) + ja @ sij @ t(jb, -1, -2) + jb @ t(sij, -1, -2) @ t(ja, -1, -2)
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
