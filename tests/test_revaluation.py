"""Tests of the order-independent (Shapley) revaluation split in attribution/revaluation.py.

References: the Shapley value and its axioms (efficiency, symmetry, dummy, additivity) and its
definition as the average marginal contribution over all n! orders: L. S. Shapley, "A value for
n-person games" (1953). Taylor's theorem for the small-move limit (common practice, no source).
Model prices and greeks come from attribution.pricing, checked there against QuantLib.
"""

from __future__ import annotations

from itertools import permutations
from math import comb

import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from attribution import revaluation
from attribution.pricing import InvalidPricingInput, bsm_greeks, price_unchecked
from attribution.revaluation import (
    FACTOR_NAMES,
    SHAPLEY_WEIGHTS,
    RevaluationShares,
    shapley_allocate,
    shapley_shares,
    shapley_weight_matrix,
)

EXACT_RTOL = 1e-12  # sum of shares vs model P&L, relative to the size of the allocation


def _book(n: int, seed: int = 7) -> dict[str, np.ndarray]:
    """A random book with overnight moves; positions 0-2 expire on the run date (tau1 = 0), 3 gets vol1 = 0."""
    rng = np.random.default_rng(seed)
    tau0 = rng.uniform(1 / 365, 2.0, n)
    tau0[:3] = 1 / 365
    spot0 = rng.uniform(60.0, 140.0, n)
    vol0 = rng.uniform(0.08, 0.6, n)
    rate0 = rng.uniform(-0.01, 0.06, n)
    div0 = rng.uniform(0.0, 0.04, n)
    book = {
        "strike": rng.uniform(50.0, 150.0, n), "cp": np.where(rng.random(n) < 0.5, 1.0, -1.0),
        "spot0": spot0, "vol0": vol0, "tau0": tau0, "rate0": rate0, "div0": div0,
        "spot1": spot0 * np.exp(rng.normal(0.0, 0.03, n)), "vol1": np.maximum(vol0 + rng.normal(0.0, 0.02, n), 0.0),
        "tau1": np.maximum(tau0 - 1 / 365, 0.0), "rate1": rate0 + rng.normal(0.0, 5e-4, n),
        "div1": div0 + rng.normal(0.0, 5e-4, n),
    }
    book["vol1"][3:4] = 0.0
    return book


def _model_pnl(b: dict[str, np.ndarray]) -> np.ndarray:
    """model(state1) - model(state0) with the reference pricing kernel."""
    run = price_unchecked(b["spot1"], b["strike"], b["tau1"], b["vol1"], b["rate1"], b["div1"], b["cp"])
    prior = price_unchecked(b["spot0"], b["strike"], b["tau0"], b["vol0"], b["rate0"], b["div0"], b["cp"])
    return run - prior


def _as_matrix(shares: RevaluationShares) -> np.ndarray:
    return np.stack([getattr(shares, name) for name in FACTOR_NAMES])


def _state_values(f, prior: np.ndarray, run: np.ndarray) -> np.ndarray:
    """Values of a toy function f(x) at the 2**n states (bit i of the state = factor i at its run value)."""
    n = prior.size
    return np.array([f(np.where([(m >> i) & 1 for i in range(n)], run, prior)) for m in range(2**n)])


def test_weight_matrix_matches_shapley_formula() -> None:
    """Weights are 1/(n C(n-1,|S|)) with sign +/- and rows/columns sum to the efficiency pattern (Shapley 1953)."""
    n = 5
    assert SHAPLEY_WEIGHTS.shape == (32, 5)
    for m in range(32):
        for i in range(n):
            others = bin(m).count("1") - ((m >> i) & 1)
            expected = 1.0 / (n * comb(n - 1, others))
            assert SHAPLEY_WEIGHTS[m, i] == pytest.approx(expected if (m >> i) & 1 else -expected, rel=1e-15)
    row_sums = SHAPLEY_WEIGHTS.sum(axis=1)
    assert_allclose(row_sums[[0, 31]], [-1.0, 1.0], rtol=0, atol=1e-15)
    assert_allclose(row_sums[1:31], 0.0, rtol=0, atol=1e-15)
    assert_allclose(SHAPLEY_WEIGHTS.sum(axis=0), 0.0, rtol=0, atol=1e-15)
    assert_array_equal(shapley_weight_matrix(2), [[-0.5, -0.5], [0.5, -0.5], [-0.5, 0.5], [0.5, 0.5]])


