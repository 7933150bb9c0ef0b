"""Tests of attribution.pricing against outside references: QuantLib, handbook worked examples, trade facts.

Tolerance convention for the random-sample comparisons: ``|ours - reference| <= rtol * |reference| + floor``,
where the absolute floor is a multiple of the greek's natural unit (money max(S, K) for price, vega, theta
and the rhos, 1 for delta and vanna, 1/S for gamma). The floor only matters for values so far out of the
money that both sides are rounding noise of a cancelling difference (down to 1e-300).
"""

from __future__ import annotations

import warnings
from collections.abc import Callable
from typing import TYPE_CHECKING

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose, assert_array_equal
from option_sample import quantlib_flat_process

from attribution.pricing import Greeks, InvalidPricingInput, bsm_greeks, bsm_price, invalid_reasons

if TYPE_CHECKING:
    from option_sample import OptionSample

ql = pytest.importorskip("QuantLib")

N_REFERENCE = 10_000
EPS = np.finfo(float).eps
FIELDS = ("spot", "strike", "tau_years", "vol", "rate", "div_yield")


def _greek_unit(name: str, spot: np.ndarray, strike: np.ndarray) -> np.ndarray:
    """Natural unit of a greek, for the absolute floor of a tolerance."""
    money = np.maximum(spot, strike)
    return {"delta": np.ones_like(spot), "vanna": np.ones_like(spot), "gamma": 1.0 / spot}.get(name, money)


# --- QuantLib 1.x, AnalyticEuropeanEngine with a BlackScholesMertonProcess (flat curves, Actual365Fixed) ---

QUANTLIB_COLUMNS = ("price", "delta", "gamma", "vega", "theta_per_year", "rho", "dividend_rho")


def _quantlib_greeks(o: OptionSample) -> dict[str, np.ndarray]:
    """Per-option QuantLib results; expiry = valuation date + whole days, so its year fraction is days/365."""
    today = ql.Date(15, ql.June, 2023)
    saved = ql.Settings.instance().evaluationDate
    ql.Settings.instance().evaluationDate = today
    try:
        process, (spot, rate, div, vol), day_count = quantlib_flat_process(ql, today)
        engine = ql.AnalyticEuropeanEngine(process)
        out = np.empty((o.spot.size, len(QUANTLIB_COLUMNS)))
        for j in range(o.spot.size):
            spot.setValue(float(o.spot[j]))
            rate.setValue(float(o.rate[j]))
            div.setValue(float(o.div_yield[j]))
            vol.setValue(float(o.vol[j]))
            expiry = today + int(o.days_to_expiry[j])
            assert day_count.yearFraction(today, expiry) == o.tau_years[j]
            kind = ql.Option.Call if o.is_call[j] else ql.Option.Put
            option = ql.VanillaOption(ql.PlainVanillaPayoff(kind, float(o.strike[j])), ql.EuropeanExercise(expiry))
            option.setPricingEngine(engine)
            out[j] = (option.NPV(), option.delta(), option.gamma(), option.vega(), option.theta(), option.rho(),
                      option.dividendRho())
    finally:
        ql.Settings.instance().evaluationDate = saved
    return dict(zip(QUANTLIB_COLUMNS, out.T, strict=True))


@pytest.fixture(scope="module")
def quantlib_case(
    make_options: Callable[[int, int], OptionSample],
) -> tuple[OptionSample, dict[str, np.ndarray], Greeks]:
    """10,000 random options priced once by QuantLib and once by our kernel."""
    sample = make_options(N_REFERENCE, 20230615)
    return sample, _quantlib_greeks(sample), bsm_greeks(*sample.args())


