"""The magnitude splines against scipy.interpolate.CubicSpline(bc_type='not-a-knot') (the reference library)."""

import numpy as np
import pytest
from scipy.interpolate import CubicSpline

from fieldvane.estimator.magnitude_basis import MagnitudeBasis


@pytest.mark.parametrize("knots", [[5000.0], [1000.0, 20000.0], [1000.0, 5000.0, 20000.0],
                                   [1000.0, 2500.0, 7000.0, 20000.0], [800.0, 1500.0, 3000.0, 6000.0, 9000.0, 50000.0]])
def test_basis_equals_scipy_not_a_knot(knots):
    basis = MagnitudeBasis(knots)
    b = np.exp(np.linspace(np.log(knots[0]) - 0.3, np.log(knots[-1]) + 0.3, 301))
    if len(knots) == 1:
        assert np.all(basis(b) == 1.0)
        return
    x = np.log(knots)
    ref = CubicSpline(x, np.eye(len(knots)), bc_type="not-a-knot")
    inside = np.clip(np.log(b), x[0], x[-1])
    assert np.allclose(basis(b), ref(inside), atol=1e-12)
    assert np.allclose(basis.derivative(b), ref(np.log(b), 1), atol=1e-10)
    assert np.allclose(basis(np.array(knots)), np.eye(len(knots)), atol=1e-12)