def test_shares_sum_exactly_to_model_pnl() -> None:
    """Efficiency: the five shares add up to model(state1) - model(state0), expiry on the run date included."""
    book = _book(2000)
    shares = shapley_shares(**book)
    pnl = _model_pnl(book)
    scale = np.abs(_as_matrix(shares)).sum(axis=0)
    assert np.all(np.abs(shares.total - pnl) <= EXACT_RTOL * scale)
    assert_array_equal(shares.total, _as_matrix(shares).sum(axis=0))


def test_state_prices_match_reference_kernel() -> None:
    """The specialised 32-state pricer agrees with price_unchecked on every state (reference: attribution.pricing)."""
    book = _book(500)
    pairs = {name: (book[f"{name}0"], book[f"{name}1"]) for name in ("spot", "vol", "tau", "rate", "div")}
    pv0 = np.where(np.arange(500) % 2 == 0, 0.0, 3.0)  # half the book on an escrowed spot (discrete dividends)
    pairs["pv"] = (pv0, pv0 * 0.98)
    states = revaluation._revalue_states(book["strike"], book["cp"], out=np.empty((32, 500)), **pairs)
    for m in range(32):
        a, b, c, d, e = ((m >> i) & 1 for i in range(5))
        expected = price_unchecked(pairs["spot"][a] - pairs["pv"][e], book["strike"], pairs["tau"][c],
                                   pairs["vol"][b], pairs["rate"][d], pairs["div"][e], book["cp"])
        assert_allclose(states[m], expected, rtol=1e-14, atol=1e-14)


def test_dividend_present_value_moves_with_the_dividend_factor() -> None:
    """An ex-date (S and D fall by the dividend) splits into offsetting spot and dividend shares; the sum is exact."""
    n = 4
    one = np.ones(n)
    strike, cp = np.array([90.0, 100.0, 110.0, 100.0]), np.array([1.0, 1.0, -1.0, -1.0])
    shares = shapley_shares(strike, cp, 100.0 * one, 0.25 * one, 0.5 * one, 0.04 * one, 0.0 * one,
                            98.0 * one, 0.25 * one, 0.5 * one, 0.04 * one, 0.0 * one, pv0=2.0 * one, pv1=0.0 * one)
    assert_allclose(shares.total, 0.0, atol=1e-12)  # the escrowed spot did not move: no model P&L
    assert np.all(np.abs(shares.spot) > 0.1) and np.all(np.abs(shares.dividend) > 0.1)
    assert_allclose(shares.spot, -shares.dividend, atol=1e-12)
    assert np.all(shares.vol == 0.0) and np.all(shares.time == 0.0) and np.all(shares.rates == 0.0)


def test_symmetric_factors_get_equal_shares() -> None:
    """Symmetry axiom: two factors entering a toy value alike, with equal moves, get equal shares (Shapley 1953)."""
    def value(x: np.ndarray) -> float:
        return x[0] * x[1] * np.exp(x[2]) + x[0] ** 2 + x[1] ** 2 - 3.0 * x[3] * x[4]

    prior = np.array([1.0, 1.0, 0.2, 0.5, -1.0])
    run = np.array([1.7, 1.7, -0.4, 1.5, 2.0])
    shares = shapley_allocate(_state_values(value, prior, run))
    assert shares[0] == pytest.approx(shares[1], rel=1e-14)
    assert shares.sum() == pytest.approx(value(run) - value(prior), rel=1e-14)


def test_factor_that_does_not_move_gets_exactly_zero() -> None:
    """Dummy axiom: a factor with no effect (toy) or no move (BSM rates and dividend) gets exactly 0 (Shapley 1953)."""
    prior = np.array([1.0, 2.0, 3.0, 4.0, 5.0])
    run = np.array([1.5, 2.5, 3.5, 4.5, 5.5])
    toy = shapley_allocate(_state_values(lambda x: x[0] * x[1] + np.sin(x[2]) * x[4], prior, run))
    assert toy[3] == 0.0
    book = _book(300)
    book["rate1"] = book["rate0"].copy()
    book["div1"] = book["div0"].copy()
    shares = shapley_shares(**book)
    assert_array_equal(shares.rates, 0.0)
    assert_array_equal(shares.dividend, 0.0)


def test_allocation_is_additive() -> None:
    """Additivity axiom: the split of a sum of two value tables is the sum of their splits (Shapley 1953)."""
    rng = np.random.default_rng(3)
    first, second = rng.normal(size=(32, 40)), rng.normal(size=(32, 40))
    assert_allclose(shapley_allocate(first + second), shapley_allocate(first) + shapley_allocate(second),
                    rtol=1e-12, atol=1e-14)


