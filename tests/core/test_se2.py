"""SE(2) core: algebraic identities, Jacobians and covariance propagation.

External references used here:
* scipy.linalg.expm / logm (reference library): the exponential map of the
  3x3 Lie-algebra matrix must equal our closed form.
* Sola, Deray, Atchuthan, "A micro Lie theory for state estimation in
  robotics" (2018), the SE(2) example: closed forms of Exp, the adjoint and
  the right/left Jacobians, checked here against their defining properties
  (Ad: X Exp(t) = Exp(Ad t) X; Jr: Exp(t + d) ~ Exp(t) Exp(Jr d)).
* Central finite differences for every parameter Jacobian.
"""

import numpy as np
import pytest
import scipy.linalg
from hypothesis import given, settings
from hypothesis import strategies as st

from closurecheck.core import se2

RNG = np.random.default_rng(1234)


def random_poses(n, scale=5.0):
    p = RNG.normal(size=(n, 3)) * [scale, scale, 1.0]
    p[:, 2] = se2.wrap(RNG.uniform(-np.pi, np.pi, n))
    return p


def hat(tau):
    """Lie-algebra matrix of a tangent vector [rho1, rho2, theta] (Sola et al. 2018)."""
    r1, r2, t = tau
    return np.array([[0.0, -t, r1], [t, 0.0, r2], [0.0, 0.0, 0.0]])


def numeric_jacobian(f, x, eps=1e-6):
    x = np.asarray(x, dtype=float)
    cols = []
    for k in range(len(x)):
        d = np.zeros_like(x)
        d[k] = eps
        diff = f(x + d) - f(x - d)
        if diff.shape[-1] == 3:
            diff[..., 2] = se2.wrap(diff[..., 2])
        cols.append(diff / (2 * eps))
    return np.stack(cols, axis=-1)


def pose_diff(a, b):
    """a - b on [x, y, theta] with the angle wrapped."""
    d = np.asarray(a) - np.asarray(b)
    d[..., 2] = se2.wrap(d[..., 2])
    return d


class TestWrap:
    def test_interval_is_half_open_at_minus_pi(self):
        # Contract: theta wrapped to (-pi, pi].
        assert se2.wrap(np.pi) == pytest.approx(np.pi)
        assert se2.wrap(-np.pi) == pytest.approx(np.pi)
        assert se2.wrap(3 * np.pi) == pytest.approx(np.pi)
        assert se2.wrap(0.0) == 0.0

    @given(st.floats(-1e3, 1e3))
    def test_range_and_equivalence(self, t):
        w = float(se2.wrap(t))
        assert -np.pi < w <= np.pi
        assert np.cos(w) == pytest.approx(np.cos(t), abs=1e-9)
        assert np.sin(w) == pytest.approx(np.sin(t), abs=1e-9)


class TestGroup:
    def test_compose_matches_matrix_product(self):
        a, b = random_poses(50), random_poses(50)
        expected = se2.from_matrix(se2.to_matrix(a) @ se2.to_matrix(b))
        np.testing.assert_allclose(pose_diff(se2.compose(a, b), expected), 0, atol=1e-12)

    def test_inverse_and_between(self):
        a, b = random_poses(50), random_poses(50)
        np.testing.assert_allclose(se2.compose(a, se2.inverse(a)), 0, atol=1e-12)
        np.testing.assert_allclose(pose_diff(se2.between(a, b), se2.compose(se2.inverse(a), b)), 0, atol=1e-12)
        np.testing.assert_allclose(pose_diff(se2.compose(a, se2.between(a, b)), b), 0, atol=1e-12)

    def test_transform_points_matches_matrix(self):
        p = random_poses(1)[0]
        pts = RNG.normal(size=(20, 2))
        hom = np.c_[pts, np.ones(20)] @ se2.to_matrix(p).T
        np.testing.assert_allclose(se2.transform_points(p, pts), hom[:, :2], atol=1e-12)

    def test_broadcasting_single_against_stack(self):
        a = random_poses(1)[0]
        b = random_poses(7)
        out = se2.compose(a, b)
        assert out.shape == (7, 3)
        np.testing.assert_allclose(out[3], se2.compose(a, b[3]))


