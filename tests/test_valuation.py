"""Tests of attribution.valuation: the exercise-style dispatch over the European and American kernels."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
import pytest
import QuantLib as ql
from american_sample import random_american
from numpy.testing import assert_allclose

from attribution.american import american_price
from attribution.american_greeks import american_greeks
from attribution.pricing import Greeks, bsm_greeks, greeks_unchecked
from attribution.valuation import (
    FORWARD,
    FUTURE,
    OPTION,
    UNDERLYING,
    MarketState,
    kind_codes,
    revaluation_shares,
    settlement_value,
    value,
    value_and_greeks,
)


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


# ---- delta-one kinds (data contract version 2, "Instrument kinds")
# References: QuantLib's yield term structures (flat continuous zero curves, ACT/365F) for discount
# factors and the cost-of-carry forward price S D_q / D_r; covered interest parity (Garman-Kohlhagen,
# Hull "Options, Futures, and Other Derivatives", currency forwards, from memory) for the FX forward.
# Sensitivities are checked against central finite differences of the QuantLib values.

TODAY = dt.date(2026, 11, 27)
DC = ql.Actual365Fixed()


def _ql_date(day: dt.date) -> ql.Date:
    return ql.Date(day.day, day.month, day.year)


def _discount(rate: float, days: int) -> float:
    """QuantLib's discount factor of a flat continuous zero curve, ``days`` calendar days ahead."""
    today = _ql_date(TODAY)
    ql.Settings.instance().evaluationDate = today
    curve = ql.FlatForward(today, rate, DC, ql.Continuous)
    return curve.discount(today + days)


def _ql_forward_value(spot: float, strike: float, r: float, q: float, days: int) -> float:
    """Value of a long forward per unit: S D_q(T) - K D_r(T), discount factors from QuantLib curves."""
    return spot * _discount(q, days) - strike * _discount(r, days)


def _ql_future_price(spot: float, r: float, q: float, days: int) -> float:
    """Cost-of-carry forward price S D_q(T) / D_r(T) from QuantLib curves."""
    return spot * _discount(q, days) / _discount(r, days)


def _one(kind: int, spot: float, strike: float, days: int, r: float, q: float, vol: float = 0.0,
         cp: float = 1.0) -> Greeks:
    a = lambda x: np.array([x], dtype=float)  # noqa: E731
    state = MarketState(a(spot), a(vol), a(days / 365.0), a(r), a(q))
    return value_and_greeks(a(strike), a(cp), state, kind=np.array([kind], dtype=np.int8))[0]


CASES = [(100.0, 95.0, 180, 0.04, 0.01), (2500.0, 2600.0, 400, 0.03, 0.025), (50.0, 50.0, 1, -0.005, 0.0)]


@pytest.mark.parametrize(("spot", "strike", "days", "r", "q"), CASES)
def test_forward_value_and_sensitivities_match_quantlib_curves(spot, strike, days, r, q):
    """Forward value and delta, rho, dividend rho, theta against QuantLib discount factors (rtol 1e-12 / FD 1e-6)."""
    g = _one(FORWARD, spot, strike, days, r, q)
    assert_allclose(g.price, _ql_forward_value(spot, strike, r, q, days), rtol=1e-12, atol=1e-12)
    h = 1e-5
    assert_allclose(g.delta, (_ql_forward_value(spot + h, strike, r, q, days)
                              - _ql_forward_value(spot - h, strike, r, q, days)) / (2 * h), rtol=1e-6)
    assert_allclose(g.rho, (_ql_forward_value(spot, strike, r + h, q, days)
                            - _ql_forward_value(spot, strike, r - h, q, days)) / (2 * h), rtol=1e-6, atol=1e-9)
    assert_allclose(g.dividend_rho, (_ql_forward_value(spot, strike, r, q + h, days)
                                     - _ql_forward_value(spot, strike, r, q - h, days)) / (2 * h), rtol=1e-6,
                    atol=1e-9)
    # theta per year = -dV/dtau: one calendar day less to delivery, scaled to a year (first order, rtol 1e-2)
    one_day = _ql_forward_value(spot, strike, r, q, days - 1) - _ql_forward_value(spot, strike, r, q, days)
    assert_allclose(g.theta_per_year / 365.0, one_day, rtol=2e-2, atol=1e-9)
    for zero in (g.gamma, g.vega, g.vanna, g.volga):
        assert zero[0] == 0.0


