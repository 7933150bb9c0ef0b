"""Tests of attribution.smile: the vectorised smile fit and the split of vol moves and their P&L into parts."""

from __future__ import annotations

import numpy as np
import pytest

from attribution.pricing import bsm_greeks, bsm_price
from attribution.smile import (
    fit_smiles,
    reference_scale,
    split_vol_move,
    split_vol_pnl,
    standardised_moneyness,
)

STRIKES = np.array([70.0, 80.0, 90.0, 95.0, 100.0, 105.0, 110.0, 120.0, 135.0])


def _book(n_smiles: int = 40, seed: int = 1):
    """Smiles on a common strike grid: random level, skew and curvature; x on a per-smile scale."""
    rng = np.random.default_rng(seed)
    smile = np.repeat(np.arange(n_smiles), STRIKES.size)
    strike = np.tile(STRIKES, n_smiles)
    tau = np.repeat(rng.uniform(0.1, 2.0, n_smiles), STRIKES.size)
    forward = np.full(smile.size, 100.0)
    level = rng.uniform(0.15, 0.40, n_smiles)
    skew = rng.uniform(-0.05, -0.01, n_smiles)
    curv = rng.uniform(0.0, 0.01, n_smiles)
    scale = reference_scale(smile, np.repeat(level, STRIKES.size), tau, n_smiles)
    x = standardised_moneyness(strike, forward, scale[smile])
    vol = level[smile] + skew[smile] * x + curv[smile] * x * x
    return smile, strike, tau, x, vol, n_smiles, scale[smile]


def _parts(smile, strike, x0, vol0, x1, vol1, n, sticky_moneyness=False):
    f0 = fit_smiles(smile, x0, vol0, strike, n)
    f1 = fit_smiles(smile, x1, vol1, strike, n)
    return split_vol_move(f0.level[smile], f0.skew[smile], f0.curvature[smile], f0.residual, x0,
                          f1.level[smile], f1.skew[smile], f1.curvature[smile], f1.residual, x1, sticky_moneyness)


def test_fit_recovers_an_exact_quadratic_smile():
    """Marks on a quadratic are fitted with zero residual and the coefficients they were built from."""
    smile, strike, _, x, vol, n, _ = _book()
    fit = fit_smiles(smile, x, vol, strike, n)
    assert fit.quadratic.all()
    np.testing.assert_allclose(fit.residual, 0.0, atol=1e-12)
    np.testing.assert_allclose(fit.at(smile, x), vol, atol=1e-12)


def test_plain_fit_matches_numpy_polyfit_per_smile():
    """Without robust reweighting each smile's fit is numpy.polyfit's weighted fit (reference: numpy; 1e-10)."""
    smile, strike, _, x, vol, n, _ = _book(12, seed=5)
    noisy = vol + np.random.default_rng(9).normal(0, 0.004, vol.size)
    fit = fit_smiles(smile, x, noisy, strike, n, iterations=0)
    for g in range(n):
        m = smile == g
        w = 1.0 / (1.0 + 0.25 * x[m] ** 2)
        c2, c1, c0 = np.polyfit(x[m], noisy[m], 2, w=np.sqrt(w))
        np.testing.assert_allclose([fit.level[g], fit.skew[g], fit.curvature[g]], [c0, c1, c2], rtol=0, atol=1e-10)


def test_parallel_shift_of_every_smile_is_all_level():
    """Every mark of a smile up by the same amount (different per smile): the whole move is level."""
    smile, strike, _, x, vol0, n, _ = _book()
    shift = np.random.default_rng(2).uniform(-0.03, 0.05, n)[smile]
    p = _parts(smile, strike, x, vol0, x, vol0 + shift, n)
    np.testing.assert_allclose(p.level, shift, atol=1e-12)
    for other in (p.skew, p.curvature, p.own, p.spot_implied):
        np.testing.assert_allclose(other, 0.0, atol=1e-12)