@pytest.mark.parametrize("name", QUANTLIB_COLUMNS)
def test_price_and_greeks_match_quantlib_analytic_engine(quantlib_case, name: str) -> None:
    """Price, delta, gamma, vega, theta/yr, rho, dividend rho equal QuantLib's to rel 1e-9 (floor 1e-12 unit)."""
    # QuantLib conventions: theta per year (dV/dt), vega per 1.00 vol, rho and dividendRho per 1.00 rate.
    sample, reference, ours = quantlib_case
    floor = 1e-12 * _greek_unit(name, sample.spot, sample.strike)
    diff = np.abs(getattr(ours, name) - reference[name])
    bad = diff > 1e-9 * np.abs(reference[name]) + floor
    assert not bad.any(), f"{name}: {int(bad.sum())} option(s) off, e.g. index {np.flatnonzero(bad)[:5]}"
    assert np.isfinite(getattr(ours, name)).all()


# --- Analytic greeks against central finite differences of our own kernel (generic property, no source) ---

# (greek, differenced quantity, bumped input, sign): theta is -d(price)/d(tau).
FINITE_DIFFERENCE_CASES = [
    ("delta", "price", "spot", 1.0),
    ("gamma", "delta", "spot", 1.0),
    ("vega", "price", "vol", 1.0),
    ("theta_per_year", "price", "tau_years", -1.0),
    ("rho", "price", "rate", 1.0),
    ("dividend_rho", "price", "div_yield", 1.0),
    ("vanna", "delta", "vol", 1.0),
    ("vanna", "vega", "spot", 1.0),
    ("volga", "vega", "vol", 1.0),
]


def _input_scale(o: OptionSample) -> dict[str, np.ndarray]:
    """Move of each input that shifts d1 by about one (spot: one standard deviation of the terminal spot)."""
    rate_scale = np.minimum(1.0 / o.tau_years, o.vol / np.sqrt(o.tau_years))
    return {"spot": o.spot * o.vol * np.sqrt(o.tau_years), "vol": o.vol, "tau_years": o.tau_years,
            "rate": rate_scale, "div_yield": rate_scale}


@pytest.mark.parametrize(("greek", "quantity", "bumped", "sign"), FINITE_DIFFERENCE_CASES)
def test_greeks_match_central_finite_differences(make_options, greek: str, quantity: str, bumped: str,
                                                 sign: float) -> None:
    """Each analytic greek (vanna and volga included) equals a central difference to rtol 1e-5."""
    # Step 1e-4 of the input's scale. Tolerance: 1e-5 x (|greek| + |quantity| / input scale), plus the
    # rounding of the difference quotient (8 eps |f| / h) and a floor of 1e-12 of the greek's unit.
    o = make_options(5_000, 7)
    base = dict(zip((*FIELDS, "is_call"), o.args(), strict=True))
    scale = _input_scale(o)[bumped]
    step = 1e-4 * scale
    up = getattr(bsm_greeks(**{**base, bumped: base[bumped] + step}), quantity)
    down = getattr(bsm_greeks(**{**base, bumped: base[bumped] - step}), quantity)
    finite_difference = sign * (up - down) / (2.0 * step)
    analytic = getattr(bsm_greeks(**base), greek)
    magnitude = 0.5 * (np.abs(up) + np.abs(down))
    tolerance = (1e-5 * (np.abs(analytic) + magnitude / scale) + 8 * EPS * magnitude / step
                 + 1e-12 * _greek_unit(greek, o.spot, o.strike))
    bad = np.abs(finite_difference - analytic) > tolerance
    assert not bad.any(), f"{greek} vs d{quantity}/d{bumped}: {int(bad.sum())} off, e.g. {np.flatnonzero(bad)[:5]}"


def test_volga_matches_second_difference_of_price(make_options) -> None:
    """Volga equals (P(v+h) - 2P(v) + P(v-h)) / h^2, h = 1e-4 vol, to rtol 1e-5 of |volga| + vega/vol."""
    o = make_options(5_000, 8)
    h = 1e-4 * o.vol
    spot, strike, tau, vol, rate, div, call = o.args()
    g = bsm_greeks(*o.args())
    up = bsm_price(spot, strike, tau, vol + h, rate, div, call)
    down = bsm_price(spot, strike, tau, vol - h, rate, div, call)
    second = (up - 2.0 * g.price + down) / h**2
    rounding = 16 * EPS * (np.abs(up) + 2.0 * np.abs(g.price) + np.abs(down)) / h**2
    tolerance = 1e-5 * (np.abs(g.volga) + g.vega / vol) + rounding + 1e-12 * np.maximum(spot, strike)
    assert (np.abs(second - g.volga) <= tolerance).all()