@pytest.mark.parametrize(("spot", "strike", "days", "r", "q"), CASES)
def test_future_model_price_is_the_cost_of_carry_forward(spot, strike, days, r, q):
    """Future F* = S e^((r-q)tau) and its sensitivities against QuantLib's S D_q / D_r (rtol 1e-12 / FD 1e-6)."""
    g = _one(FUTURE, spot, np.nan, days, r, q)
    assert_allclose(g.price, _ql_future_price(spot, r, q, days), rtol=1e-12)
    h = 1e-5
    assert_allclose(g.delta, (_ql_future_price(spot + h, r, q, days)
                              - _ql_future_price(spot - h, r, q, days)) / (2 * h), rtol=1e-6)
    assert_allclose(g.rho, (_ql_future_price(spot, r + h, q, days)
                            - _ql_future_price(spot, r - h, q, days)) / (2 * h), rtol=1e-6, atol=1e-9)
    assert_allclose(g.dividend_rho, (_ql_future_price(spot, r, q + h, days)
                                     - _ql_future_price(spot, r, q - h, days)) / (2 * h), rtol=1e-6, atol=1e-9)
    assert_allclose(g.theta_per_year, -(r - q) * g.price, rtol=1e-12, atol=1e-12)
    assert g.gamma[0] == g.vega[0] == g.vanna[0] == g.volga[0] == 0.0


def test_fx_forward_follows_covered_interest_parity():
    """An FX forward at the parity rate S e^((r_d - r_f) T) is worth 0; off it, (S e^-r_f T - K e^-r_d T).

    Reference: covered interest parity / Garman-Kohlhagen (Hull, currency forwards, from memory);
    discount factors from QuantLib curves. EUR/USD 1.10, r_d (USD) 4 %, r_f (EUR) 2 %, one year.
    """
    spot, r_d, r_f, days = 1.10, 0.04, 0.02, 365
    parity = spot * _discount(r_f, days) / _discount(r_d, days)
    assert_allclose(parity, 1.10 * np.exp(0.02), rtol=1e-12)  # common practice, no source: 1.1222 for these inputs
    assert_allclose(_one(FORWARD, spot, parity, days, r_d, r_f).price, 0.0, atol=1e-14)
    assert_allclose(_one(FORWARD, spot, 1.12, days, r_d, r_f).price,
                    spot * _discount(r_f, days) - 1.12 * _discount(r_d, days), rtol=1e-12)


def test_underlying_is_its_spot_with_unit_delta():
    """An underlying's value is S, its delta 1 and every other greek exactly 0 (common practice, no source)."""
    g = _one(UNDERLYING, 123.0, np.nan, 0, np.nan, 0.02)
    assert g.price[0] == 123.0 and g.delta[0] == 1.0
    assert all(getattr(g, f)[0] == 0.0 for f in ("gamma", "vega", "theta_per_year", "rho", "dividend_rho",
                                                 "vanna", "volga"))


