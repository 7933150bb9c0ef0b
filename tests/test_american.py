"""Tests of attribution.american and attribution.american_greeks against QuantLib's QdFpAmericanEngine.

The reference is QuantLib's implementation of the same published method (Andersen, Lake, Offengelden,
"High-performance American option pricing", Journal of Computational Finance, 2016), run at a far higher
resolution than ours, its price floored at intrinsic. Errors are in price units per 100 of strike.
QuantLib's highPrecisionScheme costs ~60 ms an option, so the 2,000-option accuracy tables use its
QdFpLegendreTanhSinhScheme(48, 10, 24, 1e-9) (~1 ms an option), and a separate test checks both our
modes against the highPrecisionScheme itself on a subset.
"""

from __future__ import annotations

import numpy as np
import pytest
from american_sample import QuantLibAmerican, random_american
from option_sample import OptionSample

import attribution.american as american_module
from attribution.american import (
    FAST,
    PRECISE,
    STANDARD,
    TWO_BOUNDARY_RULE,
    BoundaryMemo,
    american_invalid_reasons,
    american_price,
    exercise_boundary,
    put_values,
    solve_put_boundaries,
)
from attribution.american_greeks import NOT_IDENTIFIABLE_RULE, american_greeks, american_implied_vol
from attribution.pricing import InvalidPricingInput, bsm_greeks, bsm_price

ql = pytest.importorskip("QuantLib")

N_TABLE = 2000  # the ">= 2,000 random options"
N_HIGH_PRECISION = 60
N_GREEKS = 150


@pytest.fixture(scope="module")
def table() -> tuple[OptionSample, np.ndarray]:
    """2,000 random options (S/K 0.5-2, 1 day-3 years, vol 5-100 %, r 0-8 %, q 0-10 %) and QuantLib's prices."""
    o = random_american(N_TABLE, seed=20260)
    return o, QuantLibAmerican(ql, "legendre_tanh_sinh").prices(o)


def _errors_per_100(o: OptionSample, ours: np.ndarray, reference: np.ndarray) -> np.ndarray:
    return np.abs(ours - reference) * 100.0 / o.strike


def test_standard_mode_accuracy_table(table) -> None:
    """Standard mode vs QuantLib QdFpAmericanEngine: max <= 1.5e-3, p99 <= 3e-4, RMSE <= 1e-4 per 100 of strike."""
    o, reference = table
    err = _errors_per_100(o, american_price(*o.args(), scheme=STANDARD), reference)
    assert err.max() <= 1.5e-3
    assert np.quantile(err, 0.99) <= 3e-4
    assert np.sqrt(np.mean(err**2)) <= 1e-4


def test_precise_mode_accuracy_table(table) -> None:
    """Precise mode vs QuantLib QdFpAmericanEngine: max error <= 5e-5 per 100 of strike."""
    o, reference = table
    err = _errors_per_100(o, american_price(*o.args(), scheme=PRECISE), reference)
    assert err.max() <= 5e-5


def test_both_modes_against_quantlib_high_precision_scheme() -> None:
    """On a subset, QuantLib's highPrecisionScheme itself: standard max <= 1.5e-3, precise max <= 5e-5."""
    o = random_american(N_HIGH_PRECISION, seed=4242)
    reference = QuantLibAmerican(ql, "high_precision").prices(o)
    assert _errors_per_100(o, american_price(*o.args(), scheme=STANDARD), reference).max() <= 1.5e-3
    assert _errors_per_100(o, american_price(*o.args(), scheme=PRECISE), reference).max() <= 5e-5


def test_fast_scheme_at_least_as_accurate_as_quantlib_fast_scheme(table) -> None:
    """The benchmark's FAST scheme errs less than QuantLib's fastScheme (max, p99, RMSE) on the same options."""
    o, reference = table
    index = np.arange(500)
    ql_fast = QuantLibAmerican(ql, "fast").prices(o, index)
    sub = OptionSample(*(getattr(o, f)[index] for f in OptionSample.__slots__))
    ours = _errors_per_100(sub, american_price(*sub.args(), scheme=FAST), reference[index])
    theirs = _errors_per_100(sub, ql_fast, reference[index])
    assert ours.max() <= theirs.max()
    assert np.quantile(ours, 0.99) <= np.quantile(theirs, 0.99)
    assert np.sqrt(np.mean(ours**2)) <= np.sqrt(np.mean(theirs**2))


