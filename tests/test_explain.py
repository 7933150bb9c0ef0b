"""Tests of attribution.explain: the data contract's identities and the Taylor expansion's orders."""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from attribution.explain import MarketState, explain_overnight, model_value
from attribution.pricing import bsm_greeks, bsm_price


def _one(x: float) -> np.ndarray:
    return np.array([x], dtype=float)


def _state(spot: float, vol: float, tau: float, rate: float, div: float) -> MarketState:
    return MarketState(_one(spot), _one(vol), _one(tau), _one(rate), _one(div))


def _explain(s0: MarketState, s1: MarketState, strike: float = 100.0, cp: float = 1.0, units: float = 1.0,
             dt_years: float | None = None, price0: np.ndarray | None = None, price1: np.ndarray | None = None):
    k, c = _one(strike), _one(cp)
    p0 = model_value(k, c, s0) if price0 is None else price0
    p1 = model_value(k, c, s1) if price1 is None else price1
    dt = s0.tau_years - s1.tau_years if dt_years is None else _one(dt_years)
    return explain_overnight(k, c, _one(units), s0, s1, p0, p1, dt)


def test_contract_identities_hold_exactly():
    """explained + residual = actual, explained + higher_order = model, model + mark_gap = actual."""
    rng = np.random.default_rng(3)
    n = 2000
    s0 = MarketState(rng.uniform(50, 150, n), rng.uniform(0.1, 0.6, n), rng.uniform(0.05, 3, n),
                     rng.uniform(0, 0.06, n), rng.uniform(0, 0.05, n))
    s1 = MarketState(s0.spot * rng.lognormal(0, 0.03, n), s0.vol + rng.normal(0, 0.02, n).clip(-0.05),
                     s0.tau_years - 3 / 365, s0.rate + rng.normal(0, 0.001, n), s0.div_yield)
    strike, cp, units = rng.uniform(60, 140, n), np.where(rng.random(n) < 0.5, 1.0, -1.0), rng.uniform(-50, 50, n)
    price0 = model_value(strike, cp, s0) * rng.uniform(0.99, 1.01, n)  # marks a little off the model
    price1 = model_value(strike, cp, s1) * rng.uniform(0.99, 1.01, n)
    e = explain_overnight(strike, cp, units, s0, s1, price0, price1, np.full(n, 3 / 365))
    total = e.delta + e.gamma + e.vega + e.volga + e.vanna + e.theta + e.rates + e.dividend
    np.testing.assert_allclose(total, e.explained, rtol=0, atol=1e-9)
    np.testing.assert_allclose(e.explained + e.residual, e.actual, rtol=0, atol=1e-9)
    np.testing.assert_allclose(e.explained + e.higher_order, e.model, rtol=0, atol=1e-9)
    np.testing.assert_allclose(e.model + e.mark_gap, e.actual, rtol=0, atol=1e-9)
    np.testing.assert_allclose(e.actual, units * (price1 - price0), rtol=1e-12, atol=1e-12)


def test_one_month_of_time_matches_the_common_practice_figures():
    """13.75 -> 13.10 after a month, close to 13.75 + theta/12 (common practice, no source; abs 0.01)."""
    s0, s1 = _state(100, 0.30, 1.0, 0.04, 0.0), _state(100, 0.30, 11 / 12, 0.04, 0.0)
    e = _explain(s0, s1)
    np.testing.assert_allclose(model_value(_one(100), _one(1), s0), 13.75, atol=0.01)
    np.testing.assert_allclose(model_value(_one(100), _one(1), s1), 13.10, atol=0.01)
    np.testing.assert_allclose(e.theta, -7.645 / 12, atol=0.001)
    np.testing.assert_allclose(e.model, e.theta, atol=0.02)  # the theta estimate is close, not exact
    assert abs(e.higher_order[0]) < 0.02