def test_option_rows_equal_the_european_kernel_bit_for_bit_in_a_mixed_book():
    """Options inside a mixed array get exactly the European kernel's values (reference: attribution.pricing)."""
    rng = np.random.default_rng(5)
    n = 400
    kind = rng.choice([OPTION, UNDERLYING, FUTURE, FORWARD], n).astype(np.int8)
    s, k, t = rng.uniform(50, 150, n), rng.uniform(50, 150, n), rng.uniform(0.01, 2, n)
    v, r, q, cp = rng.uniform(0.1, 0.5, n), rng.uniform(0, 0.05, n), rng.uniform(0, 0.03, n), rng.choice([-1.0, 1.0], n)
    state = MarketState(s, v, t, r, q)
    mixed, exercised = value_and_greeks(k, cp, state, kind=kind)
    o = kind == OPTION
    alone = greeks_unchecked(s[o], k[o], t[o], v[o], r[o], q[o], cp[o])
    for field in Greeks.__slots__:
        np.testing.assert_array_equal(getattr(mixed, field)[o], getattr(alone, field))
    assert not exercised.any()
    np.testing.assert_array_equal(value(k, cp, state, kind=kind), mixed.price)
    one_by_one = np.array([value(k[i:i + 1], cp[i:i + 1], MarketState(*(getattr(state, f)[i:i + 1]
                                                                        for f in MarketState.__slots__)),
                                 kind=kind[i:i + 1])[0] for i in range(n)])
    np.testing.assert_array_equal(one_by_one, mixed.price)


def test_codes_of_names():
    """Kind names map to codes (null = option); an unknown kind raises."""
    kind = kind_codes(np.array(["option", None, "underlying", "future", "forward"], dtype=object))
    assert kind.tolist() == [OPTION, OPTION, UNDERLYING, FUTURE, FORWARD]
    with pytest.raises(ValueError, match="swap"):
        kind_codes(np.array(["swap"], dtype=object))


def test_settlement_values_per_kind():
    """At expiry: option intrinsic, future the spot, forward S - K, underlying S (common practice, no source)."""
    kind = np.array([OPTION, OPTION, FUTURE, FORWARD, UNDERLYING], dtype=np.int8)
    spot = np.full(5, 105.0)
    strike = np.array([100.0, 100.0, np.nan, 110.0, np.nan])
    cp = np.array([1.0, -1.0, 1.0, 1.0, 1.0])
    assert settlement_value(kind, spot, strike, cp).tolist() == [5.0, 0.0, 105.0, -5.0, 105.0]


def test_revaluation_shares_add_up_for_every_kind():
    """Shapley shares sum to value(state1) - value(state0) for every kind; an underlying's is all spot."""
    rng = np.random.default_rng(8)
    n = 200
    kind = rng.choice([OPTION, UNDERLYING, FUTURE, FORWARD], n).astype(np.int8)
    strike, cp = rng.uniform(80, 120, n), rng.choice([-1.0, 1.0], n)
    vol0 = np.where(kind == OPTION, rng.uniform(0.1, 0.4, n), 0.0)
    tau0 = np.where(kind == UNDERLYING, 0.0, rng.uniform(0.1, 2, n))
    s0 = MarketState(rng.uniform(80, 120, n), vol0, tau0, rng.uniform(0, 0.05, n), rng.uniform(0, 0.03, n))
    s1 = MarketState(s0.spot * 1.02, np.where(kind == OPTION, vol0 + 0.01, 0.0),
                     np.where(kind == UNDERLYING, 0.0, tau0 - 3 / 365), s0.rate + 0.001, s0.div_yield - 0.002)
    shares = revaluation_shares(strike, cp, s0, s1, kind=kind)
    assert_allclose(shares.total, value(strike, cp, s1, kind=kind) - value(strike, cp, s0, kind=kind), rtol=1e-12,
                    atol=1e-11)
    u = kind == UNDERLYING
    assert_allclose(shares.spot[u], s1.spot[u] - s0.spot[u], rtol=1e-14)
    assert (shares.vol[u] == 0).all() and (shares.time[u] == 0).all() and (shares.rates[u] == 0).all()
    assert (shares.vol[kind != OPTION] == 0).all()