def test_exercise_region_is_exactly_intrinsic_and_never_below_european(table) -> None:
    """Beyond the boundary the price is intrinsic exactly; everywhere it is >= max(intrinsic, European)."""
    o, _ = table
    price = american_price(*o.args())
    cp = np.where(o.is_call, 1.0, -1.0)
    intrinsic = np.maximum(cp * (o.spot - o.strike), 0.0)
    assert np.all(price >= np.maximum(intrinsic, bsm_price(*o.args())))
    boundary = exercise_boundary(o.tau_years, o.vol, o.rate, o.div_yield, o.strike, o.is_call)
    exercised = np.where(o.is_call, o.spot >= boundary, o.spot <= boundary)
    assert exercised.sum() > 50  # the sample reaches the exercise region
    assert np.array_equal(price[exercised], intrinsic[exercised])


def test_never_exercised_early_is_the_european_price() -> None:
    """A put with r <= 0 and a call with q <= 0 are worth the European price (QuantLib's QdFp engine agrees)."""
    spot, strike, tau, vol = np.array([90.0, 110.0]), 100.0, 547 / 365, 0.3
    put = american_price(spot, strike, tau, vol, np.array([0.0, -0.01]), 0.02, False)
    call = american_price(spot, strike, tau, vol, 0.03, np.array([0.0, -0.01]), True)
    np.testing.assert_array_equal(put, bsm_price(spot, strike, tau, vol, np.array([0.0, -0.01]), 0.02, False))
    np.testing.assert_array_equal(call, bsm_price(spot, strike, tau, vol, 0.03, np.array([0.0, -0.01]), True))
    reference = QuantLibAmerican(ql, "legendre_tanh_sinh")
    option = reference.option(547, False, strike)
    assert put[0] == pytest.approx(reference.price(option, 90.0, 0.0, 0.02, vol, 10.0), abs=1e-10)


def test_expiry_is_intrinsic_and_greeks_are_the_limits() -> None:
    """tau = 0: intrinsic value; delta is the step (1/2 at the strike, as the European kernel); theta 0."""
    spot = np.array([80.0, 100.0, 120.0])
    g = american_greeks(spot, 100.0, 0.0, 0.3, 0.05, 0.01, False)
    np.testing.assert_array_equal(g.price, [20.0, 0.0, 0.0])
    np.testing.assert_array_equal(g.delta, [-1.0, -0.5, 0.0])
    np.testing.assert_array_equal(g.theta_per_year, 0.0)


def test_two_boundary_cases_are_rejected_with_a_named_rule() -> None:
    """Put with q < r < 0 and call with r < q < 0 are refused by name; r <= 0 <= q put is allowed."""
    reasons = american_invalid_reasons(100.0, 100.0, 1.0, 0.2, np.array([-0.01, -0.03, -0.01]),
                                       np.array([-0.02, -0.01, 0.01]), np.array([False, True, False]))
    assert list(reasons) == [TWO_BOUNDARY_RULE, TWO_BOUNDARY_RULE, ""]
    with pytest.raises(InvalidPricingInput, match="two boundaries"):
        american_price(100.0, 100.0, 1.0, 0.2, -0.01, -0.02, False)


def test_zero_vol_is_the_best_deterministic_exercise() -> None:
    """vol = 0: put worth max over t of K e^-rt - S e^-qt (QuantLib's QdFp engine has the same limit)."""
    price = american_price(np.array([95.0, 80.0]), 100.0, 2.0, 0.0, 0.05, 0.03, False)
    t = np.linspace(0.0, 2.0, 200001)[:, None]
    brute = np.max(100.0 * np.exp(-0.05 * t) - np.array([95.0, 80.0]) * np.exp(-0.03 * t), axis=0)
    np.testing.assert_allclose(price, brute, atol=1e-8)


def test_spot_only_revaluation_reuses_the_boundary_and_equals_separate_calls() -> None:
    """Pricing many spots at once (one boundary) equals pricing each alone (vectorised equals a loop)."""
    spot = np.linspace(60.0, 160.0, 11)
    together = american_price(spot, 100.0, 0.75, 0.35, 0.06, 0.01, False)
    alone = np.array([american_price(s, 100.0, 0.75, 0.35, 0.06, 0.01, False)[0] for s in spot])
    np.testing.assert_array_equal(together, alone)