def test_rotation_around_the_money_is_skew_with_level_near_zero():
    """vol1 = vol0 + beta x (a rotation around the forward): the move is skew, level and curvature ~ 0."""
    smile, strike, _, x, vol0, n, _ = _book()
    beta = np.random.default_rng(4).uniform(-0.02, 0.02, n)[smile]
    p = _parts(smile, strike, x, vol0, x, vol0 + beta * x, n)
    np.testing.assert_allclose(p.skew, beta * x, atol=1e-12)
    np.testing.assert_allclose(p.level, 0.0, atol=1e-12)
    np.testing.assert_allclose(p.curvature, 0.0, atol=1e-12)
    np.testing.assert_allclose(p.own, 0.0, atol=1e-12)


def test_a_single_planted_mark_move_is_all_own():
    """One mark jumps 4 vol points, the rest of its smile is unchanged: the jump is own, the smile does not move."""
    smile, strike, _, x, vol0, n, _ = _book()
    vol1 = vol0.copy()
    hit = 3 * STRIKES.size + 6
    vol1[hit] += 0.04
    p = _parts(smile, strike, x, vol0, x, vol1, n)
    assert p.own[hit] == pytest.approx(0.04, abs=1e-9)
    np.testing.assert_allclose(np.delete(p.own, hit), 0.0, atol=1e-9)
    for other in (p.level, p.skew, p.curvature):
        np.testing.assert_allclose(other, 0.0, atol=1e-9)


def test_parts_add_up_to_the_vol_move_exactly_for_any_move():
    """Noisy marks on both dates and a spot move: level + skew + curvature + own = vol1 - vol0 (1e-14)."""
    smile, strike, _, x0, vol0, n, _ = _book(seed=7)
    rng = np.random.default_rng(8)
    vol0 = vol0 + rng.normal(0, 0.01, vol0.size)
    x1 = x0 - rng.normal(0, 0.1, n)[smile]
    vol1 = vol0 + rng.normal(0, 0.02, vol0.size)
    for sticky in (False, True):
        p = _parts(smile, strike, x0, vol0, x1, vol1, n, sticky)
        total = p.level + p.skew + p.curvature + p.own + p.spot_implied
        np.testing.assert_allclose(total, vol1 - vol0, rtol=0, atol=1e-14)


def test_fewer_than_three_strikes_is_level_only():
    """A smile of two strikes gets its weighted mean vol as level, no skew or curvature, and says so."""
    smile = np.array([0, 0, 1, 1, 1])
    strike = np.array([90.0, 110.0, 90.0, 100.0, 110.0])
    x = np.array([-0.5, 0.5, -0.5, 0.0, 0.5])
    vol = np.array([0.22, 0.20, 0.22, 0.20, 0.19])
    fit = fit_smiles(smile, x, vol, strike, 2)
    assert fit.quadratic.tolist() == [False, True]
    assert fit.strikes.tolist() == [2, 3]
    assert fit.level[0] == pytest.approx(0.21) and fit.skew[0] == 0.0 and fit.curvature[0] == 0.0


def test_call_and_put_on_one_strike_count_as_one_strike():
    """Two marks at each of two strikes (call and put) is still two distinct strikes: level only."""
    smile = np.zeros(4, dtype=np.intp)
    fit = fit_smiles(smile, np.array([-0.3, -0.3, 0.3, 0.3]), np.array([0.2, 0.21, 0.19, 0.2]),
                     np.array([90.0, 90.0, 110.0, 110.0]), 1)
    assert not fit.quadratic[0] and fit.strikes[0] == 2


def test_vol_pnl_parts_add_up_to_vega_plus_volga_exactly():
    """units (vega dvol + volga dvol^2 / 2) is the sum of the four parts (sticky strike), to 1e-9 of an amount."""
    rng = np.random.default_rng(11)
    smile, strike, tau, x0, vol0, n, _ = _book(seed=11)
    vol1 = vol0 + rng.normal(0, 0.02, vol0.size)
    p = _parts(smile, strike, x0, vol0, x0, vol1, n)
    g = bsm_greeks(100.0, strike, tau, vol0, 0.03, 0.01, rng.random(vol0.size) < 0.5)
    units = rng.uniform(-500, 500, vol0.size)
    pnl = split_vol_pnl(units, g.vega, g.volga, p)
    dvol = vol1 - vol0
    whole = units * (g.vega * dvol + 0.5 * g.volga * dvol * dvol)
    np.testing.assert_allclose(pnl.level + pnl.skew + pnl.curvature + pnl.own, whole, rtol=0, atol=1e-9)
    np.testing.assert_allclose(pnl.vega + pnl.volga, whole, rtol=0, atol=1e-9)
    np.testing.assert_allclose(pnl.smile_delta, 0.0, atol=0)