@pytest.mark.parametrize("with_hedges", [False, True])
def test_grouped_revaluation_is_the_revaluation_of_every_row(with_hedges: bool) -> None:
    """Rows of one group (one instrument on both dates) revalued once give every row the very shares it gets
    revalued on its own: European, American and delta-one rows, bit for bit."""
    rng = np.random.default_rng(12)
    n = 60
    strike, cp = rng.uniform(80, 120, n), rng.choice([-1.0, 1.0], n)
    kind = (rng.choice([OPTION, UNDERLYING, FUTURE, FORWARD], n) if with_hedges else np.full(n, OPTION)).astype(np.int8)
    vol0 = np.where(kind == OPTION, rng.uniform(0.1, 0.4, n), 0.0)
    tau0 = np.where(kind == UNDERLYING, 0.0, rng.uniform(0.1, 2, n))
    s0 = MarketState(rng.uniform(80, 120, n), vol0, tau0, rng.uniform(0.01, 0.05, n), rng.uniform(0, 0.03, n))
    s1 = MarketState(s0.spot * rng.uniform(0.97, 1.03, n), np.where(kind == OPTION, vol0 + 0.01, 0.0),
                     np.where(kind == UNDERLYING, 0.0, tau0 - 1 / 365), s0.rate + 0.001, s0.div_yield - 0.002)
    american = (rng.random(n) < 0.3) & (kind == OPTION)
    rep = rng.permutation(np.repeat(np.arange(n), 5))  # each instrument held in 5 positions, interleaved
    pick = [MarketState(*(getattr(s, f)[rep] for f in MarketState.__slots__)) for s in (s0, s1)]
    grouped = revaluation_shares(strike[rep], cp[rep], *pick, american[rep], kind=kind[rep], group=rep)
    alone = revaluation_shares(strike, cp, s0, s1, american, kind=kind)
    for name in ("spot", "vol", "time", "rates", "dividend"):
        np.testing.assert_array_equal(getattr(grouped, name), getattr(alone, name)[rep])
    for state, one in zip(pick, (s0, s1), strict=True):  # prices and greeks once per group too
        (g, e), (g1, e1) = (value_and_greeks(strike[rep], cp[rep], state, american[rep], kind=kind[rep], group=rep),
                            value_and_greeks(strike, cp, one, american, kind=kind))
        for name in Greeks.__slots__:
            np.testing.assert_array_equal(getattr(g, name), getattr(g1, name)[rep])
        np.testing.assert_array_equal(e, e1[rep])
        np.testing.assert_array_equal(value(strike[rep], cp[rep], state, american[rep], kind=kind[rep], group=rep),
                                      value(strike, cp, one, american, kind=kind)[rep])


def _archived_hedges(tmp_path) -> dict[str, dict[str, object]]:
    from attribution.cli import main
    from tests.hedged_desk import write_hedged_desk
    from tests.mini_desk import RUN

    write_hedged_desk(tmp_path / "data")
    assert main(["run", "--as-of", RUN.isoformat(), "--data", str(tmp_path / "data"),
                 "--archive", str(tmp_path / "a.duckdb"), "--no-reports"]) == 0
    import duckdb
    with duckdb.connect(str(tmp_path / "a.duckdb"), read_only=True) as con:
        frame = con.execute("SELECT * FROM position_pnl").df()
    return frame.set_index("trade_id").to_dict("index")


