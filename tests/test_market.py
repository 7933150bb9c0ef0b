"""Per-instrument market state and its checks (attribution.market).

Inputs: the mini desk (tests/mini_desk.py), marks priced by QuantLib's analytic European engine, with one
file changed per test. References: the no-arbitrage bounds of a European option with continuous yield,
max(S e^{-qT} - K e^{-rT}, 0) <= C <= S e^{-qT} and max(K e^{-rT} - S e^{-qT}, 0) <= P <= K e^{-rT}
(Hull, Options, Futures and Other Derivatives, chapter on properties of options, from memory); the
implied vol of a QuantLib price is the vol QuantLib priced it at.
"""

from __future__ import annotations

import datetime as dt
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from attribution.config import CheckSettings, JobConfig
from attribution.contract import clean_night
from attribution.engine import prepare_night
from attribution.exceptions_log import REJECTED, WARNING, ExceptionLog
from attribution.loading import folder_for, read_night
from attribution.market import InstrumentMarket, build_market, flag_stale_marks, instrument_terms, take
from attribution.timebasis import TimeBasis
from tests.contract_files import edit_row, put_rows, read_rows
from tests.mini_desk import DIV, INSTRUMENTS, PRIOR, RATE, RUN, SPOT, VOL, mark, write_mini_desk

BY_ID = {i.instrument_id: i for i in INSTRUMENTS}








def _markets(root: Path, checks: CheckSettings | None = None,
             ) -> tuple[InstrumentMarket, InstrumentMarket, pd.DataFrame]:
    checks = checks or CheckSettings()
    log = ExceptionLog(RUN)
    c0 = clean_night(read_night(root, PRIOR), log, checks, "USD")
    c1 = clean_night(read_night(root, RUN), log, checks, "USD")
    m0 = build_market(c0, instrument_terms(c0, c1), TimeBasis(), checks, log)
    m1 = build_market(c1, instrument_terms(c1, c0), TimeBasis(), checks, log)
    stale = flag_stale_marks(m0, m1, checks.stale_spot_move, "marks", log)
    assert stale.shape == m1.ids.shape
    return m0, m1, log.frame()


def _at(market: InstrumentMarket, instrument_id: str) -> int:
    return int(market.locate(np.array([instrument_id], dtype=object))[0])


def _bounds(inst_id: str, day: dt.date) -> tuple[float, float]:
    inst = BY_ID[inst_id]
    tau = (inst.expiry - day).days / 365.0
    fwd_s = SPOT[day][inst.underlying] * math.exp(-DIV[day][inst.underlying] * tau)
    pv_k = inst.strike * math.exp(-RATE[day][inst.currency] * tau)
    if inst.option_type == "call":
        return max(fwd_s - pv_k, 0.0), fwd_s
    return max(pv_k - fwd_s, 0.0), pv_k


@pytest.fixture()
def desk(tmp_path: Path) -> Path:
    """The mini desk's two nights under tmp_path/data."""
    return write_mini_desk(tmp_path / "data")


def test_mini_desk_state_matches_its_inputs(desk: Path) -> None:
    """Spot, yield, flat-curve rate, ACT/365F time and marked vol per instrument are the files' values."""
    m0, m1, ledger = _markets(desk)
    assert ledger.empty
    for market, day in ((m0, PRIOR), (m1, RUN)):
        assert market.usable.all() and market.listed.all() and not market.terms_rejected.any()
        for inst in INSTRUMENTS:
            k = _at(market, inst.instrument_id)
            assert market.spot[k] == SPOT[day][inst.underlying]
            assert market.div_yield[k] == DIV[day][inst.underlying]
            assert market.rate[k] == RATE[day][inst.currency]
            np.testing.assert_allclose(market.tau_years[k], (inst.expiry - day).days / 365.0, rtol=0, atol=1e-15)
            np.testing.assert_allclose(market.price[k], mark(inst, day), rtol=0, atol=1e-12)


def test_expiring_today_is_priced_at_intrinsic_with_zero_vol(desk: Path) -> None:
    """An option whose expiry is the date itself has tau 0, vol 0 when unmarked, and is usable."""
    _, m1, _ = _markets(desk)
    k = _at(m1, "ZEN-C95-EXP")
    assert m1.tau_years[k] == 0.0 and m1.vol[k] == 0.0 and m1.usable[k]
    np.testing.assert_allclose(m1.price[k], SPOT[RUN]["ZEN"] - 95.0, rtol=0, atol=1e-12)