def test_an_options_value_does_not_depend_on_what_is_priced_with_it() -> None:
    """Bit for bit: boundaries and values solved in one batch equal those solved alone or in other batches.

    A night split by book (the Dask engine) prices each part's options together, so an option's bits must
    not depend on its batch; a BLAS product in the boundary interpolation broke that in the last bits.
    Reference: the functions' own results on the whole batch (exact equality, no tolerance).
    """
    rng = np.random.default_rng(5)
    n = 4_200  # enough states for two threads, in chunks of american._CHUNK_STATES_THREADED
    T, vol = rng.uniform(0.02, 3.0, n), rng.uniform(0.05, 0.8, n)
    r, q = rng.uniform(0.001, 0.08, n), rng.uniform(0.0, 0.1, n)
    whole = solve_put_boundaries(T, vol, r, q, threads=1, memo=None)  # no memo: every state solved each time
    assert n >= 2 * american_module._MIN_CHUNKS_PER_THREAD * american_module._CHUNK_STATES_THREADED
    np.testing.assert_array_equal(solve_put_boundaries(T, vol, r, q, threads=2, memo=None).h, whole.h)
    for size in (1, 7, 127, 129, 511, 513):
        for lo in range(0, n, size * 5):
            part = solve_put_boundaries(T[lo:lo + size], vol[lo:lo + size], r[lo:lo + size], q[lo:lo + size],
                                        threads=1, memo=None)
            np.testing.assert_array_equal(part.h, whole.h[lo:lo + size])
    order = rng.permutation(n)
    np.testing.assert_array_equal(
        solve_put_boundaries(T[order], vol[order], r[order], q[order], threads=1, memo=None).h, whole.h[order])
    x = rng.uniform(0.5, 1.6, 2_000)
    state = rng.integers(0, n, 2_000)
    values = put_values(whole, state, x, threads=1)
    for lo, hi in ((0, 1), (9, 10), (500, 1_531), (1_999, 2_000)):
        part = put_values(whole, state[lo:hi], x[lo:hi], threads=1)
        for name in ("price", "delta", "gamma"):
            np.testing.assert_array_equal(getattr(part, name), getattr(values, name)[lo:hi])


def test_remembered_boundaries_are_the_solved_ones_and_the_memo_stays_bounded() -> None:
    """A state solved before comes from the memo, bit for bit what a new solve gives; only new states are
    solved; the memo keeps at most its capacity, dropping the least recently used. Reference: ``memo=None``
    solves."""
    rng = np.random.default_rng(9)
    n = 60
    T, vol = rng.uniform(0.02, 3.0, n), rng.uniform(0.05, 0.8, n)
    r, q = rng.uniform(0.001, 0.08, n), rng.uniform(0.0, 0.1, n)
    memo = BoundaryMemo(capacity=50)
    first = solve_put_boundaries(T[:40], vol[:40], r[:40], q[:40], memo=memo)
    assert len(memo) == 40
    solved: list[int] = []
    original = memo.solve

    def counting(T, vol, r, q, scheme, solve):
        return original(T, vol, r, q, scheme, lambda rows: (solved.append(rows.size), solve(rows))[1])

    memo.solve = counting  # type: ignore[method-assign]
    mix = np.r_[np.arange(20, 60), np.arange(0, 5)]  # 20 remembered, 20 new, then 5 of the first solved
    again = solve_put_boundaries(T[mix], vol[mix], r[mix], q[mix], memo=memo)
    fresh = solve_put_boundaries(T[mix], vol[mix], r[mix], q[mix], memo=None)
    np.testing.assert_array_equal(again.h, fresh.h)
    np.testing.assert_array_equal(first.h, solve_put_boundaries(T[:40], vol[:40], r[:40], q[:40], memo=None).h)
    assert solved == [20]  # states 40-59 only: 0-4 and 20-39 were remembered
    assert len(memo) == 50  # 60 distinct states seen, the 10 least recently used (5-14) dropped
    solved.clear()
    solve_put_boundaries(T[:10], vol[:10], r[:10], q[:10], memo=memo)
    assert solved == [5]  # 0-4 were used again in the mix, so kept


