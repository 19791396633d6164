"""Chi-square quantiles computed without scipy at start-up, against scipy.stats.chi2 (the reference library)."""

import numpy as np
import pytest
from scipy.stats import chi2

from fieldvane.estimator.chi_square import chi2_cdf, chi2_quantile


@pytest.mark.parametrize("dof", [1, 2, 3, 4, 6, 8, 16, 40])
@pytest.mark.parametrize("p", [1e-6, 0.01, 0.025, 0.5, 0.9, 0.975, 0.99, 0.9999, 1 - 1e-9])
def test_quantiles_match_scipy(dof, p):
    assert chi2_quantile(p, dof) == pytest.approx(chi2.ppf(p, dof), rel=1e-9)


def test_cdf_matches_scipy_on_both_sides_of_the_series_switch():
    for dof in (1, 2, 5, 9):
        for x in np.linspace(0.01, 40, 57):
            assert chi2_cdf(x, dof) == pytest.approx(chi2.cdf(x, dof), rel=1e-10, abs=1e-14)


def test_edges():
    assert chi2_quantile(0.0, 3) == 0.0 and chi2_quantile(1.0, 3) == float("inf")
    with pytest.raises(ValueError):
        chi2_quantile(1.5, 3)
