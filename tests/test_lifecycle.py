"""Matching trades across the two dates, statuses and leg checks (attribution.lifecycle, with attribution.night).

Inputs: the mini desk (tests/mini_desk.py; marks priced by QuantLib) with one change per test. Expected
amounts use the README's lifecycle lines ("Statuses") on QuantLib's marks: an expiring trade's pnl_actual
= N (intrinsic at the run-date spot - prior mark), a settled one's pnl_expiry = N (intrinsic at the prior
spot - prior mark), pnl_new_trade = N (run mark - trade_price), pnl_amendment =
(q1 - q0) x multiplier (run mark - trade_price); tolerances rtol 1e-12 (the same arithmetic on the same
numbers).
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from attribution.config import CheckSettings, JobConfig
from attribution.contract import clean_night
from attribution.engine import PreparedNight, prepare_night
from attribution.exceptions_log import REJECTED, ExceptionLog
from attribution.lifecycle import Legs, match_legs
from attribution.loading import folder_for, read_night
from attribution.market import build_market, instrument_terms
from attribution.timebasis import TimeBasis
from tests.contract_files import edit_row, put_rows, read_rows
from tests.mini_desk import FX, INSTRUMENTS, PRIOR, RUN, SPOT, Inst, mark, write_mini_desk

BY_ID = {i.instrument_id: i for i in INSTRUMENTS}








def _drop(root: Path, day: dt.date, kind: str, key: str) -> None:
    rows = read_rows(root, day, kind)
    first = next(iter(rows[0]))
    put_rows(root, day, kind, [r for r in rows if r[first] != key])


def _add_instrument(root: Path, inst: Inst, days: tuple[dt.date, ...] = (PRIOR, RUN), marked_on: tuple = ()) -> None:
    """List ``inst`` on ``days``, with a QuantLib mark (at the desk's vol) on each of ``marked_on``."""
    for day in days:
        rows = read_rows(root, day, "instruments")
        rows.append({"instrument_id": inst.instrument_id, "underlying": inst.underlying,
                     "option_type": inst.option_type, "exercise": "european", "strike": inst.strike,
                     "expiry": inst.expiry, "multiplier": inst.multiplier, "currency": inst.currency})
        put_rows(root, day, "instruments", rows)
    for day in marked_on:
        rows = read_rows(root, day, "option_marks")
        rows.append({"instrument_id": inst.instrument_id, "price": mark(inst, day), "implied_vol": None})
        put_rows(root, day, "option_marks", rows)


def _add_position(root: Path, day: dt.date, trade_id: str, instrument_id: str, quantity: float,
                  trade_price: float | None = None, book: str = "Index vol") -> None:
    rows = read_rows(root, day, "positions")
    rows.append({"trade_id": trade_id, "book": book, "instrument_id": instrument_id, "quantity": quantity,
                 "trade_date": PRIOR, "trade_price": trade_price})
    put_rows(root, day, "positions", rows)


def _night(root: Path, checks: CheckSettings | None = None) -> PreparedNight:
    night = prepare_night(JobConfig(data_root=root, write_reports=False, checks=checks or CheckSettings()), RUN)
    _assert_accounted(root, night)
    return night


def _assert_accounted(root: Path, night: PreparedNight) -> None:
    """Every trade_id of both positions files is archived once, or rejected in a positions file, never both."""
    ids = {r["trade_id"] for day in (PRIOR, RUN) for r in read_rows(root, day, "positions")} - {None}
    archived = night.positions["trade_id"]
    assert archived.is_unique
    ex = night.exceptions
    rejected = set(ex.loc[ex["file"].str.endswith("positions.parquet") & (ex["severity"] == REJECTED), "key"])
    assert ids <= set(archived) | rejected
    assert not set(archived) & rejected
    assert night.unaccounted == ()


def _by_trade(night: PreparedNight) -> pd.DataFrame:
    return night.positions.set_index("trade_id")


def _rejections(night: PreparedNight) -> dict[str, list[tuple[str, str]]]:
    """trade_id -> [(date of the positions file, rule)] of its rejected rows."""
    ex = night.exceptions
    ex = ex[ex["file"].str.endswith("positions.parquet")]
    out: dict[str, list[tuple[str, str]]] = {}
    for file, key, rule in ex[["file", "key", "rule"]].itertuples(index=False):
        out.setdefault(key, []).append((file.split("as_of=")[1][:10], rule))
    return out


@pytest.fixture()
def desk(tmp_path: Path) -> Path:
    """The mini desk's two nights under tmp_path/data."""
    return write_mini_desk(tmp_path / "data")


def _legs(root: Path) -> tuple[Legs, pd.DataFrame]:
    log = ExceptionLog(RUN)
    c0 = clean_night(read_night(root, PRIOR), log, CheckSettings(), "USD")
    c1 = clean_night(read_night(root, RUN), log, CheckSettings(), "USD")
    m0 = build_market(c0, instrument_terms(c0, c1), TimeBasis(), CheckSettings(), log)
    m1 = build_market(c1, instrument_terms(c1, c0), TimeBasis(), CheckSettings(), log)
    return match_legs(c0, c1, m0, m1, log), log.frame()


def test_every_status_and_itsread_rows(desk: Path) -> None:
    """Mini desk: carried, closed, new, new_unpriced and expired, each leg pointing at its rows on each date."""
    legs, ledger = _legs(desk)
    assert ledger.empty
    got = {t: (s, r0, r1) for t, s, r0, r1 in zip(legs.trade_id, legs.status, legs.row0, legs.row1, strict=True)}
    assert got == {"T1": ("carried", 0, 0), "T2": ("carried", 1, 1), "T3": ("carried", 2, 2),
                   "T4": ("expired", 3, -1), "T5": ("closed", 4, -1), "T6": ("carried", 5, 3),
                   "T7": ("new", -1, 4), "T8": ("new_unpriced", -1, 5)}
    np.testing.assert_array_equal(legs.fx_rate, [FX[RUN][BY_ID[i].currency] for i in legs.instrument_id])


def test_expired_on_the_run_date_settles_at_intrinsic(desk: Path) -> None:
    """T4 (call 95, expiry on the run date) goes to max(S1 - K, 0) from its prior mark, inside the explain."""
    row = _by_trade(_night(desk)).loc["T4"]
    inst = BY_ID["ZEN-C95-EXP"]
    expected = 3 * inst.multiplier * (max(SPOT[RUN]["ZEN"] - 95.0, 0.0) - mark(inst, PRIOR))
    np.testing.assert_allclose(row["pnl_actual"], expected, rtol=1e-12)
    assert row["pnl_expiry"] == 0.0
    np.testing.assert_allclose(row["pnl_explained"] + row["pnl_residual"], expected, rtol=1e-12)
    np.testing.assert_allclose(row["pnl_total"], expected, rtol=1e-12)


def test_expired_between_the_dates_settles_at_the_run_date_spot(desk: Path) -> None:
    """An option expiring on the Saturday between the dates, held on Friday and gone on Monday, is expired."""
    sat = Inst("ZEN-C97-SAT", "ZEN", "call", 97.0, dt.date(2026, 11, 28), 100.0, "USD")
    _add_instrument(desk, sat, days=(PRIOR,), marked_on=(PRIOR,))
    _add_position(desk, PRIOR, "T9", sat.instrument_id, 2.0)
    row = _by_trade(_night(desk)).loc["T9"]
    assert row["status"] == "expired"
    expected = 2 * 100.0 * (max(SPOT[RUN]["ZEN"] - 97.0, 0.0) - mark(sat, PRIOR))
    np.testing.assert_allclose(row["pnl_actual"], expected, rtol=1e-12)
    np.testing.assert_allclose(row["tau_prior_years"], 1 / 365)  # theta runs to the Saturday expiry, not 3 days
    assert row["pnl_expiry"] == 0.0


def test_expired_on_the_prior_date_settles_at_the_prior_spot(desk: Path) -> None:
    """An option expiring on the prior date (expired in that night's run) is ``settled`` at the prior spot."""
    fri = Inst("ZEN-P104-FRI", "ZEN", "put", 104.0, PRIOR, 100.0, "USD")
    _add_instrument(desk, fri, days=(PRIOR,), marked_on=(PRIOR,))
    _add_position(desk, PRIOR, "T9", fri.instrument_id, -4.0)
    row = _by_trade(_night(desk)).loc["T9"]
    assert row["status"] == "settled"
    np.testing.assert_allclose(row["pnl_expiry"], -4 * 100.0 * (4.0 - mark(fri, PRIOR)), rtol=0, atol=1e-9)


def test_expiring_trade_still_listed_on_the_run_date_is_expired_not_rejected(desk: Path) -> None:
    """T4 also listed in the run-date positions (expiry that day) is expired, with no exception row."""
    _add_position(desk, RUN, "T4", "ZEN-C95-EXP", 3.0)
    night = _night(desk)
    assert _by_trade(night).loc["T4", "status"] == "expired"
    assert night.exceptions.empty


def test_position_listed_after_its_expiry_is_rejected_on_both_dates(desk: Path) -> None:
    """A trade still on the Monday file in an option that expired on Saturday is an active position past expiry."""
    sat = Inst("ZEN-C97-SAT", "ZEN", "call", 97.0, dt.date(2026, 11, 28), 100.0, "USD")
    _add_instrument(desk, sat, marked_on=(PRIOR,))
    _add_position(desk, PRIOR, "T9", sat.instrument_id, 2.0)
    _add_position(desk, RUN, "T9", sat.instrument_id, 2.0)
    night = _night(desk)
    assert "T9" not in set(night.positions["trade_id"])
    assert _rejections(night)["T9"] == [("2026-11-30", "active position on an expired option")]


def test_position_in_an_option_expired_before_the_prior_date_is_rejected(desk: Path) -> None:
    """Held on Friday in an option that expired the week before: rejected as an active position past expiry."""
    old = Inst("ZEN-C90-N26", "ZEN", "call", 90.0, dt.date(2026, 11, 20), 100.0, "USD")
    _add_instrument(desk, old)
    _add_position(desk, PRIOR, "T9", old.instrument_id, 1.0)
    night = _night(desk)
    assert _rejections(night)["T9"] == [("2026-11-27", "active position on an expired option")]
    assert "expired before 2026-11-27" in night.exceptions.set_index("key").loc["T9", "detail"]


def test_amendment_with_a_trade_price(desk: Path) -> None:
    """T6 goes 4 -> 6 at trade_price 14: explained on 4, amendment 2 x 100 x (run mark - 14), flag amended."""
    row = _by_trade(_night(desk)).loc["T6"]
    inst = BY_ID["ZEN-C100-J27"]
    np.testing.assert_allclose(row["pnl_amendment"], 2 * 100.0 * (mark(inst, RUN) - 14.0), rtol=1e-12)
    np.testing.assert_allclose(row["pnl_actual"], 4 * 100.0 * (mark(inst, RUN) - mark(inst, PRIOR)), rtol=1e-12)
    assert (row["quantity"], row["quantity_run_date"], row["flags"]) == (4.0, 6.0, "amended")


def test_amendment_without_a_trade_price_is_at_the_mark(desk: Path) -> None:
    """Without trade_price the amendment is filled at the run mark: zero, flagged amended_at_mark."""
    edit_row(desk, RUN, "positions", "T6", trade_price=None)
    row = _by_trade(_night(desk)).loc["T6"]
    assert row["pnl_amendment"] == 0.0
    assert row["flags"] == "amended,amended_at_mark"


def test_new_trades_priced_and_unpriced(desk: Path) -> None:
    """T7 (trade_price 1.5) gives N (run mark - 1.5); T8 without a price is new_unpriced with a null line."""
    rows = _by_trade(_night(desk))
    inst = BY_ID["ZEN-P90-D26"]
    np.testing.assert_allclose(rows.loc["T7", "pnl_new_trade"], 2 * 100.0 * (mark(inst, RUN) - 1.5), rtol=1e-12)
    assert rows.loc["T8", "status"] == "new_unpriced" and np.isnan(rows.loc["T8", "pnl_new_trade"])
    assert rows.loc["T8", "pnl_total"] == 0.0 and rows.loc["T8", "flags"] == "unpriced"


def test_closed_trade_is_explained_to_the_run_mark(desk: Path) -> None:
    """T5, gone on the run date, earns N (run mark - prior mark) on its prior quantity."""
    row = _by_trade(_night(desk)).loc["T5"]
    inst = BY_ID["ZEN-P90-D26"]
    np.testing.assert_allclose(row["pnl_actual"], 7 * 100.0 * (mark(inst, RUN) - mark(inst, PRIOR)), rtol=1e-12)
    assert row["quantity_run_date"] == 0.0


def test_trade_whose_other_leg_breaks_a_row_rule_is_rejected_on_both_dates(desk: Path) -> None:
    """T1 with a null book on the run date: its run row is rejected for that, its prior row as the other leg's."""
    edit_row(desk, RUN, "positions", "T1", book=None)
    night = _night(desk)
    assert _rejections(night)["T1"] == [("2026-11-30", "book is null"),
                                        ("2026-11-27", "trade rejected on the other date")]
    assert "T1" not in set(night.positions["trade_id"])
    assert len(night.positions) == 7


def test_trade_whose_run_leg_cannot_be_priced_is_not_archived_at_all(desk: Path) -> None:
    """T2's option has no run-date mark and no roll is allowed: T2 is rejected (keyed T2), archived on neither date."""
    _drop(desk, RUN, "option_marks", "ZEN-P120-M27")
    night = _night(desk, CheckSettings(mark_roll_days=0))
    assert _rejections(night) == {"T2": [("2026-11-30", "position cannot be priced on the run date")]}
    assert "T2" not in set(night.positions["trade_id"])


def test_trade_whose_prior_leg_cannot_be_priced_is_not_new_on_the_run_date(desk: Path) -> None:
    """T3's option has no prior mark: T3 is rejected on the prior date, not turned into a new trade."""
    _drop(desk, PRIOR, "option_marks", "QRX-C50-F27")
    night = _night(desk)
    assert _rejections(night) == {"T3": [("2026-11-27", "position cannot be priced on the prior date")]}
    assert "T3" not in set(night.positions["trade_id"])


def test_trade_changing_instrument_is_rejected(desk: Path) -> None:
    """T1 moved to another option under the same trade_id: rejected, neither carried nor new."""
    edit_row(desk, RUN, "positions", "T1", instrument_id="ZEN-P90-D26")
    night = _night(desk)
    assert _rejections(night) == {"T1": [("2026-11-30", "trade changed instrument between dates")]}
    assert "T1" not in set(night.positions["trade_id"])


def test_missing_fx_rate_rejects_by_trade_and_names_the_currency(desk: Path) -> None:
    """No EUR rate: T3 rejected in the run-date positions (keyed T3) and a row keyed EUR for fx_rates."""
    _drop(desk, RUN, "fx_rates", "EUR")
    night = _night(desk)
    ex = night.exceptions
    assert ex[["file", "key", "rule"]].values.tolist() == [
        [str(folder_for(desk, RUN) / "fx_rates.parquet"), "EUR", "no FX rate for currency"],
        [str(folder_for(desk, RUN) / "positions.parquet"), "T3", "no FX rate"]]
    assert "T3" not in set(night.positions["trade_id"])


def test_missing_fx_rate_for_a_closed_trade_is_keyed_on_the_prior_file(desk: Path) -> None:
    """A EUR trade held only on the prior date, with no EUR rate, is rejected in the prior positions file."""
    _drop(desk, RUN, "positions", "T3")
    _drop(desk, RUN, "fx_rates", "EUR")
    assert _rejections(_night(desk)) == {"T3": [("2026-11-27", "no FX rate")]}


def test_missing_prior_fx_rate_rejects_like_a_missing_run_date_rate(desk: Path) -> None:
    """No EUR rate on the prior date: the held trade T3 is rejected (its prior value cannot be translated)."""
    _drop(desk, PRIOR, "fx_rates", "EUR")
    night = _night(desk)
    assert night.exceptions[["file", "key", "rule"]].values.tolist() == [
        [str(folder_for(desk, PRIOR) / "fx_rates.parquet"), "EUR", "no FX rate for currency"],
        [str(folder_for(desk, RUN) / "positions.parquet"), "T3", "no FX rate"]]
    assert "T3" not in set(night.positions["trade_id"])


def test_changed_instrument_terms_reject_every_trade_in_it(desk: Path) -> None:
    """Strike 100 -> 105 between the files: a row for the instrument, and T1, T6 and the new T8 rejected."""
    edit_row(desk, RUN, "instruments", "ZEN-C100-J27", strike=105.0)
    night = _night(desk)
    inst_rows = night.exceptions[night.exceptions["file"].str.endswith("instruments.parquet")]
    assert inst_rows[["key", "rule", "detail"]].values.tolist() == [
        ["ZEN-C100-J27", "instrument terms changed between dates", "strike 100.0 -> 105.0"]]
    rule = "instrument terms changed between dates"
    assert _rejections(night) == {"T1": [("2026-11-27", rule)], "T6": [("2026-11-27", rule)],
                                  "T8": [("2026-11-30", rule)]}


def test_position_needs_its_instrument_listed_on_its_own_date(desk: Path) -> None:
    """ZEN-P90-D26 dropped from the run-date instruments: new T7 is rejected, closed T5 still settles."""
    _drop(desk, RUN, "instruments", "ZEN-P90-D26")
    night = _night(desk)
    assert _rejections(night) == {"T7": [("2026-11-30", "position cannot be priced on the run date")]}
    detail = night.exceptions.set_index("key").loc["T7", "detail"]
    assert detail == "instrument_id not in instruments.parquet of 2026-11-30"
    assert _by_trade(night).loc["T5", "status"] == "closed"


def test_position_whose_instrument_row_is_rejected_is_rejected(desk: Path) -> None:
    """T2's option has a negative strike on the run date: T2 is rejected, not priced on the prior terms."""
    edit_row(desk, RUN, "instruments", "ZEN-P120-M27", strike=-120.0)
    night = _night(desk)
    assert _rejections(night) == {"T2": [("2026-11-30", "position cannot be priced on the run date")]}
    assert "breaks a rule" in night.exceptions.set_index("key").loc["T2", "detail"]


def test_closed_and_expired_trades_need_usable_run_date_terms(desk: Path) -> None:
    """Run-date instrument rows of closed T5 and expiring T4 that break a rule reject those trades."""
    edit_row(desk, RUN, "instruments", "ZEN-C95-EXP", multiplier=0.0)
    edit_row(desk, RUN, "instruments", "ZEN-P90-D26", exercise="bermudan")
    night = _night(desk)
    got = _rejections(night)
    assert got["T4"] == [("2026-11-27", "expired position cannot be settled")]
    assert got["T5"] == [("2026-11-27", "closed position cannot be priced on the run date")]
    assert got["T7"] == [("2026-11-30", "position cannot be priced on the run date")]


def test_empty_prior_positions_make_every_run_trade_new(desk: Path) -> None:
    """A prior book with zero rows (flat): every run-date trade is new or new_unpriced."""
    put_rows(desk, PRIOR, "positions", [])
    statuses = _by_trade(_night(desk))["status"].to_dict()
    assert statuses == {"T1": "new_unpriced", "T2": "new_unpriced", "T3": "new_unpriced", "T6": "new",
                        "T7": "new", "T8": "new_unpriced"}


def test_empty_run_positions_close_the_book(desk: Path) -> None:
    """A run-date book with zero rows (flat): every prior trade is closed, or expired when its option expired."""
    put_rows(desk, RUN, "positions", [])
    statuses = _by_trade(_night(desk))["status"].to_dict()
    assert statuses == {"T1": "closed", "T2": "closed", "T3": "closed", "T4": "expired", "T5": "closed",
                        "T6": "closed"}


def test_late_booking_and_book_move_are_flagged(desk: Path) -> None:
    """A new trade dated on the prior date is booked_late; a carried trade in another book is moved_book."""
    edit_row(desk, RUN, "positions", "T7", trade_date=PRIOR)
    edit_row(desk, RUN, "positions", "T2", book="Single names")
    rows = _by_trade(_night(desk))
    assert rows.loc["T7", "flags"] == "booked_late"
    assert rows.loc["T2", "flags"] == "moved_book" and rows.loc["T2", "book"] == "Index vol"


def test_text_columns_of_few_values_hold_one_string_per_value(desk: Path) -> None:
    """A night's text columns of a few distinct values (exercise style, kind, status...) point at one Python string
    per value, not one per row: a million-position night would otherwise hold a million copies of "european"."""
    rows = _night(desk).positions
    for column in ("exercise", "kind", "status", "option_type", "currency", "limit_state", "strategy"):
        values = [v for v in rows[column].to_numpy(dtype=object) if v is not None]
        assert len(values) > len(set(values)), column  # some value repeats, so the check below can fail
        assert len({id(v) for v in values}) == len(set(values)), column
