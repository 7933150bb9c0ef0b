"""Tests of the demo desk generator (attribution.demo) on short slices.

The data contract (README.md, "Input files") is the reference for files, columns, types and
row rules; QuantLib 1.x (AnalyticEuropeanEngine, flat curves, Actual365Fixed) is the outside
reference for the BSM prices of clean marks; the rest are properties the scenario promises.
"""

from __future__ import annotations

import datetime as dt
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from attribution.american import american_price
from attribution.demo import FAULT_KINDS, SCHEMAS, DemoSummary, build_demo
from attribution.demo.desk import (
    DeskDefinitionError,
    business_days,
    default_definition,
    desk_holidays,
    load_desk,
    monthly_expiries,
)
from attribution.demo.market import simulate_market
from attribution.pricing import bsm_greeks, bsm_price

ql = pytest.importorskip("QuantLib")

START = dt.date(2025, 12, 8)   # 14 business days: a monthly expiry (12-19) and two holidays (12-25, 12-26)
DAYS = 14
TARGET = 600
FILES = ("positions", "instruments", "option_marks", "underlying_marks", "rate_curves", "fx_rates", "books")
EVENTS = ("dividends", "corporate_actions", "future_marks", "trade_activity", "cash_flows", "official_pnl")  # version 2


@dataclass(frozen=True)
class Built:
    """A demo slice: its summary and every file of every night as pandas frames."""

    summary: DemoSummary
    nights: dict[dt.date, dict[str, pd.DataFrame]]


def _read(root: Path, day: dt.date) -> dict[str, pd.DataFrame]:
    """Every file of one night; ``instruments`` and ``positions`` hold the options, ``hedge_*`` the hedges."""
    folder = root / f"as_of={day}"
    files = {name: pq.read_table(folder / f"{name}.parquet").to_pandas() for name in FILES + EVENTS
             if (folder / f"{name}.parquet").exists()}
    ins, pos = files["instruments"], files["positions"]
    option = ins["kind"] == "option"
    files["hedge_instruments"], files["instruments"] = ins[~option], ins[option].drop(columns="kind")
    on_option = pos["instrument_id"].isin(files["instruments"]["instrument_id"])
    files["hedge_positions"], files["positions"] = pos[~on_option], pos[on_option]
    return files