def test_only_time_passing_is_explained_by_theta_to_second_order_in_dt():
    """With only time moving, model - theta*dt shrinks like dt^2 (Taylor's theorem; ratio ~4 on halving)."""
    errors = []
    for dt in (8 / 365, 4 / 365, 2 / 365):
        s0, s1 = _state(100, 0.25, 0.5, 0.03, 0.01), _state(100, 0.25, 0.5 - dt, 0.03, 0.01)
        e = _explain(s0, s1)
        np.testing.assert_allclose(e.delta + e.gamma + e.vega + e.rates + e.dividend, 0.0, atol=1e-15)
        errors.append(abs(e.higher_order[0]))
    ratios = np.array(errors[:-1]) / np.array(errors[1:])
    np.testing.assert_allclose(ratios, 4.0, rtol=0.05)


def test_only_spot_moving_is_explained_by_delta_and_gamma_to_third_order():
    """With only spot moving, model - (delta + gamma) shrinks like dS^3 (Taylor's theorem; ratio ~8)."""
    errors = []
    for ds in (4.0, 2.0, 1.0):
        s0, s1 = _state(100, 0.25, 0.5, 0.03, 0.01), _state(100 + ds, 0.25, 0.5, 0.03, 0.01)
        e = _explain(s0, s1, dt_years=0.0)
        errors.append(abs(e.higher_order[0]))
    ratios = np.array(errors[:-1]) / np.array(errors[1:])
    np.testing.assert_allclose(ratios, 8.0, rtol=0.1)


@settings(max_examples=80, deadline=None)
@given(
    spot=st.floats(60, 160), moneyness_sd=st.floats(-2.0, 2.0), tau=st.floats(0.1, 3.0), vol=st.floats(0.1, 0.8),
    rate=st.floats(0.0, 0.08), div=st.floats(0.0, 0.06), is_call=st.booleans(),
    spot_move_sd=st.floats(0.2, 1.0), vol_move_share=st.floats(0.05, 0.3), sign=st.sampled_from([-1.0, 1.0]),
)
def test_remainder_of_spot_and_vol_moves_is_third_order(
        spot, moneyness_sd, tau, vol, rate, div, is_call, spot_move_sd, vol_move_share, sign):
    """The remainder after delta, gamma, vega, volga and vanna is third order in the move (Taylor's theorem).

    Delta, gamma, vega, volga and vanna are the complete second-order expansion in spot and vol, so
    the remainder is third order. Moves are measured in the option's own scale (spot moves in
    standard deviations S vol sqrt(tau), vol moves as a share of vol), strikes within two standard
    deviations. Time, rates and dividends enter at first order only, so their cross terms (charm,
    veta, ...) are second order: see the next test.
    """
    sd = vol * np.sqrt(tau)
    strike = spot * np.exp(moneyness_sd * sd)
    s0 = _state(spot, vol, tau, rate, div)

    def scaled_remainder(h: float) -> float:
        """(model - explained) / h^3: tends to the cubic coefficient as h -> 0."""
        s1 = _state(spot * (1 + sign * h * spot_move_sd * sd), vol * (1 + h * vol_move_share), tau, rate, div)
        e = _explain(s0, s1, strike=strike, cp=1.0 if is_call else -1.0, dt_years=0.0)
        return float(e.higher_order[0]) / h**3

    g = np.abs([scaled_remainder(h) for h in (0.1, 0.05, 0.025, 0.0125)])
    # A third-order remainder keeps g = c3 + c4 h + ... bounded as h shrinks; a missing
    # second-order term would make it grow like 1/h (8x over this range; a sign change of c3 + c4 h
    # between the larger steps allows up to about 2.5x). Float rounding of the
    # remainder is about 1e-13 x spot, i.e. 1e-13 x spot / h^3 in g.
    rounding = 1e-13 * spot / 0.0125**3
    assert g[2:].max() <= 4.0 * g[:2].max() + rounding


