"""Chi-square bounds: the one helper every gate uses, against published tables and scipy."""

import numpy as np
import pytest
import scipy.stats

from closurecheck.core.stats import chi2_cdf, chi2_median, chi2_quantiles, chi2_threshold


def test_chi2_threshold_matches_published_table():
    # NIST/SEMATECH e-Handbook of Statistical Methods, section 1.3.6.7.4,
    # critical values of the chi-square distribution.
    assert chi2_threshold(0.95) == pytest.approx(7.815, abs=5e-4)
    assert chi2_threshold(0.99) == pytest.approx(11.345, abs=5e-4)
    assert chi2_threshold(0.999) == pytest.approx(16.266, abs=5e-4)
    # 1 and 2 degrees of freedom at 0.95: 3.841 and 5.991 (values from memory
    # for the NIST page; the same figures appear in other printed tables).
    assert chi2_threshold(0.95, 1) == pytest.approx(3.841, abs=5e-4)
    assert chi2_threshold(0.95, 2) == pytest.approx(5.991, abs=5e-4)


@pytest.mark.parametrize("dof", [1, 2, 3, 6])
@pytest.mark.parametrize("p", [0.9, 0.95, 0.99, 0.999])
def test_chi2_threshold_inverts_the_distribution(dof, p):
    assert scipy.stats.chi2.cdf(chi2_threshold(p, dof), dof) == pytest.approx(p, abs=1e-12)


def test_chi2_median_of_three_degrees_of_freedom():
    # The median of chi-square(3) is 2.366 (published tables, e.g. the 0.50
    # column of the NIST table above).
    assert chi2_median() == pytest.approx(2.366, abs=5e-4)


def _grid_probabilities():
    # Linear steps over [0, 1] (the ends included), both tails down to 1e-15, the
    # probabilities the options use, and a few outside the domain (nan expected).
    tails = np.logspace(-15, -1, 141)
    return np.unique(np.concatenate([np.linspace(0.0, 1.0, 2001), tails, 1.0 - tails,
                                     [0.9, 0.95, 0.99, 0.997, 0.999, 0.9999], [-0.5, 1.5, np.nan]]))


# Integer degrees of freedom up to 60, a few half-integer and large ones, and
# invalid ones (0, negative, infinite: nan expected).
_GRID_DOFS = np.concatenate([np.arange(1, 61), [0.5, 1.5, 2.5, 7.5, 100.0, 1000.0, 0.0, -1.0, np.inf]])


def test_chi2_threshold_is_bit_identical_to_scipy_stats_chi2_ppf_on_a_dense_grid():
    # Reference: scipy.stats.chi2.ppf (scipy's own chi-square distribution).  The helper calls the
    # special function scipy.stats does, so every value must be the same bits, nan where scipy's is.
    p = _grid_probabilities()
    for dof in _GRID_DOFS:
        ours = np.array([chi2_threshold(float(q), dof) for q in p])
        ref = scipy.stats.chi2.ppf(p, dof)
        assert np.array_equal(np.isnan(ours), np.isnan(ref)), dof
        ok = ~np.isnan(ref)
        assert np.array_equal(ours[ok].view(np.int64), ref[ok].view(np.int64)), dof


@pytest.mark.parametrize("dof", [1, 2, 3, 4, 6, 10, 2.5])
@pytest.mark.parametrize("p", [0.5, 0.95, 0.99, 0.999])
def test_chi2_threshold_scalar_calls_match_scipy_scalar_calls(dof, p):
    # The pipeline calls with Python scalars; scipy.stats.chi2.ppf on scalars as the reference.
    assert chi2_threshold(p, dof) == float(scipy.stats.chi2.ppf(p, dof))


@pytest.mark.parametrize("dof", [1, 2, 3, 4, 5, 6, 10, 30, 0.5, 7.5])
def test_chi2_median_is_bit_identical_to_scipy_stats_chi2_median(dof):
    # Reference: scipy.stats.chi2.median.
    assert chi2_median(dof) == float(scipy.stats.chi2.median(dof))


@pytest.mark.parametrize("dof", [1, 2, 3, 4, 6, 10, 2.5, 30])
def test_chi2_quantiles_and_cdf_are_bit_identical_to_scipy_stats_chi2(dof):
    # Reference: scipy.stats.chi2.ppf and .cdf on arrays (what the report's NEES picture drew with);
    # the helpers call the special functions scipy.stats calls, so the same bits are expected.
    p = _grid_probabilities()
    ours, ref = chi2_quantiles(p, dof), scipy.stats.chi2.ppf(p, dof)
    assert np.array_equal(ours, ref, equal_nan=True)
    x = np.concatenate([[-1.0, 0.0, np.nan], np.geomspace(1e-6, 1e4, 2001), [np.inf]])
    ours, ref = chi2_cdf(x, dof), scipy.stats.chi2.cdf(x, dof)
    assert np.array_equal(ours, ref, equal_nan=True)