def quiet_definition(folder: Path) -> Path:
    """The packaged desk with the close noise of [marks] switched off, so marks can be checked to 1e-9."""
    text = default_definition().read_text(encoding="utf-8")
    for key in ("common_noise", "idio_noise"):
        text = re.sub(rf"^{key} = [0-9.e-]+", f"{key} = 0.0", text, count=1, flags=re.MULTILINE)
    path = folder / "quiet_desk.toml"
    path.write_text(text, encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def built(tmp_path_factory: pytest.TempPathFactory) -> Built:
    """A 14-day slice of the packaged desk without its close noise (see test_close_noise_... for the noise)."""
    root = tmp_path_factory.mktemp("demo")
    summary = build_demo(root, start=START, business_days=DAYS, positions_target=TARGET,
                         definition=quiet_definition(tmp_path_factory.mktemp("definition")))
    return Built(summary, {day: _read(root, day) for day in summary.dates})


def _faults(built: Built, kind: str) -> list:
    return [f for f in built.summary.faults if f.kind == kind]


def _rates(curves: pd.DataFrame, currency: pd.Series, tau: np.ndarray) -> np.ndarray:
    """Contract rule: linear in zero rate between tenors, flat beyond the ends."""
    out = np.empty(tau.size)
    for code, curve in curves.sort_values("tenor_years").groupby("currency"):
        sel = (currency == code).to_numpy()
        out[sel] = np.interp(tau[sel], curve["tenor_years"], curve["zero_rate"])
    return out


def _state(files: dict[str, pd.DataFrame], day: dt.date) -> pd.DataFrame:
    """Marks joined with their instrument and underlying, with tau (ACT/365F), the contract's rate, and
    ``spot`` the escrowed spot: the underlying's spot less the present value of the dividends of
    dividends.parquet with day < ex_date <= expiry, each discounted at the curve's rate to its ex-date."""
    frame = (files["option_marks"].merge(files["instruments"], on="instrument_id")
             .merge(files["underlying_marks"], on="underlying"))
    frame["tau"] = (pd.to_datetime(frame["expiry"]) - pd.Timestamp(day)).dt.days.to_numpy() / 365.0
    frame["rate"] = _rates(files["rate_curves"], frame["currency"], frame["tau"].to_numpy())
    pairs = frame[["underlying", "currency", "expiry"]].reset_index().merge(files["dividends"], on="underlying")
    ex = pd.to_datetime(pairs["ex_date"])
    pairs = pairs[(ex > pd.Timestamp(day)) & (ex <= pd.to_datetime(pairs["expiry"]))]
    t = (pd.to_datetime(pairs["ex_date"]) - pd.Timestamp(day)).dt.days.to_numpy() / 365.0
    pv = pairs["amount"].to_numpy() * np.exp(-_rates(files["rate_curves"], pairs["currency"], t) * t)
    frame["dividend_pv"] = pd.Series(pv, index=pairs["index"].to_numpy()).groupby(level=0).sum().reindex(
        frame.index, fill_value=0.0)
    frame["spot"] = frame["spot"] - frame["dividend_pv"]
    return frame


def _model(frame: pd.DataFrame) -> np.ndarray:
    args = (frame["spot"], frame["strike"], frame["tau"], frame["implied_vol"], frame["rate"], frame["dividend_yield"],
            frame["option_type"] == "call")
    return np.where(frame["exercise"] == "american", american_price(*args), bsm_price(*args))


def _bounds(m: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """No-arbitrage bounds max(cp(S e^-qT - K e^-rT), 0) and (S e^-qT for a call, K e^-rT for a put); American
    options also at least intrinsic cp(S - K) and at most S (call) or K (put) (common practice, no source)."""
    call = (m["option_type"] == "call").to_numpy()
    american = (m["exercise"] == "american").to_numpy()
    sign = np.where(call, 1.0, -1.0)
    spot, strike = m["spot"].to_numpy(), m["strike"].to_numpy()
    fwd_s = (m["spot"] * np.exp(-m["dividend_yield"] * m["tau"])).to_numpy()
    fwd_k = (m["strike"] * np.exp(-m["rate"] * m["tau"])).to_numpy()
    lower = np.maximum(sign * (fwd_s - fwd_k), 0.0)
    lower = np.where(american, np.maximum(lower, sign * (spot - strike)), lower)
    return lower, np.where(american, np.where(call, spot, strike), np.where(call, fwd_s, fwd_k))


def _faulty_marks(built: Built, day: dt.date) -> set[str]:
    """Instrument ids and underlyings whose marks carry a planted fault on ``day``."""
    return {f.instrument_or_trade for f in built.summary.faults if f.as_of == day}


def test_default_desk_has_the_scenario_books_and_underlyings() -> None:
    """The packaged desk: >= 6 books of every style and mark kind, >= 20 underlyings, USD, EUR and more."""
    desk = load_desk()
    assert len(desk.books) >= 6 and len(desk.underlyings) >= 20
    assert {"USD", "EUR"} < {c.code for c in desk.currencies} and desk.reporting_currency == "USD"
    assert {b.style for b in desk.books} == {"outright", "short_vol", "delta_neutral"}
    assert {b.marks for b in desk.books} == {"clean", "planted_faults", "noisy"}
    assert {u.kind for u in desk.underlyings} == {"index", "stock", "fx"}
    assert all(u.name == f"{u.foreign_currency}/{u.currency}" for u in desk.underlyings if u.kind == "fx")
    assert default_definition().name == "demo_desk.toml" and default_definition().is_file()


def test_every_file_has_the_contract_columns_and_arrow_types(built: Built, tmp_path: Path) -> None:
    """Each as_of folder holds the six files of version 1, future_marks and (after the first night) the
    trade activity, cash flows and official P&L, and books.parquet, with the contract's column names, order and
    Arrow types."""
    expected = {
        "positions": [pa.string(), pa.string(), pa.string(), pa.float64(), pa.date32(), pa.float64(), pa.string()],
        "instruments": [pa.string(), pa.string(), pa.string(), pa.string(), pa.float64(), pa.date32(),
                        pa.float64(), pa.string(), pa.string()],
        "option_marks": [pa.string(), pa.float64(), pa.float64()],
        "underlying_marks": [pa.string(), pa.float64(), pa.float64()],
        "rate_curves": [pa.string(), pa.float64(), pa.float64()],
        "fx_rates": [pa.string(), pa.float64()],
        "dividends": [pa.string(), pa.date32(), pa.float64()],
        "corporate_actions": [pa.string(), pa.date32(), pa.float64()],
        "future_marks": [pa.string(), pa.float64()],
        "trade_activity": [pa.string(), pa.string(), pa.string(), pa.float64(), pa.float64()],
        "cash_flows": [pa.string(), pa.string(), pa.string(), pa.string(), pa.float64(), pa.string()],
        "official_pnl": [pa.string(), pa.float64()],
        "books": [pa.string(), pa.string()],
    }
    root = built.summary.data_root
    for day in built.summary.dates:
        folder = root / f"as_of={day}"
        written = expected if day != built.summary.dates[0] else {
            k: v for k, v in expected.items() if k not in ("trade_activity", "cash_flows", "official_pnl")}
        assert sorted(p.name for p in folder.iterdir()) == sorted(f"{n}.parquet" for n in written)
        for name, types in written.items():
            schema = pq.read_schema(folder / f"{name}.parquet")
            assert schema.names == SCHEMAS[name].names + (["kind"] if name == "instruments" else [])
            assert schema.types == types, (day, name)


def test_folders_are_the_business_days_without_weekends_or_holidays(built: Built) -> None:
    """One folder per business day: no weekend, no desk holiday; the holidays are exposed in the summary."""
    s = built.summary
    folders = sorted(p.name for p in s.data_root.iterdir())
    assert folders == [f"as_of={d}" for d in s.dates] and len(s.dates) == DAYS
    assert all(d.weekday() < 5 for d in s.dates)
    assert {dt.date(2025, 12, 25), dt.date(2025, 12, 26), dt.date(2026, 1, 1)} <= set(s.holidays)
    assert not set(s.holidays) & set(s.dates)
    calendar_days = pd.date_range(s.dates[0], s.dates[-1]).date
    missing = {d for d in calendar_days if d.weekday() < 5} - set(s.dates)
    assert missing == {h for h in s.holidays if h <= s.dates[-1]} and missing


def test_keys_are_unique_and_references_resolve(built: Built) -> None:
    """Unique keys; positions -> instruments -> underlyings; every currency has a curve and an fx rate."""
    missing_marks = {(f.as_of, f.instrument_or_trade) for f in _faults(built, "missing_mark")}
    for day, f in built.nights.items():
        pos, ins, marks, und = f["positions"], f["instruments"], f["option_marks"], f["underlying_marks"]
        for frame, key in ((pos, "trade_id"), (ins, "instrument_id"), (marks, "instrument_id"), (und, "underlying"),
                           (f["fx_rates"], "currency")):
            assert frame[key].is_unique and frame[key].notna().all(), (day, key)
        assert not f["rate_curves"].duplicated(["currency", "tenor_years"]).any()
        assert set(pos["instrument_id"]) <= set(ins["instrument_id"])
        assert set(ins["underlying"]) <= set(und["underlying"])
        unmarked = set(ins["instrument_id"]) - set(marks["instrument_id"])
        assert {(day, i) for i in unmarked} <= missing_marks
        assert set(marks["instrument_id"]) <= set(ins["instrument_id"])
        currencies = set(ins["currency"])
        assert currencies <= set(f["rate_curves"]["currency"]) and currencies <= set(f["fx_rates"]["currency"])
        assert (f["rate_curves"].groupby("currency").size() >= 4).all()
        fx = f["fx_rates"].set_index("currency")["rate"]
        assert fx["USD"] == 1.0 and (fx > 0).all()


def test_row_rules_of_the_contract_hold(built: Built) -> None:
    """strike, spot, multiplier > 0; call/put; european; ISO codes; no nulls in required columns; live expiries."""
    for day, f in built.nights.items():
        pos, ins, und = f["positions"], f["instruments"], f["underlying_marks"]
        assert (ins["strike"] > 0).all() and (ins["multiplier"] > 0).all() and (und["spot"] > 0).all()
        assert set(ins["option_type"]) == {"call", "put"} and set(ins["exercise"]) == {"european", "american"}
        assert ins["currency"].str.fullmatch(r"[A-Z]{3}").all()
        assert (pd.to_datetime(ins["expiry"]).dt.date >= day).all()
        assert ins.notna().all().all() and und.notna().all().all() and f["rate_curves"].notna().all().all()
        assert pos.drop(columns="trade_price").notna().all().all()
        assert np.isfinite(pos["quantity"]).all() and (pos["quantity"] != 0).all()
        assert (pos["trade_date"] <= day).all()
        unpriced = pos.loc[pos["trade_price"].isna(), "trade_date"]
        assert (unpriced >= built.summary.dates[1]).all()  # only trades booked in the slice, never the opening book
        assert (pos["trade_price"].dropna() >= 0).all() and (f["rate_curves"]["tenor_years"] >= 0).all()


def test_clean_marks_are_bsm_prices_strictly_inside_the_bounds(built: Built) -> None:
    """Clean marks equal BSM at their implied vol (rel 1e-9, or the 1e-8 x spot time-value floor) and lie
    strictly inside max(cp(S e^-qT - K e^-rT), 0) < price < (S e^-qT | K e^-rT); at expiry the intrinsic value."""
    desk = load_desk()
    for day, f in built.nights.items():
        m = _state(f, day)
        m = m[~m["instrument_id"].isin(_faulty_marks(built, day)) & ~m["underlying"].isin(_faulty_marks(built, day))]
        assert (m["price"] >= 0).all()
        lower, upper = _bounds(m)
        live = (m["tau"] > 0).to_numpy()
        assert (m["price"][live] > lower[live]).all() and (m["price"][live] < upper[live]).all()
        np.testing.assert_allclose(m["price"][~live], lower[~live], rtol=0, atol=0)
        given = m["implied_vol"].notna().to_numpy()
        np.testing.assert_allclose(m["price"][given], _model(m[given]), rtol=1e-9,
                                   atol=desk.min_time_value_share * m["spot"][given].max())
        assert 0.02 < 1 - given.mean() < 0.3  # some marks leave implied_vol to the job


def test_stocks_list_their_dividends_ahead_every_date(built: Built) -> None:
    """Every stock with a yield, and only those, has dividends ahead in each date's dividends.parquet (amounts > 0)."""
    stocks = {u.name for u in load_desk().underlyings if u.kind == "stock" and u.dividend_yield > 0}
    for day, f in built.nights.items():
        div = f["dividends"]
        assert set(div["underlying"]) == stocks
        assert (pd.to_datetime(div["ex_date"]) > pd.Timestamp(day)).all() and (div["amount"] > 0).all()
        assert not div.duplicated(["underlying", "ex_date"]).any()


def test_one_stock_splits_two_for_one_with_its_options_adjusted(built: Built) -> None:
    """corporate_actions lists one 2-for-1 split; from its ex-date the options listed before it keep their ids with
    strike / 2 and multiplier x 2, other underlyings' terms stay, the spot halves (common practice, no source)."""
    days = built.summary.dates
    actions = built.nights[days[0]]["corporate_actions"]
    assert len(actions) == 1 and actions["ratio"].iloc[0] == 2.0
    stock, ex = actions["underlying"].iloc[0], pd.Timestamp(actions["ex_date"].iloc[0]).date()
    assert days[0] < ex <= days[-1]
    before = max(d for d in days if d < ex)
    i0 = built.nights[before]["instruments"].set_index("instrument_id")
    i1 = built.nights[ex]["instruments"].set_index("instrument_id")
    both = i0.index.intersection(i1.index)
    mine = both[(i0.loc[both, "underlying"] == stock).to_numpy()]
    others = both[(i0.loc[both, "underlying"] != stock).to_numpy()]
    assert len(mine) > 10
    np.testing.assert_allclose(i1.loc[mine, "strike"], i0.loc[mine, "strike"] / 2.0, rtol=1e-12)
    np.testing.assert_allclose(i1.loc[mine, "multiplier"], i0.loc[mine, "multiplier"] * 2.0, rtol=0)
    assert (i1.loc[others, "strike"] == i0.loc[others, "strike"]).all()
    spot = [built.nights[d]["underlying_marks"].set_index("underlying").loc[stock, "spot"] for d in (before, ex)]
    assert 0.35 < spot[1] / spot[0] < 0.65


def test_clean_marks_agree_with_quantlib(built: Built) -> None:
    """Clean live marks equal QuantLib: analytic European to rel 1e-9, QdFp American to 3e-3 per 100 (+ floor)."""
    day = built.summary.dates[3]
    m = _state(built.nights[day], day)
    m = m[(m["tau"] > 0) & m["implied_vol"].notna() & ~m["underlying"].isin(_faulty_marks(built, day))]
    sample = m.sample(40, random_state=1)
    today = ql.Date(day.day, day.month, day.year)
    saved = ql.Settings.instance().evaluationDate
    ql.Settings.instance().evaluationDate = today
    try:
        for row in sample.itertuples():
            expiry = pd.Timestamp(row.expiry)
            counts = ql.Actual365Fixed()
            process = ql.BlackScholesMertonProcess(
                ql.QuoteHandle(ql.SimpleQuote(row.spot)),
                ql.YieldTermStructureHandle(ql.FlatForward(today, row.dividend_yield, counts)),
                ql.YieldTermStructureHandle(ql.FlatForward(today, row.rate, counts)),
                ql.BlackVolTermStructureHandle(ql.BlackConstantVol(today, ql.NullCalendar(), row.implied_vol, counts)))
            kind = ql.Option.Call if row.option_type == "call" else ql.Option.Put
            ql_expiry = ql.Date(expiry.day, expiry.month, expiry.year)
            floor = load_desk().min_time_value_share * row.spot  # a live mark's least time value
            if row.exercise == "american":  # QuantLib's QdFpAmericanEngine; the desk's FAST scheme: README's fast
                # mode's largest error 2.8e-3 per 100 of strike, rounded up
                option = ql.VanillaOption(ql.PlainVanillaPayoff(kind, row.strike),
                                          ql.AmericanExercise(today, ql_expiry))
                option.setPricingEngine(ql.QdFpAmericanEngine(process, ql.QdFpLegendreTanhSinhScheme(48, 10, 24,
                                                                                                       1e-9)))
                intrinsic = max((row.spot - row.strike) * (1 if kind == ql.Option.Call else -1), 0.0)
                reference, tolerance = max(option.NPV(), intrinsic), floor + 3e-5 * row.strike
            else:
                option = ql.EuropeanOption(ql.PlainVanillaPayoff(kind, row.strike), ql.EuropeanExercise(ql_expiry))
                option.setPricingEngine(ql.AnalyticEuropeanEngine(process))
                reference, tolerance = option.NPV(), floor
            assert row.price == pytest.approx(reference, rel=1e-9, abs=tolerance), row.instrument_id
    finally:
        ql.Settings.instance().evaluationDate = saved


def test_planted_faults_are_in_the_data_as_the_summary_says(built: Built) -> None:
    """Stale, fat-finger and missing marks once each in the faulty book; noisy marks on some nights."""
    s, desk = built.summary, load_desk()
    kinds = {f.kind for f in s.faults}
    assert kinds == set(FAULT_KINDS) == {"stale_mark", "fat_finger_mark", "missing_mark", "off_smile_mark",
                                         "smile_arbitrage_mark", "noisy_marks", "booking_error", "late_booking",
                                         "official_break", "early_exercise"}
    (error,) = _faults(built, "booking_error")
    files = built.nights[error.as_of]  # the row is on no instrument, so it sits with the non-option positions
    row = files["hedge_positions"].set_index("trade_id").loc[error.instrument_or_trade]
    listed = set(files["instruments"]["instrument_id"]) | set(files["hedge_instruments"]["instrument_id"])
    assert error.as_of == s.dates[-1] and row["book"] == error.book and row["instrument_id"] not in listed
    faulty_book = next(b.name for b in desk.books if b.marks == "planted_faults")
    for kind in ("stale_mark", "fat_finger_mark", "missing_mark"):
        (fault,) = _faults(built, kind)
        assert fault.book == faulty_book
        day = fault.as_of
        prior = s.dates[s.dates.index(day) - 1]
        pos = built.nights[day]["positions"]
        assert set(pos.loc[pos["instrument_id"] == fault.instrument_or_trade, "book"]) == {faulty_book}
        marks = _state(built.nights[day], day).set_index("instrument_id")
        if kind == "missing_mark":
            assert fault.instrument_or_trade not in marks.index
            continue
        row = marks.loc[fault.instrument_or_trade]
        lower, upper = _bounds(marks.loc[[fault.instrument_or_trade]])
        assert lower[0] < row["price"] < upper[0]  # inside the bounds: it reaches the explain, not the reject pile
        if kind == "stale_mark":
            before = _state(built.nights[prior], prior).set_index("instrument_id").loc[fault.instrument_or_trade]
            assert row["price"] == before["price"] and row["implied_vol"] == before["implied_vol"]
            assert abs(np.log(row["spot"] / before["spot"])) > 0.002
        else:
            assert row["price"] / _model(marks.loc[[fault.instrument_or_trade]])[0] == pytest.approx(
                desk.faults.fat_finger_factor, rel=1e-9)


def test_smile_faults_lift_one_strike_off_its_smile_with_consistent_marks(built: Built) -> None:
    """Smile faults lift every mark of one strike, repriced at its vol; the arbitrage breaks the butterfly condition."""
    # Prices BSM at their vol (rel 1e-9); butterfly condition of Carr and Madan (2005).
    desk = load_desk()
    faulty_book = next(b.name for b in desk.books if b.marks == "planted_faults")
    for kind in ("off_smile_mark", "smile_arbitrage_mark"):
        (fault,) = _faults(built, kind)
        assert fault.book == faulty_book
        marks = _state(built.nights[fault.as_of], fault.as_of).set_index("instrument_id")
        row = marks.loc[fault.instrument_or_trade]
        same = marks[(marks["underlying"] == row["underlying"]) & (marks["expiry"] == row["expiry"])]
        at = same[same["strike"] == row["strike"]]
        assert at["implied_vol"].nunique() == 1 and at["implied_vol"].notna().all()
        np.testing.assert_allclose(at["price"], _model(at), rtol=1e-9)
        if kind == "off_smile_mark":
            assert "instead of" in fault.detail and f"{row['implied_vol']:.4f}" in fault.detail
            continue
        by_strike = same.groupby("strike").agg(implied_vol=("implied_vol", "max"), spot=("spot", "first"),
                                               tau=("tau", "first"), rate=("rate", "first"),
                                               dividend_yield=("dividend_yield", "first")).reset_index()
        by_strike = by_strike[by_strike["implied_vol"].notna()]
        k = by_strike["strike"].to_numpy()
        i = int(np.flatnonzero(k == row["strike"])[0])
        c = _model(by_strike.assign(option_type="call", exercise="european"))
        lam = (k[i + 1] - k[i]) / (k[i + 1] - k[i - 1])
        assert c[i] > lam * c[i - 1] + (1 - lam) * c[i + 1]


def test_noisy_book_marks_are_off_the_model_on_its_noisy_nights_only(built: Built) -> None:
    """On a noisy night every live mark of the noisy book's underlyings leaves the model; on others none does."""
    desk = load_desk()
    noisy_book = next(b for b in desk.books if b.marks == "noisy")
    noisy = {(f.as_of, f.instrument_or_trade) for f in _faults(built, "noisy_marks")}
    assert noisy and {f.book for f in _faults(built, "noisy_marks")} == {noisy_book.name}
    for day, f in built.nights.items():
        m = _state(f, day)
        m = m[m["underlying"].isin(noisy_book.underlyings) & (m["tau"] > 0)]
        price, spot = m["price"].to_numpy(), m["spot"].to_numpy()
        gap = np.abs(price - _model(m))
        for name in noisy_book.underlyings:
            sel = (m["underlying"] == name).to_numpy()
            if (day, name) in noisy:
                assert np.median(gap[sel] / price[sel]) > 1e-4, (day, name)
            else:  # rel 1e-9, plus the least time value a live mark keeps
                assert np.all(gap[sel] <= 1e-9 * price[sel] + desk.min_time_value_share * spot[sel]), (day, name)


def test_trading_activity_new_closed_expired_amended_and_listed(built: Built) -> None:
    """Nights carry new trades (priced and unpriced), closes, expiries, amendments and new listings."""
    s, days = built.summary, built.summary.dates
    counts = [len(built.nights[d]["positions"]) for d in days]
    assert (s.positions_min, s.positions_max) == (min(counts), max(counts)) and s.positions_min >= TARGET
    assert s.positions_mean == pytest.approx(np.mean(counts), rel=1e-12)
    seen = {"closed": 0, "expired": 0, "amended": 0, "unpriced": 0, "priced": 0, "listed": 0, "exercised": 0}
    for prior, day in zip(days, days[1:], strict=False):
        p0 = built.nights[prior]["positions"].set_index("trade_id")
        p1 = built.nights[day]["positions"].set_index("trade_id")
        expiry = built.nights[prior]["instruments"].set_index("instrument_id")["expiry"]
        gone = p0.index.difference(p1.index)
        expired = pd.to_datetime(expiry[p0.loc[gone, "instrument_id"]]).dt.date.to_numpy() < day
        act = built.nights[day]["trade_activity"]
        exercised = np.isin(gone, act.loc[act["kind"].isin(["exercise", "assignment"]), "trade_id"])
        seen["expired"] += int(expired.sum())
        seen["closed"] += int((~expired & ~exercised).sum())
        seen["exercised"] += int(exercised.sum())
        both = p0.index.intersection(p1.index)
        seen["amended"] += int((p0.loc[both, "quantity"] != p1.loc[both, "quantity"]).sum())
        assert (p0.loc[both, ["instrument_id", "book", "trade_date"]] == p1.loc[both, ["instrument_id", "book",
                                                                                          "trade_date"]]).all().all()
        new = p1.loc[p1.index.difference(p0.index)]
        late = {f.instrument_or_trade for f in _faults(built, "late_booking")}  # booked the night before
        assert (new["trade_date"] == day).all() or set(new.index[new["trade_date"] != day]) <= late
        seen["unpriced"] += int(new["trade_price"].isna().sum())
        seen["priced"] += int(new["trade_price"].notna().sum())
        seen["listed"] += len(set(built.nights[day]["instruments"]["instrument_id"])
                              - set(built.nights[prior]["instruments"]["instrument_id"]))
    assert all(v > 0 for v in seen.values()), seen  # the slice holds the year's early exercise too
    assert (seen["expired"], seen["closed"], seen["amended"]) == (s.trades_expired, s.trades_closed, s.trades_amended)
    assert (seen["priced"] + seen["unpriced"], seen["unpriced"]) == (s.trades_new, s.trades_new_unpriced)


def test_hedges_keep_books_delta_neutral_and_activity_reconciles(built: Built) -> None:
    """Each book's hedges offset its options' delta per underlying (to a unit or a contract); prior quantity +
    activity = run-date quantity for every trade; hedge rebalances pay a commission (plain arithmetic)."""
    days = built.summary.dates
    for day in days:
        f = built.nights[day]
        held = f["positions"].merge(_state(f, day), on="instrument_id")
        delta = bsm_greeks(held["spot"], held["strike"], held["tau"], held["implied_vol"].fillna(0.2), held["rate"],
                           held["dividend_yield"], held["option_type"] == "call").delta
        options = (held["quantity"] * held["multiplier"] * delta).groupby([held["book"], held["underlying"]]).sum()
        hedges = f["hedge_positions"].merge(f["hedge_instruments"], on="instrument_id")
        assert set(hedges["kind"]) == {"underlying", "future", "forward"}
        assert set(hedges.loc[hedges["kind"] == "forward", "underlying"]) == {
            u.name for u in load_desk().underlyings if u.kind == "fx"}  # FX pairs are hedged with forwards
        units = (hedges["quantity"] * hedges["multiplier"]).groupby([hedges["book"], hedges["underlying"]]).sum()
        gross = (held["quantity"].abs() * held["multiplier"]).groupby([held["book"], held["underlying"]]).sum()
        net = (options + units.reindex(options.index).fillna(0.0)).abs()
        # null vols are priced at 20 % here, and a future's delta is e^((r-q) tau) per unit: a loose bound
        assert (net <= 0.25 * gross + 1.0).mean() > 0.8, net.sort_values().tail()
    for prior, day in zip(days, days[1:], strict=False):
        p0 = pd.concat([built.nights[prior]["positions"], built.nights[prior]["hedge_positions"]]).set_index("trade_id")
        p1 = pd.concat([built.nights[day]["positions"], built.nights[day]["hedge_positions"]]).set_index("trade_id")
        p1 = p1.drop(index=[f.instrument_or_trade for f in _faults(built, "booking_error")], errors="ignore")
        act = built.nights[day]["trade_activity"]
        moved = act.groupby("trade_id")["quantity"].sum()
        expiry = pd.concat([built.nights[prior]["instruments"], built.nights[prior]["hedge_instruments"]]).set_index(
            "instrument_id")["expiry"]
        live0 = p0[~(pd.to_datetime(expiry[p0["instrument_id"]]) < pd.Timestamp(day)).to_numpy()]
        trades = live0.index.union(p1.index)
        q0 = live0["quantity"].reindex(trades).fillna(0.0)
        q1 = p1["quantity"].reindex(trades).fillna(0.0)
        np.testing.assert_allclose(q0 + moved.reindex(trades).fillna(0.0), q1, atol=1e-9)
        hedge_moves = act[act["trade_id"].isin(built.nights[day]["hedge_positions"]["trade_id"])
                          & ~act["kind"].isin(["new", "close"])]  # not the shares an exercise delivered
        fees = built.nights[day]["cash_flows"]
        assert len(fees) == len(hedge_moves) and (fees["amount"] < 0).all() and set(fees["kind"]) == {"commission"}


def test_short_vol_book_is_short_and_delta_neutral_book_offsets_its_delta(built: Built) -> None:
    """The short-vol book holds only short options; the delta-neutral book's net delta is small against its gross."""
    day = built.summary.dates[0]
    f = built.nights[day]
    pos = f["positions"]
    assert (pos.loc[pos["book"] == "short-vol", "quantity"] < 0).all()
    held = pos[pos["book"] == "delta-neutral"].merge(_state(f, day), on="instrument_id")
    delta = bsm_greeks(held["spot"], held["strike"], held["tau"], held["implied_vol"].fillna(0.2), held["rate"],
                       held["dividend_yield"], held["option_type"] == "call").delta
    exposure = held["quantity"] * held["multiplier"] * delta * held["spot"]
    by_und = exposure.groupby(held["underlying"])
    assert (by_und.sum().abs() < 0.25 * exposure.abs().groupby(held["underlying"]).sum()).all()


def test_same_seed_gives_identical_tables_and_files(tmp_path: Path) -> None:
    """Two builds with one seed are equal table for table and byte for byte; another seed differs."""
    kwargs = {"start": dt.date(2026, 3, 2), "business_days": 6, "positions_target": 300}
    a = build_demo(tmp_path / "a", seed=11, **kwargs)
    b = build_demo(tmp_path / "b", seed=11, **kwargs)
    build_demo(tmp_path / "c", seed=12, **kwargs)
    assert a.faults == b.faults and a.dates == b.dates
    for day in a.dates:
        for name in FILES:
            path_a, path_b = (tmp_path / x / f"as_of={day}" / f"{name}.parquet" for x in ("a", "b"))
            if not path_a.exists():
                assert not path_b.exists(), (day, name)
                continue
            assert pq.read_table(path_a).equals(pq.read_table(path_b)), (day, name)
            assert path_a.read_bytes() == path_b.read_bytes(), (day, name)
    last = f"as_of={a.dates[-1]}/positions.parquet"
    assert not pq.read_table(tmp_path / "a" / last).equals(pq.read_table(tmp_path / "c" / last))


def test_refuses_a_folder_with_other_dates(tmp_path: Path) -> None:
    """A root holding as_of folders outside the demo's dates is refused, naming the folder."""
    (tmp_path / "as_of=2020-01-02").mkdir()
    with pytest.raises(ValueError, match="as_of=2020-01-02"):
        build_demo(tmp_path, business_days=5, positions_target=100)


def test_bad_definitions_are_refused_naming_file_and_entry(tmp_path: Path) -> None:
    """An unknown underlying in a book, or an unknown key, is refused with the file and the entry named."""
    text = default_definition().read_text(encoding="utf-8")
    bad_book = tmp_path / "bad_book.toml"
    bad_book.write_text(text.replace('underlyings = ["DRVL", "PYNE"]', 'underlyings = ["DRVL", "NOPE"]'))
    with pytest.raises(DeskDefinitionError, match=r"bad_book\.toml.*special-situations: unknown"):
        load_desk(bad_book)
    bad_key = tmp_path / "bad_key.toml"
    bad_key.write_text(text.replace("daily_churn = 0.015", "daily_churn = 0.015\nchurn_daily = 1"))
    with pytest.raises(DeskDefinitionError, match=r"bad_key\.toml \[trading\].*churn_daily"):
        load_desk(bad_key)
    shared = tmp_path / "shared.toml"
    shared.write_text(text.replace('underlyings = ["ZMBK", "XOLT", "NIMR"]', 'underlyings = ["ZMBK", "KRV"]'))
    with pytest.raises(DeskDefinitionError, match="frontier-stocks: a book with noisy marks must trade"):
        load_desk(shared)


def test_holidays_roll_off_weekends_and_expiries_are_business_day_fridays() -> None:
    """Saturday holidays move to Friday, Sunday ones to Monday; expiries are third Fridays or the business day
    before (common practice for listed monthly options, no source)."""
    desk = load_desk()
    hol = desk_holidays(desk, dt.date(2027, 1, 1), dt.date(2029, 12, 31))
    assert dt.date(2027, 12, 31) in hol and dt.date(2028, 1, 1) not in hol      # 2028-01-01 is a Saturday
    in_2025 = desk_holidays(desk, dt.date(2025, 1, 1), dt.date(2025, 12, 31))
    assert dt.date(2025, 3, 17) in in_2025 and dt.date(2025, 3, 16) not in in_2025  # 2025-03-16 is a Sunday
    expiries = monthly_expiries(desk, dt.date(2025, 1, 1), dt.date(2040, 12, 31)).astype(object)
    all_hol = set(desk_holidays(desk, dt.date(2025, 1, 1), dt.date(2040, 12, 31)))
    assert len(expiries) == 16 * 12
    for day in expiries:
        assert day.weekday() < 5 and day not in all_hol
        third_friday = next(d for d in (day.replace(day=k) for k in range(15, 22)) if d.weekday() == 4)
        assert day == third_friday or (third_friday in all_hol and day < third_friday)


def test_market_moves_vol_against_spot_and_rates_a_little() -> None:
    """Over a year: equity vol falls when spot rises (negative correlation); curves move by basis points a day."""
    desk = load_desk()
    dates = business_days(desk, dt.date(2025, 11, 3), 261)
    market = simulate_market(desk, dates, np.random.default_rng(3))
    returns = np.diff(np.log(market.spot), axis=0)
    vol_moves = np.diff(np.log(market.atm_vol), axis=0)
    for j, u in enumerate(desk.underlyings):
        if u.kind != "fx":
            assert np.corrcoef(returns[:, j], vol_moves[:, j])[0, 1] < -0.2, u.name
    daily = np.abs(np.diff(market.zero_rates, axis=0))
    assert 0 < daily.max() < 0.002 and np.median(daily) > 1e-6
    assert np.all(market.fx_to_reporting[:, 0] == 1.0) and np.all(market.fx_to_reporting > 0)
    gaps = np.diff(dates).astype(int)
    assert set(gaps) >= {1, 3} and gaps.max() <= 5


def test_close_noise_moves_marks_off_the_model_within_its_size(tmp_path: Path) -> None:
    """With the packaged [marks] noise, clean books' marks differ from BSM at their implied vol by a shared error
    per underlying and night plus a small one per option: within 6 sd of the time value, and not all zero."""
    desk = load_desk()
    summary = build_demo(tmp_path, start=START, business_days=6, positions_target=300)
    faulty = {f.instrument_or_trade for f in summary.faults}
    sd = desk.marks.common_noise + desk.marks.idio_noise
    for day in summary.dates:
        m = _state(_read(tmp_path, day), day)
        m = m[(m["tau"] > 0) & m["implied_vol"].notna() & ~m["instrument_id"].isin(faulty)
              & ~m["underlying"].isin(faulty) & (m["exercise"] == "european")]
        lower, _ = _bounds(m)
        time_value = _model(m) - lower
        m, time_value = m[time_value > 1e-4 * m["spot"]], time_value[time_value > 1e-4 * m["spot"]]
        error = (m["price"].to_numpy() - _model(m)) / time_value
        assert np.abs(error).max() < 6 * sd and np.abs(error).max() > 0.1 * sd


def test_books_file_puts_every_book_on_its_desk_and_positions_carry_a_strategy(built: Built) -> None:
    """books.parquet lists each book once with the desk of demo_desk.toml; every position has a strategy label."""
    desk = load_desk()
    for files in built.nights.values():
        assert dict(zip(files["books"]["book"], files["books"]["desk"], strict=True)) == {
            b.name: b.desk for b in desk.books}
        assert files["positions"]["strategy"].notna().all()
    labels = set(built.nights[built.summary.dates[-1]]["positions"]["strategy"])
    assert {"outright", "delta-neutral pair"} <= labels and labels & {"short straddle", "short strangle"}


def test_new_trades_earn_the_spread_on_average(built: Built) -> None:
    """Priced new trades are booked inside the spread on most days' average: buys below, sells above the mark."""
    days = built.summary.dates
    edges = []
    for day in days[1:]:
        f = built.nights[day]
        new = f["positions"][(f["positions"]["trade_date"] == day) & f["positions"]["trade_price"].notna()]
        mark = new.merge(f["option_marks"], on="instrument_id")
        edges.append((np.sign(mark["quantity"]) * (mark["price"] - mark["trade_price"]) / mark["price"]).mean())
    assert np.mean(edges) > 0


def test_early_exercise_gives_up_the_option_for_its_shares(built: Built) -> None:
    """The year's early exercise (data contract, "Trade activity"): an exercise or assignment of the whole prior
    position of an American option in its money, the trade gone that night, the delivered shares (contracts x
    multiplier, bought for a call, sold for a put) a new trade at the strike, unwound the next night."""
    (fault,) = _faults(built, "early_exercise")
    days = built.summary.dates
    day = fault.as_of
    prior, after = days[days.index(day) - 1], days[days.index(day) + 1]
    p0 = built.nights[prior]["positions"].set_index("trade_id").loc[fault.instrument_or_trade]
    option = built.nights[prior]["instruments"].set_index("instrument_id").loc[p0["instrument_id"]]
    assert option["exercise"] == "american" and fault.instrument_or_trade not in set(
        built.nights[day]["positions"]["trade_id"])
    act = built.nights[day]["trade_activity"].set_index("trade_id")
    row = act.loc[fault.instrument_or_trade]
    assert row["kind"] == ("exercise" if p0["quantity"] > 0 else "assignment")
    assert row["quantity"] == -p0["quantity"] and np.isnan(row["price"])
    spot = built.nights[day]["underlying_marks"].set_index("underlying").at[option["underlying"], "spot"]
    cp = 1.0 if option["option_type"] == "call" else -1.0
    assert cp * (spot - option["strike"]) > 0.2 * option["strike"]  # deep in the money
    shares = built.nights[day]["hedge_positions"].set_index("trade_id")
    delivered = shares.loc[[t for t in shares.index if "EX-" in t]].iloc[0]
    assert delivered["quantity"] == p0["quantity"] * option["multiplier"] * cp
    assert delivered["trade_price"] == option["strike"] and delivered["trade_date"] == day
    assert (act.loc[delivered.name, "kind"], act.loc[delivered.name, "price"]) == ("new", option["strike"])
    later = built.nights[after]["trade_activity"].set_index("trade_id").loc[delivered.name]
    assert later["kind"] == "close" and later["quantity"] == -delivered["quantity"]
    assert delivered.name not in set(built.nights[after]["hedge_positions"]["trade_id"])


def test_official_pnl_names_every_book_each_night_in_whole_units(built: Built) -> None:
    """Every night after the first carries the desk's P&L of each book once, a finite whole number (its rounding
    policy); the late-booked trade is in the files only from the next night, dated the night before."""
    books = {b.name for b in load_desk().books}
    for day in built.summary.dates[1:]:
        official = built.nights[day]["official_pnl"]
        assert set(official["book"]) == books and official["book"].is_unique
        assert np.isfinite(official["pnl"]).all() and (official["pnl"] == official["pnl"].round()).all()
    (late,) = _faults(built, "late_booking")
    days = built.summary.dates
    after = days[days.index(late.as_of) + 1]
    assert late.instrument_or_trade not in set(built.nights[late.as_of]["positions"]["trade_id"])
    assert late.instrument_or_trade not in set(built.nights[late.as_of]["trade_activity"]["trade_id"])
    row = built.nights[after]["positions"].set_index("trade_id").loc[late.instrument_or_trade]
    assert row["trade_date"] == late.as_of and row["book"] == late.book
    act = built.nights[after]["trade_activity"].set_index("trade_id").loc[late.instrument_or_trade]
    assert act["kind"] == "new" and act["quantity"] == row["quantity"]