# --- Handbook worked examples ---

def test_hull_greek_letters_worked_example() -> None:
    """Hull, Options, Futures and Other Derivatives, greek-letters example (from memory), to the printed digits."""
    # S 49, K 50, r 5 %, vol 20 %, T = 20 weeks = 20/52 years, no dividend.
    g = bsm_greeks(49.0, 50.0, 20.0 / 52.0, 0.20, 0.05, 0.0, True)
    assert_allclose(g.price, 2.40, atol=0.005)
    assert_allclose(g.delta, 0.522, atol=0.0005)
    assert_allclose(g.gamma, 0.066, atol=0.0005)
    assert_allclose(g.theta_per_year, -4.31, atol=0.005)
    assert_allclose(g.theta_per_year / 365.0, -0.0118, atol=0.00005)  # per calendar day
    assert_allclose(g.theta_per_year / 252.0, -0.0171, atol=0.00005)  # per trading day
    assert_allclose(g.vega, 12.1, atol=0.05)  # per 1.00 of vol
    assert_allclose(g.rho, 8.91, atol=0.005)  # per 1.00 of rate


# Haug, The Complete Guide to Option Pricing Formulas (1998), as reproduced in QuantLib's test suite.
# (greek, call?, S, K, T, r, q, vol, printed value); theta per year, vega and rhos per 1.00.
HAUG_VALUES = [
    ("price", True, 60.0, 65.0, 0.25, 0.08, 0.00, 0.30, 2.1334),
    ("price", False, 100.0, 95.0, 0.50, 0.10, 0.05, 0.20, 2.4648),
    ("delta", True, 105.0, 100.0, 0.50, 0.10, 0.10, 0.36, 0.5946),
    ("delta", False, 105.0, 100.0, 0.50, 0.10, 0.10, 0.36, -0.3566),
    ("gamma", True, 55.0, 60.0, 0.75, 0.10, 0.00, 0.30, 0.0278),
    ("gamma", False, 55.0, 60.0, 0.75, 0.10, 0.00, 0.30, 0.0278),
    ("vega", True, 55.0, 60.0, 0.75, 0.10, 0.00, 0.30, 18.9358),
    ("vega", False, 55.0, 60.0, 0.75, 0.10, 0.00, 0.30, 18.9358),
    ("theta_per_year", False, 430.0, 405.0, 1.0 / 12.0, 0.07, 0.05, 0.20, -31.1924),
    ("rho", True, 72.0, 75.0, 1.00, 0.09, 0.00, 0.19, 38.7325),
    ("dividend_rho", False, 500.0, 490.0, 0.25, 0.08, 0.05, 0.15, 42.2254),
]


@pytest.mark.parametrize(("greek", "is_call", "spot", "strike", "tau", "rate", "div", "vol", "printed"), HAUG_VALUES)
def test_haug_reference_values(greek: str, is_call: bool, spot: float, strike: float, tau: float, rate: float,
                               div: float, vol: float, printed: float) -> None:
    """Haug (1998) values reproduced in QuantLib's test suite, to 1e-4 absolute."""
    g = bsm_greeks(spot, strike, tau, vol, rate, div, is_call)
    assert_allclose(getattr(g, greek), printed, rtol=0.0, atol=1e-4)


# --- Facts of the trade (common practice, no source) ---