class TestExpLog:
    def test_exp_matches_scipy_expm(self):
        # Reference library: scipy.linalg.expm of the Lie-algebra matrix.
        for tau in RNG.normal(size=(30, 3)) * [2, 2, 1.2]:
            expected = se2.from_matrix(scipy.linalg.expm(hat(tau)))
            np.testing.assert_allclose(pose_diff(se2.exp(tau), expected), 0, atol=1e-10)

    def test_log_matches_scipy_logm(self):
        for p in random_poses(30, scale=3.0):
            p[2] = np.clip(p[2], -3.0, 3.0)  # logm's principal branch
            expected = scipy.linalg.logm(se2.to_matrix(p)).real
            tau = se2.log(p)
            np.testing.assert_allclose(tau, [expected[0, 2], expected[1, 2], expected[1, 0]], atol=1e-8)

    @given(st.floats(-3, 3), st.floats(-3, 3), st.floats(-3.1, 3.1))
    @settings(max_examples=200)
    def test_round_trip(self, r1, r2, t):
        tau = np.array([r1, r2, t])
        np.testing.assert_allclose(se2.log(se2.exp(tau)), tau, atol=1e-9)

    def test_small_angle_branch_is_continuous(self):
        for t in [0.0, 1e-9, -1e-7, 5e-7, 2e-6]:
            tau = np.array([0.7, -0.3, t])
            expected = se2.from_matrix(scipy.linalg.expm(hat(tau)))
            np.testing.assert_allclose(se2.exp(tau), expected, atol=1e-12)
            np.testing.assert_allclose(se2.log(se2.exp(tau)), tau, atol=1e-12)


class TestLieJacobians:
    """Closed forms from Sola et al. (2018), SE(2) example, against their definitions."""

    def test_adjoint_definition(self):
        # X ∘ Exp(tau) = Exp(Ad_X tau) ∘ X
        for x in random_poses(10):
            tau = RNG.normal(size=3) * 0.3
            lhs = se2.compose(x, se2.exp(tau))
            rhs = se2.compose(se2.exp(se2.adjoint(x) @ tau), x)
            np.testing.assert_allclose(pose_diff(lhs, rhs), 0, atol=1e-10)

    @pytest.mark.parametrize("which", ["right", "left"])
    def test_jacobian_definition(self, which):
        for tau in list(RNG.normal(size=(10, 3)) * [1.5, 1.5, 1.0]) + [np.array([0.4, -0.2, 1e-8])]:
            if which == "right":
                closed = se2.right_jacobian(tau)
                f = lambda d: se2.log(se2.compose(se2.inverse(se2.exp(tau)), se2.exp(tau + d)))  # noqa: E731
            else:
                closed = se2.left_jacobian(tau)
                f = lambda d: se2.log(se2.compose(se2.exp(tau + d), se2.inverse(se2.exp(tau))))  # noqa: E731
            numeric = numeric_jacobian(f, np.zeros(3))
            np.testing.assert_allclose(closed, numeric, atol=1e-6)

    def test_left_equals_right_of_negative(self):
        # Sola et al. (2018): Jl(tau) = Jr(-tau).
        tau = RNG.normal(size=(20, 3))
        np.testing.assert_allclose(se2.left_jacobian(tau), se2.right_jacobian(-tau), atol=1e-12)


class TestParameterJacobians:
    def test_compose_jacobians(self):
        for a, b in zip(random_poses(10), random_poses(10)):
            ja, jb = se2.compose_jacobians(a, b)
            np.testing.assert_allclose(ja, numeric_jacobian(lambda v: se2.compose(v, b), a), atol=1e-6)
            np.testing.assert_allclose(jb, numeric_jacobian(lambda v: se2.compose(a, v), b), atol=1e-6)

    def test_between_jacobians(self):
        for a, b in zip(random_poses(10), random_poses(10)):
            ja, jb = se2.between_jacobians(a, b)
            np.testing.assert_allclose(ja, numeric_jacobian(lambda v: se2.between(v, b), a), atol=1e-6)
            np.testing.assert_allclose(jb, numeric_jacobian(lambda v: se2.between(a, v), b), atol=1e-6)

    def test_vectorised_equals_single(self):
        a, b = random_poses(5), random_poses(5)
        ja, jb = se2.between_jacobians(a, b)
        for k in range(5):
            ja1, jb1 = se2.between_jacobians(a[k], b[k])
            np.testing.assert_allclose(ja[k], ja1)
            np.testing.assert_allclose(jb[k], jb1)


