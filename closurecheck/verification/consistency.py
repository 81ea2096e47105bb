"""Consistency checks for loop-closure candidates against odometry and each other.

Two tests decide which registered loop closures can be trusted together:

* :func:`odometry_gate` compares each closure with the relative pose that the
  odometry chain predicts between its two nodes (chi-square test on the
  squared Mahalanobis distance, 3 degrees of freedom).
* :func:`pairwise_consistency` is the pairwise test of PCM (Mangelson, Cheng,
  Ozog, Ng, Eustice, "Pairwise Consistent Measurement Set Maximization for
  Robust Multi-robot Map Merging", ICRA 2018): two closures are consistent
  when the cycle they close through the odometry composes to the identity
  within its propagated uncertainty.  The largest mutually consistent set is
  then a maximum clique of the resulting graph (:mod:`closurecheck.verification.clique`).

Inputs are plain arrays.  A closure k joins keyframe-chain nodes ``src[k]``
and ``dst[k]`` (0-based indices into ``poses``, either order), with the
registered delta ``deltas[k] = src^-1 ∘ dst`` (metres, metres, radians, in the
src frame) and its covariance ``covariances[k]`` on ``[x, y, theta]`` in the
src frame.  The odometry chain is ``poses`` (N, 3) in one fixed frame plus
``prefix = se2.chain_prefix(poses, step_covariances)``.

The PCM test first turns every closure to run from its earlier to its later
node, so the result does not depend on the direction a registration ran and
the cycle uses the shortest odometry segments (see :func:`pair_distances`).

Independence assumptions (first order throughout): registration errors of
different closures are independent of each other and of the odometry; the
odometry steps are independent of each other.  Nothing else is assumed: in
particular when the two odometry segments of a PCM cycle share steps, their
correlation is accounted for exactly (to first order) by default, see
:func:`pair_distances`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse

from ..core import se2
from ..core.odometry import odometry_travel
from ..core.options import options, setting
from ..core.stats import chi2_threshold
from ..errors import InputError
from . import _pcm_kernels

__all__ = [
    "ConsistencyOptions",
    "OdometryGate",
    "PairConsistency",
    "odometry_gate",
    "pair_distances",
    "pairwise_consistency",
]


@options
class ConsistencyOptions:
    """Thresholds of the consistency checks.

    gate_probability:
        Probability mass of chi-square(3) accepted by the odometry gate; a
        correct closure fails it with probability ``1 - gate_probability``.
    pair_probability:
        The same for the pairwise (PCM) cycle test.
    informative_max_std_m:
        The odometry gate only says something when the chain between the two
        nodes is well known: above this positional standard deviation (metres,
        square root of the largest eigenvalue of the predicted delta's xy
        covariance) the gate is reported as not informative.
    informative_max_std_rad:
        The same bound on the predicted heading's standard deviation (radians).
    pair_shared_odometry:
        True: account for odometry steps shared by the two segments of a PCM
        cycle (exact first-order covariance).  False: treat the two segments as
        independent, as is common practice in PCM implementations; with the
        orientation used here (see pair_distances) overlapping segments run in
        opposite directions, so this overstates the cycle covariance.
    pairs_per_block:
        Pairs evaluated per vectorised block where pairs are listed (the
        window's candidate pairs, the dense reference); bounds the working
        memory (roughly 1 kB per pair).  The exhaustive test runs in one
        compiled loop that needs no block.
    pair_window_m:
        Test only pairs whose two cycle segments (earlier end to earlier
        end, later end to later end) are each at most this many metres of
        odometry path long; None tests every pair.  Untested pairs count as
        consistent.  The number of tested pairs then grows with the number
        of closures times the closures in a window, not with its square
        (see :func:`pairwise_consistency`).
    """

    gate_probability: float = setting(0.99, above=0.0, below=1.0)
    pair_probability: float = setting(0.99, above=0.0, below=1.0)
    informative_max_std_m: float = setting(1.0, above=0.0)
    informative_max_std_rad: float = setting(0.25, above=0.0)
    pair_shared_odometry: bool = setting(True)
    pairs_per_block: int = setting(100_000, at_least=1)
    pair_window_m: float | None = setting(None, above=0.0)


@dataclass(frozen=True)
class OdometryGate:
    """Per-closure result of :func:`odometry_gate` (K closures).

    distance_sq: (K,) squared Mahalanobis distance (dimensionless).
    threshold: chi-square(3) quantile at ``gate_probability``.
    passed: (K,) ``distance_sq <= threshold``.
    informative: (K,) the odometry chain is tight enough for the gate to
        mean something; a verdict should rely on ``passed`` only where this
        is True.
    predicted: (K, 3) odometry-predicted delta ``src^-1 ∘ dst`` in the src frame.
    predicted_covariance: (K, 3, 3) its covariance on [x, y, theta], src frame.
    chain_std_m: (K,) positional standard deviation of the prediction (metres).
    chain_std_rad: (K,) heading standard deviation of the prediction (radians).
    """

    distance_sq: np.ndarray
    threshold: float
    passed: np.ndarray
    informative: np.ndarray
    predicted: np.ndarray
    predicted_covariance: np.ndarray
    chain_std_m: np.ndarray
    chain_std_rad: np.ndarray


@dataclass(frozen=True)
class PairConsistency:
    """Result of :func:`pairwise_consistency` for K closures.

    conflicts: (K, K) ``scipy.sparse.csr_array`` of bool, symmetric, empty
        diagonal; True where the pair was tested and failed.  Memory grows
        with the number of failing pairs, never with K^2.
    support: (K,) int array, the number of other closures each one is
        consistent with (K - 1 minus its conflicts; untested pairs count as
        consistent).
    pairs_tested: number of unordered pairs tested.
    exhaustive: True when every pair was tested (no window, or a window
        that held every pair).
    threshold: chi-square(3) quantile at ``pair_probability``.
    """

    conflicts: scipy.sparse.csr_array
    support: np.ndarray
    pairs_tested: int
    exhaustive: bool
    threshold: float

    def adjacency(self) -> scipy.sparse.csr_array:
        """The consistency graph itself, (K, K) CSR of bool (the complement of ``conflicts``).

        Holds about K^2 entries: for small K (tests, plots); the
        verification reads ``conflicts``.
        """
        k = self.conflicts.shape[0]
        dense = ~self.conflicts.toarray()
        np.fill_diagonal(dense, False)
        return scipy.sparse.csr_array(dense) if k else scipy.sparse.csr_array((0, 0), dtype=bool)


@dataclass(frozen=True)
class _DensePairs:
    """Result of :func:`_pairwise_consistency_dense`, the exhaustive reference.

    adjacency: (K, K) CSR of bool, True where the pair passes.
    distance_sq: (K, K) dense float32 squared Mahalanobis distances (value
        of i < j mirrored), zero on the diagonal.
    threshold: chi-square(3) quantile at ``pair_probability``.
    """

    adjacency: scipy.sparse.csr_array
    distance_sq: np.ndarray
    threshold: float


# --------------------------------------------------------------------------
# inputs (the verification stage hands over checked arrays)


def _arrays(src, dst, deltas, covariances, poses, prefix):
    """The closure and chain arrays as float/int arrays, covariances symmetrised to the last bit."""
    covariances = np.asarray(covariances, dtype=float)
    return (np.asarray(src, dtype=np.intp), np.asarray(dst, dtype=np.intp), np.asarray(deltas, dtype=float),
            0.5 * (covariances + np.swapaxes(covariances, 1, 2)), np.asarray(poses, dtype=float),
            np.asarray(prefix, dtype=float))


# --------------------------------------------------------------------------
# small vectorised helpers


def _t(m):
    return np.swapaxes(m, -1, -2)


def _quad_inv_sym3(c, h):
    """``h^T C^-1 h`` for stacks of symmetric positive definite 3x3 C.

    The adjugate formula is elementwise, several times faster than a batched
    LAPACK solve on tiny matrices.
    """
    entries = (c[..., 0, 0], c[..., 0, 1], c[..., 0, 2], c[..., 1, 1], c[..., 1, 2], c[..., 2, 2])
    return _quad_inv_entries(entries, h[..., 0], h[..., 1], h[..., 2])


def _quad_inv_entries(c, x, y, z):
    """``h^T C^-1 h`` from C's six upper-triangle entries and h's components (arrays)."""
    a, b, cc, d, e, f = c
    A = d * f - e * e
    B = cc * e - b * f
    C = b * e - cc * d
    D = a * f - cc * cc
    E = b * cc - a * e
    F = a * d - b * b
    det = a * A + b * B + cc * C
    num = A * x * x + D * y * y + F * z * z + 2.0 * (B * x * y + C * x * z + E * y * z)
    return num / det


# --------------------------------------------------------------------------
# odometry gate


def _predicted(poses, prefix, src, dst):
    """Odometry prediction of ``src^-1 ∘ dst`` and its covariance in the src frame."""
    lo = np.minimum(src, dst)
    hi = np.maximum(src, dst)
    delta, cov = se2.chain_relative(poses, prefix, lo, hi)
    flip = src > dst
    if np.any(flip):
        # chain_relative needs lo <= hi: for src > dst it returns dst^-1 ∘ src
        # in the dst frame; the wanted delta is its inverse, whose covariance
        # follows through the Jacobian of inversion, J = d inv(p) / dp
        # (= the first Jacobian of between(p, identity)).
        d = delta[flip]
        j_inv = se2.inverse_jacobian(d)
        delta = delta.copy()
        cov = cov.copy()
        delta[flip] = se2.inverse(d)
        cov[flip] = j_inv @ cov[flip] @ _t(j_inv)
    return delta, 0.5 * (cov + _t(cov))


def odometry_gate(src, dst, deltas, covariances, poses, prefix, options: ConsistencyOptions = ConsistencyOptions()):
    """Chi-square gate of each loop closure against the odometry prediction.

    Parameters
    ----------
    src, dst : (K,) int arrays
        Node indices into ``poses``; any order (src > dst is allowed).
    deltas : (K, 3) array
        Registered ``src^-1 ∘ dst`` [m, m, rad] in the src frame.
    covariances : (K, 3, 3) array
        Their covariances on [x, y, theta] in the src frame (SPD).
    poses : (N, 3) array
        Odometry keyframe poses in one fixed frame.
    prefix : (N, 3, 3) array
        ``se2.chain_prefix(poses, step_covariances)``.
    options : ConsistencyOptions

    Returns
    -------
    OdometryGate
        The error is ``e = between(predicted, delta)`` (the measured delta seen
        from the predicted one, [m, m, rad]); its covariance is the first-order
        sum of the measurement's and the odometry chain's contributions
        (independent), and ``distance_sq = e^T S^-1 e``.
    """
    src, dst, deltas, covariances, poses, prefix = _arrays(src, dst, deltas, covariances, poses, prefix)
    threshold = chi2_threshold(options.gate_probability)
    pred, pred_cov = _predicted(poses, prefix, src, dst)
    err = se2.between(pred, deltas)
    j_pred, j_meas = se2.between_jacobians(pred, deltas)
    s = j_pred @ pred_cov @ _t(j_pred) + j_meas @ covariances @ _t(j_meas)
    d2 = _quad_inv_sym3(0.5 * (s + _t(s)), err) if len(src) else np.zeros(0)
    xy = pred_cov[:, :2, :2]
    # Largest eigenvalue of each symmetric 2x2 block in closed form.
    half_tr = 0.5 * (xy[:, 0, 0] + xy[:, 1, 1])
    gap = np.sqrt((0.5 * (xy[:, 0, 0] - xy[:, 1, 1])) ** 2 + xy[:, 0, 1] ** 2)
    std_m = np.sqrt(np.maximum(half_tr + gap, 0.0))
    std_rad = np.sqrt(np.maximum(pred_cov[:, 2, 2], 0.0))
    informative = (std_m <= options.informative_max_std_m) & (std_rad <= options.informative_max_std_rad)
    return OdometryGate(
        distance_sq=d2,
        threshold=threshold,
        passed=d2 <= threshold,
        informative=informative,
        predicted=pred,
        predicted_covariance=pred_cov,
        chain_std_m=std_m,
        chain_std_rad=std_rad,
    )


# --------------------------------------------------------------------------
# pairwise (PCM) consistency


@dataclass(frozen=True)
class _ClosureTerms:
    """Per-closure quantities that make each pair O(1) (see pair_distances)."""

    src: np.ndarray  # (K,)
    dst: np.ndarray  # (K,)
    src_pose: np.ndarray  # (K, 3) odometry pose x_a of the src node
    mismatch: np.ndarray  # (K, 3) M = x_a ∘ z ∘ x_b^-1
    mismatch_inv: np.ndarray  # (K, 3) M^-1
    world_cov: np.ndarray  # (K, 3, 3) Ad(x_b) Sigma_tau Ad(x_b)^T


def _oriented(src, dst, deltas, covariances):
    """Closures turned to run from their earlier to their later node.

    For src > dst the delta is inverted and its covariance carried through
    the Jacobian of inversion (into the frame of the new src).  Pairing the
    earlier ends with each other and the later ends with each other is the
    matching of the four nodes with the shortest total odometry, so the PCM
    cycle uses the tightest odometry segments whatever direction the
    registration happened to run.
    """
    flip = src > dst
    if not np.any(flip):
        return src, dst, deltas, covariances
    src, dst = np.where(flip, dst, src), np.where(flip, src, dst)
    deltas = deltas.copy()
    covariances = covariances.copy()
    d = deltas[flip]
    j_inv = se2.inverse_jacobian(d)
    deltas[flip] = se2.inverse(d)
    c = j_inv @ covariances[flip] @ _t(j_inv)
    covariances[flip] = 0.5 * (c + _t(c))
    return src, dst, deltas, covariances


def _closure_terms(src, dst, deltas, covariances, poses):
    src, dst, deltas, covariances = _oriented(src, dst, deltas, covariances)
    xa = poses[src]
    xb = poses[dst]
    mismatch = se2.compose(se2.compose(xa, deltas), se2.inverse(xb))
    minv = se2.inverse(mismatch)
    f = se2.frame_rotation(deltas[:, 2])
    sigma_tau = _t(f) @ covariances @ f  # right-tangent covariance of z
    ad_b = se2.adjoint(xb)
    return _ClosureTerms(
        src=src,
        dst=dst,
        src_pose=xa,
        mismatch=mismatch,
        mismatch_inv=minv,
        world_cov=ad_b @ sigma_tau @ _t(ad_b),
    )


# --------------------------------------------------------------------------
# the pair test, on one (K,) array per scalar (no (P, 3, 3) temporaries)

_SYM = ((0, 0), (0, 1), (0, 2), (1, 1), (1, 2), (2, 2))


@dataclass(frozen=True)
class _ClosureColumns:
    """Per-closure scalars of :class:`_ClosureTerms`, one (K,) array each."""

    src: np.ndarray
    dst: np.ndarray
    xax: np.ndarray
    xay: np.ndarray
    ca: np.ndarray  # cos / sin of x_a's heading
    sa: np.ndarray
    mx: np.ndarray  # M = x_a ∘ z ∘ x_b^-1
    my: np.ndarray
    mt: np.ndarray
    mc: np.ndarray
    ms: np.ndarray
    nx: np.ndarray  # M^-1
    ny: np.ndarray
    nt: np.ndarray
    nc: np.ndarray
    ns: np.ndarray
    w: tuple  # world_cov's six upper-triangle entries, (K,) each


def _columns(t: _ClosureTerms) -> _ClosureColumns:
    return _ClosureColumns(
        src=t.src, dst=t.dst, xax=t.src_pose[:, 0], xay=t.src_pose[:, 1],
        ca=np.cos(t.src_pose[:, 2]), sa=np.sin(t.src_pose[:, 2]),
        mx=t.mismatch[:, 0], my=t.mismatch[:, 1], mt=t.mismatch[:, 2],
        mc=np.cos(t.mismatch[:, 2]), ms=np.sin(t.mismatch[:, 2]),
        nx=t.mismatch_inv[:, 0], ny=t.mismatch_inv[:, 1], nt=t.mismatch_inv[:, 2],
        nc=np.cos(t.mismatch_inv[:, 2]), ns=np.sin(t.mismatch_inv[:, 2]),
        w=tuple(np.ascontiguousarray(t.world_cov[:, r, c]) for r, c in _SYM),
    )


def _prefix_columns(prefix) -> tuple:
    return tuple(np.ascontiguousarray(prefix[:, r, c]) for r, c in _SYM)


def _kernel_rows(t: _ClosureColumns) -> np.ndarray:
    """The columns as the compiled kernels' (K, 20) array, one row per closure (see _pcm_kernels)."""
    k = _pcm_kernels
    q = np.empty((len(t.src), k.N_COLUMNS))
    for col, v in ((k.XAX, t.xax), (k.XAY, t.xay), (k.CA, t.ca), (k.SA, t.sa), (k.MX, t.mx), (k.MY, t.my),
                   (k.MT, t.mt), (k.MC, t.mc), (k.MS, t.ms), (k.NX, t.nx), (k.NY, t.ny), (k.NT, t.nt),
                   (k.NC, t.nc), (k.NS, t.ns)):
        q[:, col] = v
    for m in range(6):
        q[:, k.W0 + m] = t.w[m]
    return q


def _times_symmetric(c, s, px, py, d):
    """Rows of ``Y D`` for ``Y = [[c, -s, px], [s, c, py], [0, 0, 1]]`` and D symmetric (six entries)."""
    d00, d01, d02, d11, d12, d22 = d
    return ((c * d00 - s * d01 + px * d02, c * d01 - s * d11 + px * d12, c * d02 - s * d12 + px * d22),
            (s * d00 + c * d01 + py * d02, s * d01 + c * d11 + py * d12, s * d02 + c * d12 + py * d22),
            (d02, d12, d22))


def _congruence(c, s, px, py, d):
    """Upper-triangle entries of ``Y D Y^T`` (Y and D as in :func:`_times_symmetric`)."""
    (a0, a1, a2), (b0, b1, b2), _ = _times_symmetric(c, s, px, py, d)
    return (c * a0 - s * a1 + px * a2, s * a0 + c * a1 + py * a2, a2,
            s * b0 + c * b1 + py * b2, b2, d[5])


def _pair_block(t: _ClosureColumns, pc, i, j, shared_odometry):
    """Squared Mahalanobis distance of the PCM cycle for closure pairs (i, j).

    Closure i joins a -> b with delta z_i, closure j joins c -> d with z_j
    (both already oriented by _oriented).
    The cycle a -> b -> d -> c -> a is ``E = z_i ∘ T_bd ∘ z_j^-1 ∘ T_ca``
    with odometry deltas T.  Writing ``M = x_a ∘ z ∘ x_b^-1`` (identity for a
    closure that agrees with the odometry) it equals
    ``E = x_a^-1 ∘ M_i ∘ M_j^-1 ∘ x_a``.

    Perturbing z_i, z_j on the right by tau_i, tau_j and odometry step k by a
    world-frame (left) perturbation eta_k (what se2.chain_prefix sums) gives,
    exactly to first order, the world-frame perturbation of ``M_i M_j^-1``:

        w = Ad(M_i) [m + Ad(M_j^-1) v],
        m = Ad(x_b) tau_i - Ad(x_d) tau_j + sum_k alpha_k eta_k,
        v = sum_k beta_k eta_k,

    where alpha_k = +1 / -1 for steps on the segment b..d traversed forward /
    backward (0 elsewhere) and beta_k likewise for c..a.  Because every
    quantity is a congruence of the same vector, the distance is
    ``h^T C^-1 h`` with ``h = Ad(M_j^-1 ∘ x_a) F(theta_E)^T e`` (e = params
    of E) and

        C = V_i + V_j + D_bd + Y D_ca Y^T + X Y^T + Y X,    Y = Ad(M_j^-1),

    D the prefix-sum covariance of each segment and X the signed prefix-sum
    covariance of the steps the two segments share (zero when
    ``shared_odometry`` is False, i.e. the segments treated as independent).

    Everything is written out per scalar on (P,) arrays (``t`` from
    :func:`_columns`, ``pc`` the six upper-triangle entries of the prefix
    sums from :func:`_prefix_columns`): batched 3x3 products on (P, 3, 3)
    stacks cost several times more, and a long log tests tens of millions
    of pairs.  E's heading comes from the angle sum, so no trigonometry is
    evaluated per pair.
    """

    a, b = t.src[i], t.dst[i]
    c, d = t.src[j], t.dst[j]
    xax, xay, ca, sa = t.xax[i], t.xay[i], t.ca[i], t.sa[i]
    mci, msi = t.mc[i], t.ms[i]
    nx, ny, nc, ns = t.nx[j], t.ny[j], t.nc[j], t.ns[j]
    # g = M_i ∘ M_j^-1, heading via the angle sum (no trigonometry per pair).
    gx = t.mx[i] + mci * nx - msi * ny
    gy = t.my[i] + msi * nx + mci * ny
    cg = mci * nc - msi * ns
    sg = msi * nc + mci * ns
    gt = se2.wrap(t.mt[i] + t.nt[j])
    # e = between(x_a, g ∘ x_a)
    dx = gx + cg * xax - sg * xay - xax
    dy = gy + sg * xax + cg * xay - xay
    ex = ca * dx + sa * dy
    ey = -sa * dx + ca * dy
    # u = F(theta_E)^T e, then h = Y Ad(x_a) u with Y = Ad(M_j^-1).
    u0 = cg * ex + sg * ey
    u1 = -sg * ex + cg * ey
    v0 = ca * u0 - sa * u1 + xay * gt
    v1 = sa * u0 + ca * u1 - xax * gt
    h0 = nc * v0 - ns * v1 + ny * gt
    h1 = ns * v0 + nc * v1 - nx * gt
    lo1, hi1 = np.minimum(b, d), np.maximum(b, d)
    lo2, hi2 = np.minimum(c, a), np.maximum(c, a)
    d_ca = tuple(p[hi2] - p[lo2] for p in pc)
    ydy = _congruence(nc, ns, ny, -nx, d_ca)
    cov = [t.w[m][i] + t.w[m][j] + (pc[m][hi1] - pc[m][lo1]) + ydy[m] for m in range(6)]
    if shared_odometry:
        ov_lo = np.maximum(lo1, lo2)
        ov_hi = np.minimum(hi1, hi2)
        k = np.flatnonzero(ov_hi > ov_lo)
        if len(k):
            sign = np.sign(d[k] - b[k]) * np.sign(a[k] - c[k])
            x = [sign * (p[ov_hi[k]] - p[ov_lo[k]]) for p in pc]
            # Z = Y X; the term is Z + Z^T.
            z = _times_symmetric(nc[k], ns[k], ny[k], -nx[k], x)
            for m, (r, q) in enumerate(_SYM):
                cov[m][k] += z[r][q] + z[q][r]
    return _quad_inv_entries(cov, h0, h1, gt)


def pair_distances(
    src, dst, deltas, covariances, poses, prefix, first, second, shared_odometry: bool = True
):
    """Squared Mahalanobis distance of the PCM cycle for the given closure pairs.

    Parameters
    ----------
    src, dst, deltas, covariances, poses, prefix
        As in :func:`odometry_gate` (K closures, N odometry nodes).
    first, second : (P,) int arrays
        Closure indices of each pair (i, j).  Each closure is first turned
        to run from its earlier node to its later one (src < dst; the delta
        inverted and its covariance transformed where needed).  For
        closure i = (a, b) and j = (c, d) so oriented, the cycle is a -> b
        (closure i) -> d (odometry) -> c (closure j, backwards) -> a
        (odometry): earlier ends joined to each other, later ends to each
        other, the shortest odometry the four nodes allow.
    shared_odometry : bool
        See :class:`ConsistencyOptions.pair_shared_odometry`.

    Returns
    -------
    (P,) array of squared Mahalanobis distances of the cycle error
    ``e = params(z_i ∘ T_bd ∘ z_j^-1 ∘ T_ca)`` ([m, m, rad] in the frame of
    node a) under its first-order covariance.  Chi-square(3) distributed for
    correct closures with correct covariances.  The value for (j, i), or
    with a closure given in the other direction, equals that of (i, j) to
    first order in the cycle error, not bit for bit.

    With this orientation the two odometry segments can only share steps
    when traversed in opposite directions (two closures that do not overlap
    in time); ``shared_odometry=False`` then treats them as independent and
    overstates the cycle covariance (a conservative, weaker test).
    """
    src, dst, deltas, covariances, poses, prefix = _arrays(src, dst, deltas, covariances, poses, prefix)
    k = len(src)
    first = np.asarray(first)
    second = np.asarray(second)
    if first.ndim != 1 or second.shape != first.shape:
        raise InputError(f"pair index arrays must be 1-D of equal length, got {first.shape} and {second.shape}")
    if len(first) and (
        not np.issubdtype(first.dtype, np.integer)
        or not np.issubdtype(second.dtype, np.integer)
        or min(first.min(), second.min()) < 0
        or max(first.max(), second.max()) >= k
    ):
        raise InputError(f"pair indices must be integers in [0, {k - 1}]")
    if not len(first):
        return np.zeros(0)
    cols = _columns(_closure_terms(src, dst, deltas, covariances, poses))
    return _pair_block(cols, _prefix_columns(prefix), first.astype(np.intp), second.astype(np.intp),
                       shared_odometry)


def _csr_from_mask(mask, rows_per_block: int = 256):
    """CSR (bool, int32 indices) of a dense boolean matrix, built in row blocks.

    ``scipy.sparse.csr_array(mask)`` goes through int64 coordinate arrays of
    every nonzero (1.4 GB for the 86 million consistent pairs of a
    20,000-scan log); block by block the peak is the result itself.
    """
    k = mask.shape[0]
    counts = mask.sum(axis=1)
    indptr = np.zeros(k + 1, dtype=np.int64)
    np.cumsum(counts, out=indptr[1:])
    index_type = np.int32 if indptr[-1] < np.iinfo(np.int32).max else np.int64
    indices = np.empty(int(indptr[-1]), dtype=index_type)
    for start in range(0, k, rows_per_block):
        stop = min(start + rows_per_block, k)
        _, cols = np.nonzero(mask[start:stop])
        indices[indptr[start]:indptr[stop]] = cols
    data = np.ones(len(indices), dtype=bool)
    return scipy.sparse.csr_array((data, indices, indptr.astype(index_type)), shape=mask.shape)


def _upper_pairs(k, start, stop, row_offsets):
    """(i, j) with i < j for flat upper-triangle indices start..stop-1."""
    p = np.arange(start, stop, dtype=np.int64)
    i = np.searchsorted(row_offsets, p, side="right") - 1
    j = p - row_offsets[i] + i + 1
    return i.astype(np.intp), j.astype(np.intp)


def _window_blocks(lo_m, hi_m, window, block):
    """Pairs (i, j), i < j, with ``|lo_m[i] - lo_m[j]| <= window`` and ``|hi_m[i] - hi_m[j]| <= window``.

    Yields blocks of about ``block`` candidate pairs.  Closures are sorted by
    ``lo_m``; each is paired with the ones after it whose ``lo_m`` is within
    the window (searchsorted), then filtered on ``hi_m``.  The work is the
    number of closures times the closures within ``window`` of each earlier
    end, not K^2.
    """
    k = len(lo_m)
    order = np.argsort(lo_m, kind="stable")
    ls, hs = lo_m[order], hi_m[order]
    after = np.searchsorted(ls, ls + window, side="right") - np.arange(k) - 1
    cum = np.zeros(k + 1, dtype=np.int64)
    np.cumsum(after, out=cum[1:])
    start = 0
    while start < k:
        stop = max(int(np.searchsorted(cum, cum[start] + block, side="right")) - 1, start + 1)
        n = after[start:stop]
        p = np.repeat(np.arange(start, stop), n)
        q = p + 1 + np.arange(len(p)) - np.repeat(cum[start:stop] - cum[start], n)
        near = np.abs(hs[p] - hs[q]) <= window
        i, j = order[p[near]], order[q[near]]
        yield np.minimum(i, j), np.maximum(i, j)
        start = stop


def _all_blocks(k, block):
    """Every pair (i, j), i < j, in blocks of ``block`` pairs."""
    rows = np.arange(k, dtype=np.int64)
    row_offsets = rows * (k - 1) - rows * (rows - 1) // 2  # first flat index of row i
    total = k * (k - 1) // 2
    for start in range(0, total, block):
        yield _upper_pairs(k, start, min(start + block, total), row_offsets)


def _symmetric_conflicts(k, i, j):
    """(K, K) symmetric CSR of bool with sorted indices from upper-triangle pairs (i < j) sorted by (i, j)."""
    index_type = np.int32 if 2 * len(i) < np.iinfo(np.int32).max else np.int64
    indptr = np.empty(k + 1, dtype=index_type)
    indices = np.empty(2 * len(i), dtype=index_type)
    _pcm_kernels.symmetric_csr(k, i.astype(np.int32, copy=False), j.astype(np.int32, copy=False), indptr, indices)
    conflicts = scipy.sparse.csr_array((np.ones(len(indices), dtype=bool), indices, indptr), shape=(k, k))
    conflicts.has_sorted_indices = True
    return conflicts


def pairwise_consistency(src, dst, deltas, covariances, poses, prefix,
                         options: ConsistencyOptions = ConsistencyOptions()):
    """Pairwise (PCM) consistency of K loop closures, as the sparse graph of the pairs that fail.

    Arguments as in :func:`odometry_gate`.  Each tested pair i < j gets
    :func:`pair_distances` (cycle starting at closure i's src node); it is
    consistent when the distance is at most the chi-square(3) quantile at
    ``options.pair_probability``.

    Which pairs are tested: every pair when ``options.pair_window_m`` is
    None; otherwise the pairs whose cycle segments (between the closures'
    earlier ends, and between their later ends, closures turned to run from
    earlier to later node) are each at most ``pair_window_m`` metres of
    odometry path (path length along ``poses``).  Within the window the
    distances are the exhaustive test's to the last bit; outside it a pair
    counts as consistent.

    The distances are computed by a compiled loop (``_pcm_kernels``) that
    gives :func:`pair_distances`' values to the last bit; without a window
    it runs on every core and returns the pairs in the serial order.  Memory is the
    failing pairs (plus, with a window, one block of
    ``options.pairs_per_block`` candidate pairs): no K x K matrix is formed
    (the exhaustive reference kept 5 K^2 bytes, 2 GB at K = 20,000).  Time
    is still K^2 / 2 pair tests without a window.

    Returns
    -------
    PairConsistency

    Examples
    --------
    >>> import numpy as np
    >>> from closurecheck.core import se2
    >>> poses = np.column_stack([np.arange(6.0), np.zeros(6), np.zeros(6)])
    >>> prefix = se2.chain_prefix(poses, np.tile(np.diag([1e-4, 1e-4, 1e-5]), (5, 1, 1)))
    >>> src, dst = np.array([0, 1, 2]), np.array([4, 5, 5])
    >>> deltas = se2.between(poses[src], poses[dst])
    >>> deltas[2, 1] += 1.0  # a closure one metre off
    >>> cov = np.tile(np.diag([1e-4, 1e-4, 1e-5]), (3, 1, 1))
    >>> pc = pairwise_consistency(src, dst, deltas, cov, poses, prefix)
    >>> pc.support.tolist(), pc.pairs_tested, pc.exhaustive
    ([1, 1, 0], 3, True)
    """
    src, dst, deltas, covariances, poses, prefix = _arrays(src, dst, deltas, covariances, poses, prefix)
    k = len(src)
    threshold = chi2_threshold(options.pair_probability)
    block = options.pairs_per_block
    first, second, tested = [], [], 0
    exhaustive = True
    if k >= 2:
        cols = _columns(_closure_terms(src, dst, deltas, covariances, poses))
        # The compiled pair test (_pcm_kernels): the same bits as _pair_block,
        # 56-71 against 330-410 ns per pair with everything around it
        # (37.7 M pairs, docs/performance.md, "The pair test compiled");
        # every pair at once runs on all cores, the window's blocks on one.
        q = _kernel_rows(cols)
        pc = np.ascontiguousarray(np.column_stack(_prefix_columns(prefix)))
        a, b = cols.src.astype(np.int64), cols.dst.astype(np.int64)
        shared = bool(options.pair_shared_odometry)
        blocks = None
        if options.pair_window_m is not None:
            travel = odometry_travel(poses)[0]
            lo_m, hi_m = travel[cols.src], travel[cols.dst]
            w = options.pair_window_m
            # Every pair lies in the window when both spreads fit in it.
            if np.ptp(lo_m) > w or np.ptp(hi_m) > w:
                exhaustive = False
                blocks = _window_blocks(lo_m, hi_m, w, block)
        if blocks is None:
            # Every pair in one compiled loop: it stores only the failing
            # pairs, so no block of pairs is needed to bound the memory.
            tested = k * (k - 1) // 2
            fi, fj = _pcm_kernels.failing_pairs(q, a, b, pc, shared, threshold, np.arange(k - 1, dtype=np.int64))
            first.append(fi)
            second.append(fj)
        else:
            for i, j in blocks:
                tested += len(i)
                if not len(i):
                    continue
                fail = _pcm_kernels.pair_distances(q, a, b, pc, i.astype(np.int64), j.astype(np.int64),
                                                   shared) > threshold
                first.append(i[fail].astype(np.int32))
                second.append(j[fail].astype(np.int32))
    i = np.concatenate(first) if len(first) > 1 else first[0] if first else np.zeros(0, dtype=np.int32)
    j = np.concatenate(second) if len(second) > 1 else second[0] if second else np.zeros(0, dtype=np.int32)
    if not exhaustive:
        # Window blocks come in the order of the closures' earlier ends; the
        # CSR fill needs the pairs sorted by (i, j), as failing_pairs gives them.
        order = np.lexsort((j, i))
        i, j = i[order], j[order]
    conflicts = _symmetric_conflicts(k, i, j)
    degree = np.diff(conflicts.indptr).astype(np.int64)
    support = np.maximum(k - 1, 0) - degree
    return PairConsistency(conflicts=conflicts, support=support, pairs_tested=int(tested), exhaustive=exhaustive,
                           threshold=threshold)


def _pairwise_consistency_dense(src, dst, deltas, covariances, poses, prefix,
                                options: ConsistencyOptions = ConsistencyOptions()):
    """Exhaustive reference of :func:`pairwise_consistency`: every pair, dense matrices.

    Kept to check the windowed and sparse formulation against (tests,
    benchmarks/consistency.py); memory is 5 K^2 bytes.  ``pair_window_m``
    is ignored.  Arguments as in :func:`odometry_gate`.  Every unordered pair i < j is
    tested once with :func:`pair_distances` (cycle starting at closure i's
    src node), in blocks of ``options.pairs_per_block`` pairs.  Two closures
    are consistent when the distance is at most the chi-square(3) quantile at
    ``options.pair_probability``.

    Returns
    -------
    _DensePairs
    """
    src, dst, deltas, covariances, poses, prefix = _arrays(src, dst, deltas, covariances, poses, prefix)
    k = len(src)
    threshold = chi2_threshold(options.pair_probability)
    # Dense float32 distances and a dense boolean mask filled in place: most
    # pairs are consistent, so index lists of the consistent pairs would
    # take several times the memory of the mask (K = 6,000: 36 MB mask,
    # 144 MB distances, against ~1 GB for float64 plus index arrays).
    dist = np.zeros((k, k), dtype=np.float32)
    if k < 2:
        return _DensePairs(scipy.sparse.csr_array((k, k), dtype=bool), dist, threshold)
    cols = _columns(_closure_terms(src, dst, deltas, covariances, poses))
    pc = _prefix_columns(prefix)
    mask = np.zeros((k, k), dtype=bool)
    for i, j in _all_blocks(k, options.pairs_per_block):
        d2 = _pair_block(cols, pc, i, j, options.pair_shared_odometry)
        dist[i, j] = d2
        dist[j, i] = d2
        ok = d2 <= threshold
        mask[i[ok], j[ok]] = True
        mask[j[ok], i[ok]] = True
    adjacency = _csr_from_mask(mask)
    del mask
    return _DensePairs(adjacency=adjacency, distance_sq=dist, threshold=threshold)
