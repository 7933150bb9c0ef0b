"""Tests of attribution.smile_checks: off-smile marks, butterfly and calendar arbitrage between neighbouring marks."""

from __future__ import annotations

import warnings

import numpy as np

from attribution.smile_checks import butterfly, calendar, off_smile

STRIKES = np.array([80.0, 90.0, 95.0, 100.0, 105.0, 110.0, 120.0])


def _smile(vol: np.ndarray, tau: float = 0.5):
    n = vol.size
    return (np.zeros(n, np.intp), STRIKES.copy(), np.full(n, 100.0), np.full(n, tau), vol,
            np.full(n, 0.02), np.full(n, 0.0))


def test_off_smile_flags_only_marks_beyond_the_distance_on_quadratic_smiles():
    """|vol - fitted| > distance on a quadratic smile is flagged; the same gap on a level-only smile is not."""
    smile = np.array([0, 0, 0, 0, 0, 1, 1])
    strike = np.array([90.0, 95.0, 100.0, 105.0, 110.0, 90.0, 110.0])
    vol = np.array([0.20, 0.20, 0.25, 0.21, 0.20, 0.30, 0.20])
    fitted = np.full(7, 0.20)
    quadratic = np.array([True] * 5 + [False] * 2)
    found = off_smile(smile, strike, np.log(strike / 100.0) / 0.2, vol, fitted, quadratic, 0.02)
    assert found.index.tolist() == [2]
    assert found.observed[0] == 0.25 and found.bound[0] == 0.20


def test_a_wing_the_quadratic_misses_is_not_off_smile_but_a_spike_in_it_is():
    """A wing or a tilt the fit misses is not off smile (neighbours agree); a spike 3 points above the wing is."""
    smile = np.zeros(7, dtype=np.intp)
    strike = np.array([80.0, 90.0, 100.0, 110.0, 120.0, 130.0, 140.0])
    fitted = np.full(7, 0.20)
    vol = np.array([0.20, 0.20, 0.20, 0.23, 0.23, 0.23, 0.23])
    x = np.log(strike / 100.0) / 0.2
    assert off_smile(smile, strike, x, vol, fitted, np.ones(7, bool), 0.02).index.size == 0
    vol[5] = 0.26
    assert off_smile(smile, strike, x, vol, fitted, np.ones(7, bool), 0.02).index.tolist() == [5]
    tilted = fitted + 0.03 * x                  # distances on a line in x, up to 5 points: a misfit, no bad mark
    assert np.abs(tilted - fitted).max() > 0.04
    assert off_smile(smile, strike, x, tilted, fitted, np.ones(7, bool), 0.02).index.size == 0


def test_a_flat_or_skewed_smile_has_no_butterfly_arbitrage():
    """Flat 20 % and a gentle skew give call prices convex in strike (Carr and Madan 2005): nothing flagged."""
    assert butterfly(*_smile(np.full(STRIKES.size, 0.20))).index.size == 0
    skewed = 0.20 - 0.002 * (STRIKES - 100.0) / 5.0
    assert butterfly(*_smile(skewed)).index.size == 0


def test_a_vol_spike_at_one_strike_is_butterfly_arbitrage_at_that_strike():
    """The 100 strike 12 points above its neighbours breaks convexity in strike (Carr and Madan 2005): flagged."""
    vol = np.full(STRIKES.size, 0.20)
    vol[3] = 0.32
    found = butterfly(*_smile(vol))
    assert found.index.tolist() == [3]
    assert found.observed[0] > found.bound[0]


def test_butterfly_reads_each_smile_separately_and_one_mark_per_strike():
    """Two smiles side by side are never mixed in a triple; a second mark at a flagged strike is flagged with it."""
    smile, strike, spot, tau, vol, rate, div = _smile(np.full(STRIKES.size, 0.2))
    vol2 = np.full(STRIKES.size, 0.2)
    vol2[2] = 0.35
    found = butterfly(np.concatenate([smile, smile + 1, [1]]), np.concatenate([strike, strike, [95.0]]),
                      np.concatenate([spot, spot, [100.0]]), np.concatenate([tau, tau, [0.5]]),
                      np.concatenate([vol, vol2, [0.2]]), np.concatenate([rate, rate, [0.02]]),
                      np.concatenate([div, div, [0.0]]))
    assert sorted(found.index.tolist()) == [STRIKES.size + 2, 2 * STRIKES.size]


def test_butterfly_across_two_smiles_is_quiet_where_their_strikes_meet():
    """A smile ending at strike 110 next to one starting 90, 110: the triple across them (110, 90, 110) has no
    width and is never read (each smile on its own, Carr and Madan 2005), and it raises no numpy warning either."""
    strike = np.array([100.0, 110.0, 90.0, 110.0, 120.0])
    smile = np.array([0, 0, 1, 1, 1], dtype=np.intp)
    ones = np.ones(strike.size)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        found = butterfly(smile, strike, 100.0 * ones, 0.5 * ones, 0.2 * ones, 0.02 * ones, 0.0 * ones)
    assert found.index.size == 0


def test_total_variance_falling_between_neighbouring_expiries_is_calendar_arbitrage():
    """A later expiry's mark below the earlier's total variance at its moneyness is flagged (Carr and Madan 2005)."""
    k = np.array([-0.2, -0.1, 0.0, 0.1, 0.2, -0.15, 0.0, 0.05, 0.3])
    smile = np.array([0, 0, 0, 0, 0, 1, 1, 1, 1], dtype=np.intp)
    tau = np.array([0.25] * 5 + [0.5] * 4)
    vol = np.array([0.22, 0.21, 0.20, 0.20, 0.21, 0.21, 0.13, 0.20, 0.20])   # 0.13^2 x 0.5 < 0.2^2 x 0.25
    previous = np.array([-1, 0], dtype=np.intp)
    found = calendar(smile, previous, k, vol * vol * tau)
    assert found.index.tolist() == [6]
    np.testing.assert_allclose(found.bound, [0.2 ** 2 * 0.25], rtol=1e-12)


def test_calendar_interpolates_between_the_two_neighbouring_marks_and_skips_marks_outside():
    """A later mark is compared with the earlier marks' interpolation in k; beyond their range it is not compared."""
    k = np.array([-0.1, 0.1, 0.0, 0.5])
    smile = np.array([0, 0, 1, 1], dtype=np.intp)
    w = np.array([0.010, 0.020, 0.0149, 0.0])
    found = calendar(smile, np.array([-1, 0], dtype=np.intp), k, w)
    assert found.index.tolist() == [2]
    np.testing.assert_allclose(found.bound, [0.015], rtol=1e-12)
