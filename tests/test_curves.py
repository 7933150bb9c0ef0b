"""Tests of attribution.curves: linear in zero rate between points, flat beyond, one point flat."""

from __future__ import annotations

import numpy as np
import pandas as pd

from attribution.curves import zero_rates

CURVES = pd.DataFrame({"currency": ["USD", "USD", "USD", "EUR"], "tenor_years": [1.0, 0.25, 5.0, 2.0],
                       "zero_rate": [0.042, 0.040, 0.045, 0.02]})


def test_linear_between_points_and_flat_beyond_the_ends():
    """Rates interpolate linearly in zero rate between tenors and stay flat outside (the data contract)."""
    ccy = np.array(["USD"] * 5, dtype=object)
    rates, found = zero_rates(CURVES, ccy, np.array([0.0, 0.25, 0.625, 3.0, 10.0]))
    np.testing.assert_allclose(rates, [0.040, 0.040, 0.041, 0.0435, 0.045], rtol=1e-14)
    assert found.all()


def test_one_point_is_a_flat_curve():
    """A single-point curve gives its rate at every tenor."""
    rates, _ = zero_rates(CURVES, np.array(["EUR", "EUR"], dtype=object), np.array([0.01, 30.0]))
    np.testing.assert_allclose(rates, [0.02, 0.02])


def test_missing_currency_is_reported_not_defaulted():
    """A currency without a curve gets NaN and found=False, never a default rate."""
    rates, found = zero_rates(CURVES, np.array(["USD", "JPY"], dtype=object), np.array([1.0, 1.0]))
    assert found.tolist() == [True, False]
    assert np.isnan(rates[1])