def test_hedged_desk_explain_of_each_kind(tmp_path):
    """Archived hedges: shares explained by delta alone, the future's basis in the mark gap, the forward on model.

    References: plain arithmetic for the share and the future's marked P&L; QuantLib discount factors for
    the future's cost-of-carry price and the forward's value (rtol 1e-12).
    """
    from tests.hedged_desk import FUTURE_PRICE
    from tests.mini_desk import PRIOR, RUN

    rows = _archived_hedges(tmp_path)
    share = rows["H1"]
    assert share["kind"] == "underlying" and pd.isna(share["exercise"])
    assert share["pnl_actual"] == share["pnl_delta"] == -500 * (103.0 - 100.0)
    assert share["pnl_residual"] == 0.0 and share["pnl_mark_gap"] == 0.0 and share["delta_units"] == -500.0
    for term in ("gamma", "vega", "volga", "vanna", "theta", "rates", "dividend"):
        assert share[f"pnl_{term}"] == 0.0

    fut = rows["H2"]
    assert_allclose(fut["pnl_actual"], -3 * 50 * (FUTURE_PRICE[RUN] - FUTURE_PRICE[PRIOR]), rtol=1e-14)
    d0 = (dt.date(2027, 3, 19) - PRIOR).days
    d1 = (dt.date(2027, 3, 19) - RUN).days
    f0 = _ql_future_price(100.0, 0.040, 0.010, d0)
    f1 = _ql_future_price(103.0, 0.041, 0.012, d1)
    assert_allclose(fut["pnl_model"], -150 * (f1 - f0), rtol=1e-12)
    assert_allclose(fut["pnl_mark_gap"], fut["pnl_actual"] - fut["pnl_model"], rtol=1e-12)
    assert fut["pnl_vega"] == fut["pnl_gamma"] == 0.0

    fwd = rows["H3"]
    d0 = (dt.date(2027, 6, 18) - PRIOR).days
    d1 = (dt.date(2027, 6, 18) - RUN).days
    v0 = _ql_forward_value(50.0, 50.5, 0.020, 0.0, d0)
    v1 = _ql_forward_value(49.0, 50.5, 0.021, 0.0, d1)
    assert_allclose([fwd["price_prior"], fwd["price_run"]], [v0, v1], rtol=1e-12)
    assert_allclose(fwd["pnl_actual"], -10 * 1000 * 1.10 * (v1 - v0), rtol=1e-12)
    assert fwd["pnl_mark_gap"] == 0.0 and fwd["vol_prior"] != fwd["vol_prior"]  # no mark; no vol (NULL)


def test_a_margined_future_has_no_fx_translation_and_a_forward_translates_its_value(tmp_path):
    """A future in EUR: pnl_total = N fx1 (F1 - F0), no translation; the EUR forward: q0 m v0 (fx1 - fx0).

    References: README.md, "FX translation" (a future's value after settlement is 0); plain arithmetic.
    """
    from attribution.cli import main
    from tests.contract_files import read_rows, write_folder
    from tests.hedged_desk import FUTURE, FUTURE_PRICE, write_hedged_desk
    from tests.mini_desk import FX, PRIOR, RUN

    root = write_hedged_desk(tmp_path / "data")
    for day in (PRIOR, RUN):
        rows = read_rows(root, day, "instruments")
        for row in rows:
            if row["instrument_id"] == FUTURE["instrument_id"]:
                row.update(underlying="QRX", currency="EUR")
        write_folder(root, day, {"instruments": rows})
    assert main(["run", "--as-of", RUN.isoformat(), "--data", str(root), "--archive", str(tmp_path / "a.duckdb"),
                 "--no-reports"]) == 0
    import duckdb
    with duckdb.connect(str(tmp_path / "a.duckdb"), read_only=True) as con:
        rows = con.execute("SELECT * FROM position_pnl").df().set_index("trade_id")
    fx0, fx1 = FX[PRIOR]["EUR"], FX[RUN]["EUR"]
    fut = rows.loc["H2"]
    assert fut["pnl_fx_translation"] == 0.0
    assert_allclose(fut["pnl_total"], -3 * 50 * fx1 * (FUTURE_PRICE[RUN] - FUTURE_PRICE[PRIOR]), rtol=1e-12)
    fwd = rows.loc["H3"]
    assert_allclose(fwd["pnl_fx_translation"], -10 * 1000 * fwd["price_prior"] * (fx1 - fx0), rtol=1e-12)
    assert_allclose(fwd["pnl_total"], -10 * 1000 * (fwd["price_run"] * fx1 - fwd["price_prior"] * fx0), rtol=1e-12)