def test_quadratic_cross_terms_split_in_half() -> None:
    """For a quadratic value each factor gets f_i dx + f_ii dx^2/2 + half of each cross term (from memory)."""
    rng = np.random.default_rng(5)
    hessian = rng.normal(size=(5, 5))
    hessian = hessian + hessian.T
    gradient = rng.normal(size=5)
    prior, run = rng.normal(size=5), rng.normal(size=5)

    def value(x: np.ndarray) -> float:
        y = x - prior
        return float(gradient @ y + 0.5 * y @ hessian @ y)

    dx = run - prior
    expected = gradient * dx + 0.5 * dx * (hessian @ dx)
    assert_allclose(shapley_allocate(_state_values(value, prior, run)), expected, rtol=1e-12, atol=1e-13)


def _small_move_errors(scale: float) -> np.ndarray:
    """|share - first-order Taylor term| per factor and position for moves proportional to scale."""
    strike = np.array([100.0, 100.0, 90.0, 120.0, 100.0, 80.0])
    cp = np.array([1.0, -1.0, 1.0, -1.0, 1.0, -1.0])
    spot0 = np.array([100.0, 100.0, 105.0, 110.0, 95.0, 100.0])
    vol0 = np.array([0.2, 0.25, 0.3, 0.18, 0.4, 0.22])
    tau0 = np.array([0.5, 1.0, 0.25, 2.0, 0.1, 0.75])
    rate0 = np.array([0.03, 0.02, 0.01, 0.04, 0.0, 0.05])
    div0 = np.array([0.01, 0.0, 0.02, 0.01, 0.03, 0.0])
    d_spot, d_vol, d_time = scale * 0.01 * spot0, scale * 0.01, scale / 365
    d_rate, d_div = scale * 5e-4, scale * -4e-4
    shares = shapley_shares(strike, cp, spot0, vol0, tau0, rate0, div0,
                            spot0 + d_spot, vol0 + d_vol, tau0 - d_time, rate0 + d_rate, div0 + d_div)
    g = bsm_greeks(spot0, strike, tau0, vol0, rate0, div0, cp > 0)
    first_order = np.stack([g.delta * d_spot, g.vega * d_vol, g.theta_per_year * d_time,
                            g.rho * d_rate, g.dividend_rho * d_div])
    assert np.all(np.abs(_as_matrix(shares) - first_order) <= 0.025 * np.abs(first_order))
    return np.abs(_as_matrix(shares) - first_order)


def test_small_moves_agree_with_first_order_taylor_terms() -> None:
    """Small moves: each share tends to greek x move, the error falling ~4x per halving (Taylor, common practice)."""
    ratio = _small_move_errors(1 / 16) / _small_move_errors(1 / 8)
    assert np.all((ratio > 0.2) & (ratio < 0.3)), ratio


def test_large_move_leaves_taylor_residual_but_shares_stay_exact() -> None:
    """A 20 % spot gap with a vol jump: the 2nd-order Taylor split misses > 5 %, the shares still sum exactly."""
    strike = np.array([100.0, 100.0, 90.0, 120.0])
    cp = np.array([1.0, -1.0, 1.0, -1.0])
    spot0 = np.array([100.0, 100.0, 105.0, 110.0])
    vol0 = np.array([0.2, 0.25, 0.3, 0.18])
    tau0 = np.array([0.25, 0.5, 0.1, 1.0])
    rate0 = np.array([0.03, 0.02, 0.01, 0.04])
    div0 = np.array([0.01, 0.0, 0.02, 0.01])
    d_time, d_rate, d_div = 1 / 365, 0.001, -0.0005
    spot1, vol1 = 0.8 * spot0, vol0 + 0.15
    book = {"strike": strike, "cp": cp, "spot0": spot0, "vol0": vol0, "tau0": tau0, "rate0": rate0, "div0": div0,
            "spot1": spot1, "vol1": vol1, "tau1": tau0 - d_time, "rate1": rate0 + d_rate, "div1": div0 + d_div}
    g = bsm_greeks(spot0, strike, tau0, vol0, rate0, div0, cp > 0)
    d_spot, d_vol = spot1 - spot0, vol1 - vol0
    taylor = (g.delta * d_spot + 0.5 * g.gamma * d_spot**2 + g.vega * d_vol + 0.5 * g.volga * d_vol**2
              + g.vanna * d_spot * d_vol + g.theta_per_year * d_time + g.rho * d_rate + g.dividend_rho * d_div)
    pnl = _model_pnl(book)
    assert np.all(np.abs(pnl - taylor) > 0.05 * np.abs(pnl))
    shares = shapley_shares(**book)
    assert_allclose(shares.total, pnl, rtol=EXACT_RTOL, atol=0)