def test_expiry_day_mark_above_intrinsic_is_warned(desk: Path) -> None:
    """On its expiry date a call marked 1.00 above max(S - K, 0) is warned (the contract values it at intrinsic)."""
    edit_row(desk, RUN, "option_marks", "ZEN-C95-EXP", price=SPOT[RUN]["ZEN"] - 95.0 + 1.0)
    _, m1, ledger = _markets(desk)
    assert ledger[["key", "rule", "severity"]].values.tolist() == [
        ["ZEN-C95-EXP", "expiry-day mark is not the intrinsic value", WARNING]]
    assert "intrinsic value 8" in ledger["detail"].iloc[0]
    assert m1.usable[_at(m1, "ZEN-C95-EXP")]


@pytest.mark.parametrize(("inst_id", "side"), [  # below: the in-the-money ones, whose lower bound is > 0.5
    ("ZEN-C100-J27", "below"), ("ZEN-P120-M27", "below"),
    ("ZEN-C100-J27", "above"), ("ZEN-P120-M27", "above"), ("QRX-C50-F27", "above"), ("ZEN-P90-D26", "above")])
def test_price_outside_no_arbitrage_bounds_is_rejected(desk: Path, inst_id: str, side: str) -> None:
    """A mark below its lower or above its upper bound is rejected in option_marks and makes the option unusable."""
    lower, upper = _bounds(inst_id, RUN)
    price = lower - 0.5 if side == "below" else upper + 0.5
    assert price >= 0
    edit_row(desk, RUN, "option_marks", inst_id, price=price)
    _, m1, ledger = _markets(desk)
    rows = ledger[ledger["rule"] == "price outside no-arbitrage bounds"]
    assert rows[["key", "severity"]].values.tolist() == [[inst_id, REJECTED]]
    assert rows["file"].iloc[0].endswith("as_of=2026-11-30/option_marks.parquet")
    assert f"{lower:.6g}" in rows["detail"].iloc[0] and f"{upper:.6g}" in rows["detail"].iloc[0]
    k = _at(m1, inst_id)
    assert not m1.usable[k] and m1.reason[k] == "option price outside its no-arbitrage bounds"
    assert m1.usable.sum() == len(INSTRUMENTS) - 1


def test_price_on_its_bound_is_accepted(desk: Path) -> None:
    """A call marked exactly at its upper bound S e^{-qT} passes the bounds check."""
    _, upper = _bounds("ZEN-C100-J27", RUN)
    edit_row(desk, RUN, "option_marks", "ZEN-C100-J27", price=upper, implied_vol=None)
    _, _, ledger = _markets(desk)
    assert "price outside no-arbitrage bounds" not in set(ledger["rule"])


def test_null_vol_is_solved_from_the_price_and_flagged(desk: Path, tmp_path: Path) -> None:
    """A mark without implied_vol gets the vol QuantLib priced it at (atol 1e-8) and the vol_solved flag."""
    root = write_mini_desk(tmp_path / "solved", omit_vol_for=("ZEN-C100-J27", "QRX-C50-F27"))
    m0, m1, ledger = _markets(root)
    assert ledger.empty
    for market, day in ((m0, PRIOR), (m1, RUN)):
        for inst_id in ("ZEN-C100-J27", "QRX-C50-F27"):
            k = _at(market, inst_id)
            assert market.vol_solved[k] and np.isnan(market.marked_vol[k])
            np.testing.assert_allclose(market.vol[k], VOL[day][BY_ID[inst_id].underlying], rtol=0, atol=1e-8)
        assert not market.vol_solved[_at(market, "ZEN-P120-M27")]
    night = prepare_night(JobConfig(data_root=root, write_reports=False), RUN)
    flags = night.positions.set_index("trade_id")["flags"]
    assert "vol_solved" in flags["T1"] and "vol_solved" in flags["T3"] and "vol_solved" not in flags["T2"]


def test_unsolvable_vol_is_rejected(desk: Path) -> None:
    """A price of 0 for an out-of-the-money put has no implied vol: a rejected row and an unusable option."""
    edit_row(desk, RUN, "option_marks", "ZEN-P90-D26", price=0.0, implied_vol=None)
    _, m1, ledger = _markets(desk)
    rows = ledger[ledger["rule"] == "implied vol cannot be solved from price"]
    assert rows["key"].tolist() == ["ZEN-P90-D26"]
    k = _at(m1, "ZEN-P90-D26")
    assert not m1.usable[k] and m1.reason[k].startswith("implied vol cannot be solved")