def test_at_the_money_remainder_shrinks_eightfold():
    """An at-the-money option's remainder falls by 8 on halving spot and vol moves (rtol 5 %)."""
    s0 = _state(100, 0.3, 1.0, 0.03, 0.0)

    def higher_order(h: float) -> float:
        s1 = _state(100 * (1 + 0.3 * h), 0.3 * (1 + 0.2 * h), 1.0, 0.03, 0.0)
        return float(_explain(s0, s1, dt_years=0.0).higher_order[0])

    np.testing.assert_allclose(higher_order(0.1) / higher_order(0.05), 8.0, rtol=0.05)


def test_time_rates_and_dividend_cross_terms_are_second_order():
    """With time, rates and dividends moving too, the remainder shrinks about fourfold on halving."""
    s0 = _state(100, 0.25, 0.5, 0.03, 0.01)

    def higher_order(h: float) -> float:
        s1 = _state(100 * (1 + 0.04 * h), 0.25 + 0.02 * h, 0.5 - 5 * h / 365, 0.03 + 0.002 * h, 0.01 + 0.002 * h)
        return float(_explain(s0, s1).higher_order[0])

    np.testing.assert_allclose(higher_order(0.1) / higher_order(0.05), 4.0, rtol=0.25)


def test_deep_in_the_money_put_earns_positive_theta_overnight():
    """A deep in-the-money European put without dividend has positive theta P&L (common practice, no source)."""
    s0, s1 = _state(50, 0.2, 1.0, 0.05, 0.0), _state(50, 0.2, 1.0 - 1 / 365, 0.05, 0.0)
    e = _explain(s0, s1, strike=100.0, cp=-1.0, units=10.0)
    assert e.theta[0] > 0
    assert e.model[0] > 0


def test_greeks_used_are_those_of_the_prior_state():
    """The delta term uses delta at the prior state (checked against bsm_greeks directly)."""
    s0, s1 = _state(100, 0.3, 1.0, 0.04, 0.0), _state(102, 0.3, 1.0, 0.04, 0.0)
    e = _explain(s0, s1, units=3.0, dt_years=0.0)
    g = bsm_greeks(100, 100, 1.0, 0.3, 0.04, 0.0, True)
    np.testing.assert_allclose(e.delta, 3.0 * g.delta * 2.0, rtol=1e-14)
    np.testing.assert_allclose(e.gamma, 3.0 * 0.5 * g.gamma * 4.0, rtol=1e-14)
    np.testing.assert_allclose(e.model, 3.0 * (bsm_price(102, 100, 1.0, 0.3, 0.04, 0.0, True) - g.price),
                               rtol=1e-12)


def test_vectorised_explain_equals_a_loop_of_single_positions():
    """One call over many positions equals the same positions one at a time."""
    rng = np.random.default_rng(11)
    n = 50
    s0 = MarketState(rng.uniform(80, 120, n), rng.uniform(0.1, 0.5, n), rng.uniform(0.1, 2, n),
                     rng.uniform(0, 0.05, n), rng.uniform(0, 0.03, n))
    s1 = MarketState(s0.spot * 1.01, s0.vol + 0.01, s0.tau_years - 1 / 365, s0.rate, s0.div_yield + 0.001)
    strike, cp, units = rng.uniform(80, 120, n), np.where(rng.random(n) < 0.5, 1.0, -1.0), rng.uniform(1, 9, n)
    p0, p1 = model_value(strike, cp, s0), model_value(strike, cp, s1) + 0.01
    whole = explain_overnight(strike, cp, units, s0, s1, p0, p1, np.full(n, 1 / 365))
    for i in range(n):
        pick = slice(i, i + 1)
        one = explain_overnight(strike[pick], cp[pick], units[pick],
                                MarketState(*(getattr(s0, f)[pick] for f in MarketState.__dataclass_fields__)),
                                MarketState(*(getattr(s1, f)[pick] for f in MarketState.__dataclass_fields__)),
                                p0[pick], p1[pick], np.full(1, 1 / 365))
        for name in ("residual", "model", "theta", "vanna"):
            np.testing.assert_allclose(getattr(one, name), getattr(whole, name)[pick], rtol=1e-13, atol=1e-13)