def test_shares_equal_average_over_all_120_orders() -> None:
    """Shapley shares equal the step-by-step revaluation averaged over all 5! orders (Shapley 1953 definition)."""
    book = {name: values[:4] for name, values in _book(4, seed=11).items()}
    prior = [book["spot0"], book["vol0"], book["tau0"], book["rate0"], book["div0"]]
    run = [book["spot1"], book["vol1"], book["tau1"], book["rate1"], book["div1"]]

    def price(moved: set[int]) -> np.ndarray:
        s, v, t, r, q = (run[i] if i in moved else prior[i] for i in range(5))
        return price_unchecked(s, book["strike"], t, v, r, q, book["cp"])

    totals = np.zeros((5, 4))
    orders = list(permutations(range(5)))
    for order in orders:
        moved: set[int] = set()
        before = price(moved)
        for factor in order:
            moved.add(factor)
            after = price(moved)
            totals[factor] += after - before
            before = after
    assert len(orders) == 120
    assert_allclose(_as_matrix(shapley_shares(**book)), totals / 120, rtol=1e-11, atol=1e-13)


def test_vectorised_equals_loop_of_single_positions(monkeypatch: pytest.MonkeyPatch) -> None:
    """One call on a book (split in several chunks) equals one call per position (tolerance: rounding only)."""
    monkeypatch.setattr(revaluation, "CHUNK_POSITIONS", 7)
    book = _book(30, seed=2)
    together = _as_matrix(shapley_shares(**book))
    one_by_one = np.column_stack([_as_matrix(shapley_shares(**{k: v[j:j + 1] for k, v in book.items()}))
                                  for j in range(30)])
    assert_allclose(together, one_by_one, rtol=1e-13, atol=1e-14)


def test_a_positions_shares_do_not_depend_on_its_neighbours() -> None:
    """Bit for bit: a position's split is the same whatever else is split with it and wherever it sits.

    A night split by book (the Dask engine) must archive the very bits of the whole night; a BLAS product
    over the states blocks its sums by position and broke that in the last bits. Reference: the function's
    own result on the whole book (exact equality, no tolerance).
    """
    rng = np.random.default_rng(11)
    values = rng.normal(0.0, 10.0, (32, 2_000))
    whole = shapley_allocate(values)
    for lo, hi in ((0, 1), (1, 2), (3, 10), (5, 1_029), (777, 2_000), (1_999, 2_000)):
        assert_array_equal(shapley_allocate(values[:, lo:hi]), whole[:, lo:hi])
    shuffled = rng.permutation(2_000)
    assert_array_equal(shapley_allocate(values[:, shuffled]), whole[:, shuffled])
    book = _book(500, seed=4)
    together = _as_matrix(shapley_shares(**book))
    for lo, hi in ((0, 1), (13, 14), (100, 357)):
        assert_array_equal(_as_matrix(shapley_shares(**{k: v[lo:hi] for k, v in book.items()})), together[:, lo:hi])


def test_bad_inputs_are_refused_with_a_reason() -> None:
    """Mismatched shapes, cp other than +-1 and invalid states raise, naming the index and the rule."""
    book = _book(5)
    with pytest.raises(ValueError, match="1-d arrays of one length"):
        shapley_shares(**{**book, "spot1": book["spot1"][:4]})
    with pytest.raises(InvalidPricingInput, match="cp must be"):
        shapley_shares(**{**book, "cp": np.array([1.0, 0.0, 1.0, -1.0, 1.0])})
    bad_spot = book["spot1"].copy()
    bad_spot[3] = -1.0
    with pytest.raises(InvalidPricingInput, match="run-date state.*index 3: spot must be > 0"):
        shapley_shares(**{**book, "spot1": bad_spot})
    bad_vol = book["vol0"].copy()
    bad_vol[2] = np.nan
    with pytest.raises(InvalidPricingInput, match="prior state.*index 2: vol is not a finite number"):
        shapley_shares(**{**book, "vol0": bad_vol})
    with pytest.raises(ValueError, match="2\\*\\*n states"):
        shapley_allocate(np.zeros((31, 2)))