def test_the_memo_serves_threads_at_once() -> None:
    """Threads solving overlapping states through one small memo (entries dropped while others read) get
    the solved boundaries and no error (the demo's build prices on two threads). Reference: ``memo=None``."""
    from concurrent.futures import ThreadPoolExecutor

    rng = np.random.default_rng(12)
    n = 400
    T, vol = rng.uniform(0.02, 3.0, n), rng.uniform(0.05, 0.8, n)
    r, q = rng.uniform(0.001, 0.08, n), rng.uniform(0.0, 0.1, n)
    expected = solve_put_boundaries(T, vol, r, q, memo=None, threads=1).h
    memo = BoundaryMemo(capacity=64)
    picks = [rng.choice(n, 60, replace=False) for _ in range(200)]

    def work(i: np.ndarray) -> np.ndarray:
        return solve_put_boundaries(T[i], vol[i], r[i], q[i], memo=memo, threads=1).h

    import sys

    interval = sys.getswitchinterval()
    sys.setswitchinterval(1e-6)  # threads switch as often as they can: any unguarded step shows
    try:
        with ThreadPoolExecutor(max_workers=4) as pool:
            results = list(pool.map(work, picks))
    finally:
        sys.setswitchinterval(interval)
    for i, h in zip(picks, results, strict=True):
        np.testing.assert_array_equal(h, expected[i])
    assert len(memo) <= 64


def test_price_is_smooth_across_r_equal_q() -> None:
    """One fixed-point equation everywhere: rho has no jump where |r - q| crosses 0.001 (second differences small)."""
    q = np.linspace(0.045, 0.055, 41)
    rho = american_greeks(100.0, 100.0, 1.0, 0.25, 0.05, q, False).rho
    assert np.max(np.abs(np.diff(rho, 2))) < 1e-2  # a switch of equations would show as a step


@pytest.fixture(scope="module")
def greek_case() -> tuple[OptionSample, dict[str, np.ndarray], np.ndarray]:
    """150 random options, their greeks by bumped QuantLib prices, and which are clear of the boundary."""
    o = random_american(N_GREEKS, seed=777)
    reference = QuantLibAmerican(ql, "legendre_tanh_sinh")
    rows = [reference.bumped_greeks(o, i, spot_bump=2e-3 * o.spot[i]) for i in range(N_GREEKS)]
    ref = {name: np.array([row[name] for row in rows]) for name in rows[0]}
    boundary = exercise_boundary(o.tau_years, o.vol, o.rate, o.div_yield, o.strike, o.is_call)
    clear = np.abs(o.spot - boundary) > 5e-3 * o.spot  # a bump across the boundary has no derivative
    return o, ref, clear


@pytest.mark.parametrize(("name", "tolerance", "units"), [
    ("delta", 1e-4, 0), ("gamma", 5e-5, -1), ("vega", 1e-2, 1), ("theta_per_year", 5e-2, 1),
    ("rho", 0.2, 1), ("dividend_rho", 0.2, 1),
])
def test_greeks_match_bumped_quantlib(greek_case, name: str, tolerance: float, units: int) -> None:
    """Standard-mode greeks vs central differences of QuantLib prices, max error per 100 of strike."""
    o, ref, clear = greek_case
    ours = getattr(american_greeks(*o.args()), name)
    scale = (100.0 / o.strike) ** units  # price-like greeks scale with the strike, gamma inversely
    ok = clear & np.isfinite(ref[name])
    assert ok.sum() > 0.8 * o.spot.size
    assert np.max(np.abs(ours - ref[name])[ok] * scale[ok]) <= tolerance


def test_vanna_matches_bumped_quantlib(greek_case) -> None:
    """Vanna vs the four-corner difference of QuantLib prices, to 1e-2 per 1.00 of vol (scale-free)."""
    o, ref, clear = greek_case
    ours = american_greeks(*o.args()).vanna
    assert np.max(np.abs(ours - ref["vanna"])[clear]) <= 1e-2