def test_sticky_moneyness_moves_the_smile_roll_into_smile_delta():
    """A smile fixed in moneyness while spot falls: all spot-implied, into smile delta, the total kept (1e-9)."""
    smile, strike, tau, x0, vol0, n, scale = _book(seed=13)
    x1 = standardised_moneyness(strike, np.full(strike.size, 97.0), scale)   # forward 100 -> 97
    fit0 = fit_smiles(smile, x0, vol0, strike, n)
    vol1 = fit0.at(smile, x1)                                                # the prior smile at the new moneyness
    g = bsm_greeks(100.0, strike, tau, vol0, 0.0, 0.0, True)
    units = np.full(vol0.size, 10.0)
    strike_parts = _parts(smile, strike, x0, vol0, x1, vol1, n, sticky_moneyness=False)
    money_parts = _parts(smile, strike, x0, vol0, x1, vol1, n, sticky_moneyness=True)
    np.testing.assert_allclose(money_parts.spot_implied, vol1 - vol0, atol=1e-12)
    for other in (money_parts.level, money_parts.skew, money_parts.curvature, money_parts.own):
        np.testing.assert_allclose(other, 0.0, atol=1e-12)
    a, b = split_vol_pnl(units, g.vega, g.volga, strike_parts), split_vol_pnl(units, g.vega, g.volga, money_parts)
    np.testing.assert_allclose(b.vega + b.volga + b.smile_delta, a.vega + a.volga, rtol=0, atol=1e-9)
    assert np.abs(b.smile_delta).max() > 0.1


def test_smile_delta_is_the_smile_adjusted_delta_for_a_small_spot_move():
    """For a small spot move, smile delta is units vega (dvol/dS along the smile) dS: the smile-adjusted delta."""
    # Common practice, no source. Reference: a central finite difference of the prior smile; tolerance 1e-3 of the
    # largest term, what the second-order terms of a 0.01 % move leave.
    smile, strike, tau, x0, vol0, n, scale = _book(seed=17)
    fit0 = fit_smiles(smile, x0, vol0, strike, n)
    ds = 0.01

    def smile_vol(spot: float) -> np.ndarray:
        return fit0.at(smile, standardised_moneyness(strike, np.full(strike.size, spot), scale))

    x1 = standardised_moneyness(strike, np.full(strike.size, 100.0 + ds), scale)
    vol1 = smile_vol(100.0 + ds)
    parts = _parts(smile, strike, x0, vol0, x1, vol1, n, sticky_moneyness=True)
    g = bsm_greeks(100.0, strike, tau, vol0, 0.0, 0.0, True)
    pnl = split_vol_pnl(np.ones(vol0.size), g.vega, g.volga, parts)
    dvol_ds = (smile_vol(100.0 + 1e-4) - smile_vol(100.0 - 1e-4)) / 2e-4
    first_order = g.vega * dvol_ds * ds
    np.testing.assert_allclose(pnl.smile_delta, first_order, rtol=0, atol=1e-3 * np.abs(first_order).max())
    # and the repriced option agrees: the model's change along the smile = delta + smile delta (1e-3 of the largest)
    moved = bsm_price(100.0 + ds, strike, tau, vol1, 0.0, 0.0, True) - bsm_price(100.0, strike, tau, vol0, 0.0, 0.0,
                                                                                True)
    np.testing.assert_allclose(g.delta * ds + pnl.smile_delta, moved, rtol=0, atol=1e-3 * np.abs(moved).max())