def test_one_year_at_the_money_call_and_put() -> None:
    """S = K = 100, vol 30 %, r 4 %, q 0, T 1: call ~13.75 (theta ~-7.645/yr), put ~9.83 (theta ~-3.80)."""
    # Common practice, no source; tolerances match the quoted digits.
    g = bsm_greeks(100.0, 100.0, 1.0, 0.30, 0.04, 0.0, [True, False])
    assert_allclose(g.price, [13.75, 9.83], atol=0.005)
    assert_allclose(g.theta_per_year[0], -7.645, atol=0.0005)
    assert_allclose(g.theta_per_year[1], -3.80, atol=0.005)
    assert_allclose(g.theta_per_year[0] - g.theta_per_year[1], -0.04 * 100.0 * np.exp(-0.04), rtol=1e-12)
    assert_allclose(0.04 * 100.0 * np.exp(-0.04), 3.843, atol=0.0005)
    assert_allclose(g.theta_per_year[0] / 365.0, -7.645 / 365.0, atol=0.0005 / 365.0)  # per calendar day
    assert_allclose(g.theta_per_year[0] / 252.0, -7.645 / 252.0, atol=0.0005 / 252.0)  # per trading day


def test_one_month_of_decay_is_close_to_theta_over_twelve() -> None:
    """Repricing the one-year ATM call at T = 11/12 gives ~13.10, within 0.02 of 13.75 + theta/12."""
    # Common practice, no source. 0.02 allows for the change of theta over the month (second order in time).
    g = bsm_greeks(100.0, 100.0, 1.0, 0.30, 0.04, 0.0, True)
    later = bsm_price(100.0, 100.0, 11.0 / 12.0, 0.30, 0.04, 0.0, True)
    assert_allclose(later, 13.10, atol=0.005)
    assert_allclose(later, g.price + g.theta_per_year / 12.0, atol=0.02)


def test_call_minus_put_theta_is_carry_of_the_forward(make_options) -> None:
    """theta_call - theta_put = -r K e^-rT + q S e^-qT on random inputs (rtol 1e-12, floor 1e-12 max(S, K))."""
    # Common practice, no source (time derivative of put-call parity).
    o = make_options(2_000, 3)
    s, k, t, v, r, q, _ = o.args()
    call, put = bsm_greeks(s, k, t, v, r, q, True), bsm_greeks(s, k, t, v, r, q, False)
    expected = -r * k * np.exp(-r * t) + q * s * np.exp(-q * t)
    assert_allclose(call.theta_per_year - put.theta_per_year, expected, rtol=1e-12, atol=1e-12 * np.maximum(s, k).max())


def test_theta_is_positive_where_the_trade_expects_it() -> None:
    """Deep ITM put without dividend and deep ITM call with q 10 % have positive theta (common practice)."""
    put = bsm_greeks(50.0, 100.0, 1.0, 0.20, 0.05, 0.0, False)
    call = bsm_greeks(200.0, 100.0, 1.0, 0.20, 0.02, 0.10, True)
    assert put.theta_per_year[0] > 0.0
    assert call.theta_per_year[0] > 0.0


def test_at_the_money_call_theta_is_negative_and_more_so_at_higher_vol() -> None:
    """ATM call theta < 0 and strictly decreasing as vol rises from 5 % to 150 % (common practice)."""
    vols = np.linspace(0.05, 1.50, 30)
    theta = bsm_greeks(100.0, 100.0, 0.5, vols, 0.03, 0.01, True).theta_per_year
    assert (theta < 0.0).all()
    assert (np.diff(theta) < 0.0).all()


# --- Parity, vectorisation, limits and invalid inputs ---

def test_put_call_parity_for_price_and_greeks(make_options) -> None:
    """C - P = S e^-qT - K e^-rT and its derivatives (delta, gamma, vega, rhos, vanna, volga), common practice."""
    o = make_options(2_000, 4)
    s, k, t, v, r, q, _ = o.args()
    call, put = bsm_greeks(s, k, t, v, r, q, True), bsm_greeks(s, k, t, v, r, q, False)
    dq, dr = np.exp(-q * t), np.exp(-r * t)
    money = 1e-12 * np.maximum(s, k)
    assert_allclose(call.price - put.price, s * dq - k * dr, rtol=1e-12, atol=money.max())
    assert_allclose(call.delta - put.delta, dq, rtol=1e-12, atol=1e-12)
    assert_allclose(call.rho - put.rho, t * k * dr, rtol=1e-12, atol=money.max())
    assert_allclose(call.dividend_rho - put.dividend_rho, -t * s * dq, rtol=1e-12, atol=money.max())
    for same in ("gamma", "vega", "vanna", "volga"):
        assert_allclose(getattr(call, same), getattr(put, same), rtol=1e-12, atol=0.0, err_msg=same)


