"""Tests of attribution.valuation: the exercise-style dispatch over the European and American kernels."""

from __future__ import annotations

import numpy as np
from american_sample import random_american

from attribution.american import american_price
from attribution.american_greeks import american_greeks
from attribution.pricing import bsm_greeks
from attribution.valuation import MarketState, revaluation_shares, value, value_and_greeks


def _sample(n: int, seed: int) -> tuple[np.ndarray, np.ndarray, MarketState, np.ndarray]:
    o = random_american(n, seed)
    cp = np.where(o.is_call, 1.0, -1.0)
    state = MarketState(o.spot, o.vol, o.tau_years, o.rate, o.div_yield)
    american = np.random.default_rng(seed).random(n) < 0.5
    return o.strike, cp, state, american


def test_masks_send_each_row_to_its_kernel() -> None:
    """American rows equal american_greeks (rel 1e-11: matrix products round by batch), European rows exactly."""
    strike, cp, s, american = _sample(200, 3)
    g, exercised = value_and_greeks(strike, cp, s, american)
    args = (s.spot, strike, s.tau_years, s.vol, s.rate, s.div_yield, cp > 0)
    ga, ge = american_greeks(*args), bsm_greeks(*args)
    for name in ("price", "delta", "gamma", "vega", "theta_per_year", "rho", "dividend_rho", "vanna", "volga"):
        np.testing.assert_allclose(getattr(g, name)[american], getattr(ga, name)[american], rtol=1e-11, atol=1e-11)
        np.testing.assert_array_equal(getattr(g, name)[~american], getattr(ge, name)[~american])
    assert not exercised[~american].any()
    np.testing.assert_allclose(value(strike, cp, s, american)[american], american_price(*args)[american], rtol=1e-11)


def test_group_shares_one_computation_and_equals_ungrouped() -> None:
    """Rows repeated per position with a group key give the same values as the distinct rows found by value."""
    strike, cp, s, american = _sample(50, 4)
    rep = np.repeat(np.arange(50), 7)
    state = MarketState(*(getattr(s, f)[rep] for f in MarketState.__slots__))
    grouped = value(strike[rep], cp[rep], state, american[rep], group=rep)
    found = value(strike[rep], cp[rep], state, american[rep])
    np.testing.assert_array_equal(grouped, found)
    np.testing.assert_allclose(grouped, value(strike, cp, s, american)[rep], rtol=1e-11)


def test_american_revaluation_shares_add_up_to_the_american_model_pnl() -> None:
    """The five shares of an American row sum to American(state1) - American(state0) (Shapley efficiency)."""
    strike, cp, s0, american = _sample(100, 5)
    s1 = MarketState(s0.spot * 0.97, s0.vol + 0.01, np.maximum(s0.tau_years - 3 / 365, 0.0), s0.rate + 2e-4,
                     s0.div_yield)
    shares = revaluation_shares(strike, cp, s0, s1, american)
    model = value(strike, cp, s1, american) - value(strike, cp, s0, american)
    np.testing.assert_allclose(shares.total, model, rtol=1e-10, atol=1e-10)
    np.testing.assert_array_equal(shares.dividend, 0.0)  # the yield did not move: exactly zero
