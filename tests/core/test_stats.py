"""Chi-square bounds: the one helper every gate uses, against published tables and scipy."""

import pytest
import scipy.stats

from closurecheck.core.stats import chi2_median, chi2_threshold


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