def _options_with_limits(make_options, n: int, seed: int) -> tuple[np.ndarray, ...]:
    """Random options with expired ones, zero-vol ones and expired-at-strike ones scattered over the array."""
    s, k, t, v, r, q, c = (a.copy() for a in make_options(n, seed).args())
    t[::97] = 0.0           # expired
    v[13::101] = 0.0        # no volatility left
    s[::194] = k[::194]     # expired exactly at the strike
    return s, k, t, v, r, q, c


def test_vectorised_results_equal_a_scalar_loop(make_options) -> None:
    """One call on 10,000 distinct options (limits included) equals option-by-option calls, to rtol 1e-13."""
    s, k, t, v, r, q, c = _options_with_limits(make_options, 10_000, 5)
    vector = bsm_greeks(s, k, t, v, r, q, c)
    picks = np.union1d(np.arange(0, s.size, 37), np.flatnonzero((t == 0) | (v == 0))[::3])
    for j in picks:
        single = bsm_greeks(s[j], k[j], t[j], v[j], r[j], q[j], c[j])
        for name in Greeks.__slots__:
            assert_allclose(getattr(vector, name)[j], getattr(single, name)[0], rtol=1e-13,
                            atol=1e-13 * _greek_unit(name, s[j:j + 1], k[j:j + 1])[0], err_msg=f"{name} at {j}")
    assert_allclose(bsm_price(s, k, t, v, r, q, c), vector.price, rtol=1e-13, atol=1e-13 * np.maximum(s, k).max())


def test_results_do_not_depend_on_the_number_of_threads(make_options) -> None:
    """150,000 options with scattered limits: one thread and two threads give bit-identical arrays."""
    args = _options_with_limits(make_options, 150_000, 6)
    one, two = bsm_greeks(*args, threads=1), bsm_greeks(*args, threads=2)
    for name in Greeks.__slots__:
        assert_array_equal(getattr(one, name), getattr(two, name), err_msg=name)
    assert_array_equal(bsm_price(*args, threads=1), bsm_price(*args, threads=2))
    assert_array_equal(bsm_price(*args, threads=2), two.price)


def test_shapes_broadcast_and_are_kept() -> None:
    """Inputs broadcast together; a 2-d grid keeps its shape, a scalar gives one element, empty gives empty."""
    spot = np.array([[90.0], [100.0], [110.0]])
    grid = bsm_greeks(spot, [95.0, 105.0], 0.5, 0.2, 0.03, 0.01, True)
    flat = bsm_greeks(np.repeat(spot.ravel(), 2), np.tile([95.0, 105.0], 3), 0.5, 0.2, 0.03, 0.01, True)
    for name in Greeks.__slots__:
        assert getattr(grid, name).shape == (3, 2)
        assert_array_equal(getattr(grid, name).ravel(), getattr(flat, name), err_msg=name)
    assert bsm_price(100.0, 100.0, 0.5, 0.2, 0.03, 0.01, False).shape == (1,)
    assert bsm_price([], [], [], [], [], [], []).shape == (0,)


def test_threads_must_be_positive() -> None:
    """threads=0 is refused with a ValueError (None means every available core)."""
    with pytest.raises(ValueError, match="threads"):
        bsm_greeks(100.0, 100.0, 0.5, 0.2, 0.03, 0.01, True, threads=0)


def _quiet_greeks(*args) -> Greeks:
    """bsm_greeks with numpy's warnings (divide, overflow, invalid) and every Python warning turned into errors."""
    # Underflow stays silent, as numpy's default: it is not a warning (e.g. q = 1e-313 times a price).
    with warnings.catch_warnings(), np.errstate(divide="raise", over="raise", invalid="raise"):
        warnings.simplefilter("error")
        return bsm_greeks(*args)


