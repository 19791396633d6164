"""The one BLIND rule (estimator/blind.py): bound above BLIND_FACTOR x its sphere median."""

import math

import numpy as np
import pytest

from fieldvane.estimator.blind import (BLIND_FACTOR, blind_fraction, blind_limit, blind_mask, check_factor,
                                       sphere_median)


def test_rule_is_relative_to_the_sphere_median():
    rng = np.random.default_rng(1)
    bound = np.exp(rng.normal(0, 1.0, 5000))
    med = sphere_median(bound)
    assert med == np.median(bound)
    assert blind_limit(med) == BLIND_FACTOR * med == 5.0 * med
    mask = blind_mask(bound, med)
    np.testing.assert_array_equal(mask, bound > 5.0 * med)       # plain numpy restatement of the rule
    # Relative: scaling every bound (a noisier sensor) marks the same directions.
    for scale in (1e-3, 7.0, 1e4):
        np.testing.assert_array_equal(blind_mask(scale * bound, sphere_median(scale * bound)), mask)
    assert blind_fraction(bound) == pytest.approx(np.mean(mask))
    assert blind_fraction(bound, med, factor=2.0) == pytest.approx(np.mean(bound > 2.0 * med))


def test_edges_non_finite_and_bad_factors():
    assert not blind_mask(5.0, 1.0)                 # at the limit: not blind
    assert blind_mask(5.0000001, 1.0)
    np.testing.assert_array_equal(blind_mask([np.inf, np.nan, 0.1], 1.0), [True, True, False])
    assert sphere_median([1.0, 2.0, np.nan, np.inf]) == 2.0
    for bad in (1.0, 0.5, math.nan, math.inf, -3):
        with pytest.raises(ValueError, match="blind factor"):
            check_factor(bad)
    with pytest.raises(ValueError):
        sphere_median([np.nan])