def test_delta_gamma_are_derivatives_of_the_price() -> None:
    """Analytic delta and gamma equal central differences of our own price (the boundary is held by design)."""
    o = random_american(300, seed=5)
    g = american_greeks(*o.args())
    h = 1e-5 * o.spot
    up = american_price(o.spot + h, *o.args()[1:])
    down = american_price(o.spot - h, *o.args()[1:])
    boundary = exercise_boundary(o.tau_years, o.vol, o.rate, o.div_yield, o.strike, o.is_call)
    clear = np.abs(o.spot - boundary) > 3e-3 * o.spot
    np.testing.assert_allclose(g.delta[clear], ((up - down) / (2 * h))[clear], atol=1e-6)
    np.testing.assert_allclose(g.gamma[clear] * o.strike[clear] / 100,
                               ((up - 2 * g.price + down) / h**2 * o.strike / 100)[clear], atol=1e-5)


def test_deep_in_the_money_american_put_has_no_positive_theta() -> None:
    """Deep ITM put, r = 8 %: European theta > 0 (common practice, no source), American theta exactly 0."""
    args = (np.array([40.0, 60.0]), 100.0, 2.0, 0.2, 0.08, 0.0, False)
    assert np.all(bsm_greeks(*args).theta_per_year > 0)
    american = american_greeks(*args)
    np.testing.assert_array_equal(american.theta_per_year, 0.0)
    np.testing.assert_array_equal(american.price, 100.0 - args[0])
    np.testing.assert_array_equal(american.delta, -1.0)


def test_theta_satisfies_the_pricing_equation_in_the_continuation_region() -> None:
    """theta = rV - (r-q) S delta - vol^2 S^2 gamma / 2 where the option is held (Hull, the BSM PDE)."""
    g = american_greeks(100.0, 100.0, 1.0, 0.3, 0.05, 0.02, False)
    pde = 0.05 * g.price - 0.03 * 100.0 * g.delta - 0.5 * 0.09 * 100.0**2 * g.gamma
    np.testing.assert_allclose(g.theta_per_year, pde, rtol=1e-12)


def test_implied_vol_round_trip() -> None:
    """Price at a vol, solve it back from the American price: the vol again, to 1e-8."""
    o = random_american(300, seed=11)
    o = OptionSample(*(getattr(o, f)[o.days_to_expiry > 5] for f in OptionSample.__slots__))
    price = american_price(*o.args())
    result = american_implied_vol(price, o.spot, o.strike, o.tau_years, o.rate, o.div_yield, o.is_call)
    solved = result.reason == ""
    assert solved.mean() > 0.8
    np.testing.assert_allclose(result.vol[solved], o.vol[solved], atol=1e-8)
    assert set(result.reason[~solved]) <= {NOT_IDENTIFIABLE_RULE}


def test_implied_vol_not_identifiable_in_the_exercise_region() -> None:
    """A put marked at intrinsic deep in the money has no vol to solve: the named rule, NaN."""
    result = american_implied_vol(60.0, 40.0, 100.0, 1.0, 0.06, 0.0, False)
    assert np.isnan(result.vol[0])
    assert result.reason[0] == NOT_IDENTIFIABLE_RULE
    below = american_implied_vol(59.0, 40.0, 100.0, 1.0, 0.06, 0.0, False)
    assert below.reason[0] == "price below the American value at zero vol"


@pytest.mark.parametrize(("n", "threads", "step"), [(3_585, 2, 512), (3_584, 2, 128), (4_096, 1, 128), (10, 2, 128)])
def test_chunks_cover_every_state_once_and_are_longer_when_threads_share_them(n: int, threads: int,
                                                                            step: int) -> None:
    """``in_chunks`` calls its block on slices covering ``range(n)`` once each; they are ``threaded_size`` long
    when spread over threads (two threads from eight such slices: four a thread), ``size`` long otherwise. (The
    slices' lengths change no bit of a result: see the batch test above.)"""
    import threading
    seen: list[slice] = []
    names: set[str] = set()
    lock = threading.Lock()

    def block(part: slice) -> None:
        with lock:
            seen.append(part)
            names.add(threading.current_thread().name)

    american_module.in_chunks(n, 128, block, threads, 512)
    seen.sort(key=lambda part: part.start)
    assert [part.start for part in seen] == list(range(0, n, step))
    assert [part.stop for part in seen] == [min(lo + step, n) for lo in range(0, n, step)]
    assert (threading.main_thread().name in names) is (step == 128)