def test_vol_that_does_not_reprice_the_mark_is_warned(desk: Path) -> None:
    """A marked vol of 0.30 on a mark QuantLib priced at 0.27 is a warning; the option stays usable at 0.30."""
    edit_row(desk, RUN, "option_marks", "ZEN-C100-J27", implied_vol=0.30)
    _, m1, ledger = _markets(desk)
    assert ledger[["key", "rule", "severity"]].values.tolist() == [
        ["ZEN-C100-J27", "implied vol inconsistent with price", WARNING]]
    k = _at(m1, "ZEN-C100-J27")
    assert m1.usable[k] and m1.vol_mismatch[k] and m1.vol[k] == 0.30
    assert m1.vol_mismatch.sum() == 1


def test_vol_within_tolerance_is_not_warned(desk: Path) -> None:
    """A marked vol off by 1e-6 reprices the mark within the tolerance: no warning."""
    edit_row(desk, RUN, "option_marks", "ZEN-C100-J27", implied_vol=VOL[RUN]["ZEN"] + 1e-6)
    _, m1, ledger = _markets(desk)
    assert ledger.empty and not m1.vol_mismatch.any()


def _copy_prior_mark(root: Path, inst_id: str) -> None:
    prior = next(r for r in read_rows(root, PRIOR, "option_marks") if r["instrument_id"] == inst_id)
    edit_row(root, RUN, "option_marks", inst_id, price=prior["price"], implied_vol=prior["implied_vol"])


def test_unchanged_mark_while_the_underlying_moved_is_stale(desk: Path) -> None:
    """A run-date mark equal to the prior one (price and vol) while ZEN moved 3 % is a stale-mark warning."""
    _copy_prior_mark(desk, "ZEN-P120-M27")
    _, _, ledger = _markets(desk)
    stale = ledger[ledger["rule"] == "stale mark"]
    assert stale[["key", "severity"]].values.tolist() == [["ZEN-P120-M27", WARNING]]
    assert "3.00%" in stale["detail"].iloc[0]
    night = prepare_night(JobConfig(data_root=desk, write_reports=False), RUN)
    assert "stale_mark" in night.positions.set_index("trade_id").loc["T2", "flags"]


@pytest.mark.parametrize("run_spot", [100.0, 100.1])
def test_unchanged_mark_is_not_stale_when_the_underlying_did_not_move(desk: Path, run_spot: float) -> None:
    """Same mark with ZEN unchanged, or moved 0.1 % (below the 0.2 % setting), is not stale."""
    _copy_prior_mark(desk, "ZEN-P120-M27")
    edit_row(desk, RUN, "underlying_marks", "ZEN", spot=run_spot)
    _, _, ledger = _markets(desk)
    assert "stale mark" not in set(ledger["rule"])


def test_expired_instrument_has_its_reason(desk: Path) -> None:
    """An option whose expiry is before the date is unusable: 'the option expired before <date>'."""
    for day in (PRIOR, RUN):
        rows = read_rows(desk, day, "instruments")
        rows.append(dict(rows[0], instrument_id="ZEN-C90-N26", strike=90.0, expiry=dt.date(2026, 11, 20)))
        put_rows(desk, day, "instruments", rows)
    m0, m1, _ = _markets(desk)
    for market, day in ((m0, PRIOR), (m1, RUN)):
        k = _at(market, "ZEN-C90-N26")
        assert market.tau_years[k] < 0 and not market.usable[k]
        assert market.reason[k] == f"the option expired before {day}"


def test_missing_curve_gets_a_row_per_currency(desk: Path) -> None:
    """No EUR curve: one rejected row keyed EUR in rate_curves, and the EUR option is unusable."""
    put_rows(desk, RUN, "rate_curves", [r for r in read_rows(desk, RUN, "rate_curves") if r["currency"] != "EUR"])
    _, m1, ledger = _markets(desk)
    assert ledger[["key", "rule"]].values.tolist() == [["EUR", "no curve for currency"]]
    assert ledger["file"].iloc[0].endswith("as_of=2026-11-30/rate_curves.parquet")
    k = _at(m1, "QRX-C50-F27")
    assert not m1.usable[k] and m1.reason[k] == "no rate curve for currency EUR on 2026-11-30"
    assert m1.usable.sum() == len(INSTRUMENTS) - 1