def test_expired_options_are_worth_intrinsic_with_step_delta() -> None:
    """tau = 0: intrinsic value, delta 1/0 (0.5 sign at the strike), other greeks 0, no NaN, no warning."""
    spot = np.array([80.0, 100.0, 120.0] * 4)
    call = np.repeat([True, True, False, False], 3)
    vol = np.array([0.3] * 6 + [0.0] * 6)
    g = _quiet_greeks(spot, 100.0, 0.0, vol, 0.05, 0.08, call)
    assert_array_equal(g.price, [0.0, 0.0, 20.0, 0.0, 0.0, 20.0, 20.0, 0.0, 0.0, 20.0, 0.0, 0.0])
    assert_array_equal(g.delta, [0.0, 0.5, 1.0, 0.0, 0.5, 1.0, -1.0, -0.5, 0.0, -1.0, -0.5, 0.0])
    for name in ("gamma", "vega", "theta_per_year", "rho", "dividend_rho", "vanna", "volga"):
        assert_array_equal(getattr(g, name), 0.0, err_msg=name)
    assert_array_equal(bsm_price(spot, 100.0, 0.0, vol, 0.05, 0.08, call), g.price)


def test_zero_vol_is_worth_the_discounted_forward_intrinsic() -> None:
    """vol = 0 with time left: max(cp (S e^-qT - K e^-rT), 0), no NaN, no warning (rtol 1e-14)."""
    spot = np.array([80.0, 95.0, 100.0, 105.0, 120.0] * 2)
    call = np.repeat([True, False], 5)
    t, r, q = 0.75, 0.05, 0.02
    g = _quiet_greeks(spot, 100.0, t, 0.0, r, q, call)
    sign = np.where(call, 1.0, -1.0)
    expected = np.maximum(sign * (spot * np.exp(-q * t) - 100.0 * np.exp(-r * t)), 0.0)
    assert_allclose(g.price, expected, rtol=1e-14, atol=1e-14 * 100.0)
    for name in Greeks.__slots__:
        assert np.isfinite(getattr(g, name)).all(), name


def test_zero_vol_greeks_are_the_limit_of_small_vol() -> None:
    """Away from the forward strike, greeks at vol 0 equal those at vol 1e-6 (rtol 1e-9, floor 1e-12)."""
    spot = np.array([70.0, 90.0, 110.0, 140.0] * 2)
    call = np.repeat([True, False], 4)
    at_zero = _quiet_greeks(spot, 100.0, 0.5, 0.0, 0.03, 0.01, call)
    near_zero = bsm_greeks(spot, 100.0, 0.5, 1e-6, 0.03, 0.01, call)
    for name in Greeks.__slots__:
        assert_allclose(getattr(at_zero, name), getattr(near_zero, name), rtol=1e-9, atol=1e-12, err_msg=name)


VALID = {"spot": 100.0, "strike": 100.0, "tau_years": 0.5, "vol": 0.2, "rate": 0.03, "div_yield": 0.01}
INVALID_CASES = [
    ("spot", 0.0, "spot must be > 0"),
    ("spot", -5.0, "spot must be > 0"),
    ("strike", 0.0, "strike must be > 0"),
    ("strike", -1.0, "strike must be > 0"),
    ("vol", -0.01, "vol must be >= 0"),
    ("tau_years", -1.0 / 365.0, "tau_years must be >= 0"),
    *[(name, np.nan, f"{name} is not a finite number") for name in FIELDS],
    ("spot", np.inf, "spot is not a finite number"),
    ("vol", np.inf, "vol is not a finite number"),
    ("rate", -np.inf, "rate is not a finite number"),
]


@pytest.mark.parametrize(("field", "value", "rule"), INVALID_CASES)
def test_invalid_inputs_are_refused_with_the_rule(field: str, value: float, rule: str) -> None:
    """An invalid input raises InvalidPricingInput naming the rule; invalid_reasons flags only that option."""
    inputs = {name: np.full(3, default) for name, default in VALID.items()}
    inputs[field][1] = value
    reasons = invalid_reasons(**inputs)
    assert reasons[0] == "" and reasons[2] == ""
    assert rule in reasons[1]
    for function in (bsm_price, bsm_greeks):
        with pytest.raises(InvalidPricingInput, match="index 1") as caught:
            function(**inputs, is_call=True)
        assert rule in str(caught.value)