class TestCovariancePropagation:
    def _chain(self, k=25):
        deltas = RNG.normal(size=(k, 3)) * [0.8, 0.2, 0.3]
        a = RNG.normal(size=(k, 3, 3)) * 0.05
        covs = a @ a.transpose(0, 2, 1) + np.eye(3) * 1e-4
        return deltas, covs

    def test_chain_poses_equal_sequential_composition(self):
        deltas, _ = self._chain()
        poses, _ = se2.chain(deltas)
        p = np.zeros(3)
        for k, d in enumerate(deltas):
            p = se2.compose(p, d)
            np.testing.assert_allclose(pose_diff(poses[k + 1], p), 0, atol=1e-10)

    def test_chain_covariance_matches_monte_carlo(self):
        # Common practice: first-order propagation agrees with sampling when the
        # noise is small compared with the curvature of the composition.
        deltas, covs = self._chain(8)
        covs = covs * 0.05
        _, pcov = se2.chain(deltas, covs)
        n = 40000
        acc = np.zeros((n, 3))
        for d, c in zip(deltas, covs):
            noise = RNG.multivariate_normal(np.zeros(3), c, size=n)
            acc = se2.compose(acc, d + noise)
        mean = se2.chain(deltas)[0][-1]
        err = pose_diff(acc, mean)
        np.testing.assert_allclose(np.cov(err.T), pcov[-1], rtol=0.1, atol=2e-5)

    def test_prefix_sums_equal_sequential_recursion(self):
        deltas, covs = self._chain(40)
        poses, _ = se2.chain(deltas)
        poses = se2.compose(np.array([4.0, -1.0, 2.5]), poses)
        prefix = se2.chain_prefix(poses, covs)
        i = np.array([0, 3, 10, 17, 39])
        j = np.array([40, 9, 30, 17, 40])
        d, c = se2.chain_relative(poses, prefix, i, j)
        for k in range(len(i)):
            d1, c1 = se2.chain_covariance_between(deltas, covs, i[k], j[k])
            np.testing.assert_allclose(pose_diff(d[k], d1), 0, atol=1e-10)
            np.testing.assert_allclose(c[k], c1, atol=1e-12)

    def test_heading_variance_is_the_sum_of_step_variances(self):
        # Headings add linearly along a chain, so their variance is exactly
        # the running sum of the steps' heading variances.
        deltas, covs = self._chain(30)
        _, pcov = se2.chain(deltas, covs)
        np.testing.assert_allclose(pcov[1:, 2, 2], np.cumsum(covs[:, 2, 2]), rtol=1e-12)
        assert np.all(np.linalg.eigvalsh(pcov[1:]) > 0)

    def test_mahalanobis_against_explicit_inverse(self):
        a = RNG.normal(size=(10, 3, 3))
        covs = a @ a.transpose(0, 2, 1) + np.eye(3)
        e = RNG.normal(size=(10, 3))
        expected = np.einsum("ni,nij,nj->n", e, np.linalg.inv(covs), e)
        np.testing.assert_allclose(se2.mahalanobis_sq(e, covs), expected, rtol=1e-10)


# ---------------------------------------------------------------------------
# The written-out forms against the reference forms they replace on hot paths.


def test_inverse_jacobian_is_the_first_jacobian_of_between_with_identity():
    rng = np.random.default_rng(5)
    p = np.column_stack([rng.uniform(-20, 20, (50, 2)), rng.uniform(-np.pi, np.pi, 50)])
    ref, _ = se2.between_jacobians(p, np.zeros_like(p))
    np.testing.assert_array_equal(se2.inverse_jacobian(p), ref)
    # and it is the derivative of inverse(): central differences
    h = 1e-6
    num = np.stack([(se2.inverse(p + h * e) - se2.inverse(p - h * e)) / (2 * h) for e in np.eye(3)], axis=-1)
    np.testing.assert_allclose(se2.inverse_jacobian(p), num, atol=1e-6)


def test_chain_relative_unrolled_equals_the_matrix_form():
    rng = np.random.default_rng(6)
    n = 40
    steps = np.column_stack([rng.uniform(0.2, 1.0, n - 1), rng.normal(0, 0.1, n - 1), rng.normal(0, 0.3, n - 1)])
    poses = np.zeros((n, 3))
    for k in range(1, n):
        poses[k] = se2.compose(poses[k - 1], steps[k - 1])
    q = np.zeros((n - 1, 3, 3))
    q[:, 0, 0] = q[:, 1, 1] = rng.uniform(1e-4, 1e-2, n - 1)
    q[:, 2, 2] = rng.uniform(1e-5, 1e-3, n - 1)
    prefix = se2.chain_prefix(poses, q)
    i, j = np.triu_indices(n)
    d_ref, c_ref = se2.chain_relative(poses, prefix, i, j)
    d, c = se2.chain_relative_unrolled(poses, prefix, i, j)
    np.testing.assert_allclose(d, d_ref, atol=1e-12)
    np.testing.assert_allclose(c, c_ref, rtol=1e-9, atol=1e-15)