def test_missing_underlying_is_named_on_the_instrument(desk: Path) -> None:
    """No QRX row in underlying_marks: a row for the instrument naming QRX, and the option is unusable."""
    kept = [r for r in read_rows(desk, RUN, "underlying_marks") if r["underlying"] != "QRX"]
    put_rows(desk, RUN, "underlying_marks", kept)
    _, m1, ledger = _markets(desk)
    assert ledger[["file", "key", "rule"]].values.tolist() == [
        [str(folder_for(desk, RUN) / "instruments.parquet"), "QRX-C50-F27", "unknown underlying"]]
    assert "QRX" in ledger["detail"].iloc[0]
    k = _at(m1, "QRX-C50-F27")
    assert not m1.spot_known[k] and not m1.usable[k]
    assert m1.reason[k] == "underlying QRX has no usable mark on 2026-11-30"


def test_rejected_underlying_is_not_also_called_unknown(desk: Path) -> None:
    """A QRX row with spot 0 is rejected once, in underlying_marks; the instrument gets no second row."""
    edit_row(desk, RUN, "underlying_marks", "QRX", spot=0.0)
    _, m1, ledger = _markets(desk)
    assert ledger[["key", "rule"]].values.tolist() == [["QRX", "spot must be > 0"]]
    assert not m1.usable[_at(m1, "QRX-C50-F27")]


def test_missing_mark_makes_the_option_unusable(desk: Path) -> None:
    """An instrument without a run-date mark is unusable with 'no usable option mark'."""
    put_rows(desk, RUN, "option_marks", [r for r in read_rows(desk, RUN, "option_marks")
                                     if r["instrument_id"] != "ZEN-P120-M27"])
    _, m1, ledger = _markets(desk)
    assert ledger.empty
    k = _at(m1, "ZEN-P120-M27")
    assert not m1.usable[k] and m1.reason[k] == "no usable option mark on 2026-11-30"


def test_rejected_instrument_row_is_not_replaced_by_the_other_date(desk: Path) -> None:
    """A run-date instrument row breaking a rule leaves the option unusable that date, though the prior lists it."""
    edit_row(desk, RUN, "instruments", "ZEN-P120-M27", strike=-120.0)
    m0, m1, ledger = _markets(desk)
    assert ledger[["key", "rule"]].values.tolist() == [["ZEN-P120-M27", "strike must be > 0"]]
    k = _at(m1, "ZEN-P120-M27")
    assert m1.terms_rejected[k] and not m1.listed[k] and not m1.usable[k]
    assert m1.reason[k] == "its row in instruments.parquet of 2026-11-30 breaks a rule (see that row)"
    assert m0.usable[_at(m0, "ZEN-P120-M27")]


def test_instrument_only_on_the_other_date_borrows_its_terms(desk: Path) -> None:
    """An option the run-date file no longer lists takes the prior terms, usable but not listed."""
    put_rows(desk, RUN, "instruments", [r for r in read_rows(desk, RUN, "instruments")
                                    if r["instrument_id"] != "ZEN-P90-D26"])
    _, m1, ledger = _markets(desk)
    assert ledger.empty
    k = _at(m1, "ZEN-P90-D26")
    assert not m1.listed[k] and not m1.terms_rejected[k] and m1.usable[k] and m1.strike[k] == 90.0


def test_empty_files_do_not_crash_the_market(desk: Path) -> None:
    """With no marks and no underlyings on the run date every option is unusable, with a reason each."""
    put_rows(desk, RUN, "option_marks", [])
    put_rows(desk, RUN, "underlying_marks", [])
    _, m1, ledger = _markets(desk)
    assert not m1.usable.any() and (m1.reason != "").all()
    assert set(ledger["rule"]) == {"unknown underlying"}


def test_take_fills_missing_indices() -> None:
    """take() gathers by index and fills -1, also from an empty array."""
    np.testing.assert_array_equal(take(np.array([1.0, 2.0]), np.array([1, -1, 0]), np.nan), [2.0, np.nan, 1.0])
    assert take(np.zeros(0), np.array([-1, -1]), np.nan).shape == (2,)
    assert take(np.array(["a"], dtype=object), np.array([-1, 0]), "").tolist() == ["", "a"]
    assert take(np.zeros(0, dtype=bool), np.array([-1]), True).tolist() == [True]


def test_places_of_another_markets_ids_are_their_locations(desk):
    """A market's places of the other date's instrument ids (distinct labels) are the rows `locate` finds for the
    same ids, -1 for an id it does not hold."""
    m0, m1, _ = _markets(desk)
    others = pd.Index([*m1.ids, "NOT-AN-INSTRUMENT"], dtype=object)
    places = m0.places(others)
    assert places.dtype == np.intp
    assert np.array_equal(places, m0.locate(others.to_numpy()))
    assert places[-1] == -1 and (places[:-1] >= 0).any()