# --- Hypothesis properties of the limits and bounds ---

_spot = st.floats(1.0, 1000.0)
_moneyness = st.floats(0.3, 3.0)
_rate = st.floats(-0.02, 0.10)
_div = st.floats(0.0, 0.10)
_vol = st.floats(0.05, 1.50)
_call = st.booleans()


@settings(max_examples=200, deadline=None)
@given(_spot, _moneyness, st.floats(1.0 / 365.0, 5.0), _vol, _rate, _div, _call)
def test_price_within_no_arbitrage_bounds(spot, moneyness, tau, vol, rate, div, call) -> None:
    """max(fwd intrinsic, 0) <= price <= S e^-qT (call) or K e^-rT (put), to 1e-12 max(S, K) (common practice)."""
    strike = spot / moneyness
    price = bsm_price(spot, strike, tau, vol, rate, div, call)[0]
    forward_part, strike_part = spot * np.exp(-div * tau), strike * np.exp(-rate * tau)
    lower = max((1.0 if call else -1.0) * (forward_part - strike_part), 0.0)
    upper = forward_part if call else strike_part
    slack = 1e-12 * max(spot, strike)
    assert lower - slack <= price <= upper + slack


@settings(max_examples=200, deadline=None)
@given(_spot, _moneyness, st.floats(1e-14, 1e-4), _vol, _rate, _div, _call)
def test_price_is_continuous_as_tau_goes_to_zero(spot, moneyness, tau, vol, rate, div, call) -> None:
    """|P(tau) - intrinsic| <= vol S sqrt(tau)/sqrt(2 pi) + S|1-e^-q tau| + K|1-e^-r tau| (vega bound)."""
    strike = spot / moneyness
    price = bsm_price(spot, strike, tau, vol, rate, div, call)[0]
    intrinsic = bsm_price(spot, strike, 0.0, vol, rate, div, call)[0]
    bound = (vol * spot * np.sqrt(tau) / np.sqrt(2.0 * np.pi) + spot * abs(np.expm1(-div * tau))
             + strike * abs(np.expm1(-rate * tau)) + 1e-12 * max(spot, strike))
    assert abs(price - intrinsic) <= bound


@settings(max_examples=200, deadline=None)
@given(_spot, _moneyness, st.floats(1.0 / 365.0, 5.0), st.floats(1e-12, 1e-3), _rate, _div, _call)
def test_price_is_continuous_as_vol_goes_to_zero(spot, moneyness, tau, vol, rate, div, call) -> None:
    """0 <= P(vol) - P(0) <= vol S e^-qT sqrt(T)/sqrt(2 pi), the maximum vega times vol (floor 1e-12 max(S, K))."""
    strike = spot / moneyness
    price = bsm_price(spot, strike, tau, vol, rate, div, call)[0]
    at_zero = bsm_price(spot, strike, tau, 0.0, rate, div, call)[0]
    slack = 1e-12 * max(spot, strike)
    assert -slack <= price - at_zero <= vol * spot * np.exp(-div * tau) * np.sqrt(tau / (2.0 * np.pi)) + slack


@settings(max_examples=100, deadline=None)
@given(_spot, _moneyness, st.floats(0.0, 1.5), _rate, _div, _call)
def test_expired_option_limits_hold_for_any_inputs(spot, moneyness, vol, rate, div, call) -> None:
    """tau = 0 for any valid inputs: intrinsic price, |delta| in {0, 0.5, 1}, other greeks 0, finite, no warning."""
    strike = spot / moneyness
    g = _quiet_greeks(spot, strike, 0.0, vol, rate, div, call)
    sign = 1.0 if call else -1.0
    assert g.price[0] == max(sign * (spot - strike), 0.0)
    assert abs(g.delta[0]) in (0.0, 0.5, 1.0)
    assert g.gamma[0] == g.vega[0] == g.theta_per_year[0] == g.rho[0] == g.dividend_rho[0] == 0.0
    assert g.vanna[0] == g.volga[0] == 0.0
