"""Tests of attribution.activity: trade activity at execution prices, cash flows, the official P&L break.

The desk is tests/hedged_desk.py (written from the data contract); every expected figure is plain
arithmetic on its numbers and on the archived marks (quantity x multiplier x (mark - price)).
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import duckdb
import pandas as pd
import pytest
from numpy.testing import assert_allclose

from attribution.cli import main
from attribution.engine import EXIT_FINDINGS, EXIT_OK
from tests.contract_files import read_rows, write_folder
from tests.hedged_desk import H1_RUN_QUANTITY, write_hedged_desk, write_whole_book
from tests.mini_desk import RUN


def _run(root: Path, *extra: str) -> int:
    return main(["run", "--as-of", RUN.isoformat(), "--data", str(root / "data"),
                 "--archive", str(root / "a.duckdb"), "--no-reports", *extra])


def _tables(root: Path) -> dict[str, pd.DataFrame]:
    with duckdb.connect(str(root / "a.duckdb"), read_only=True) as con:
        return {t: con.execute(f"SELECT * FROM {t}").df()  # fixed table names
                for t in ("position_pnl", "book_pnl", "input_exceptions", "runs")}


@pytest.fixture(scope="module")
def whole(tmp_path_factory: pytest.TempPathFactory) -> tuple[int, dict[str, pd.DataFrame]]:
    root = tmp_path_factory.mktemp("whole")
    write_whole_book(root / "data")
    code = _run(root)
    return code, _tables(root)


def test_changes_are_priced_at_their_execution_prices(whole):
    """increase/close/decrease at their prices against the run-date mark; a priced new activity prices the trade."""
    _, t = whole
    rows = t["position_pnl"].set_index("trade_id")
    mark = rows["price_run"]
    assert_allclose(rows.at["T6", "pnl_amendment"], 2 * 100 * (mark["T6"] - 14.0), rtol=1e-12)
    assert_allclose(rows.at["T5", "pnl_amendment"], -7 * 100 * (mark["T5"] - 0.03), rtol=1e-12)
    assert_allclose(rows.at["H1", "pnl_amendment"], -20 * 1 * (103.0 - 102.9), rtol=1e-9)
    assert rows.at["T8", "status"] == "new"  # no trade_price, priced by its `new` activity
    assert_allclose(rows.at["T8", "pnl_new_trade"], 1 * 100 * (mark["T8"] - 10.0), rtol=1e-12)
    assert rows.at["H1", "quantity_run_date"] == H1_RUN_QUANTITY and "amended" in rows.at["H1", "flags"]
    closed = rows.loc["T5"]  # held 7 overnight, sold at 0.03: actual + amendment = 7 x 100 x (0.03 - prior mark)
    assert_allclose(closed["pnl_actual"] + closed["pnl_amendment"], 7 * 100 * (0.03 - closed["price_prior"]),
                    rtol=1e-12)


def test_cash_flows_go_to_their_trade_or_the_book_cash_row(whole):
    """A flow naming a trade lands on it (converted at the run date's FX), one without on the book's cash row."""
    _, t = whole
    rows = t["position_pnl"].set_index("trade_id")
    assert rows.at["H1", "pnl_cash"] == -1.5
    assert_allclose(rows.at["T3", "pnl_cash"], -10.0 * 1.10, rtol=1e-15)  # EUR at 1.10 on the run date
    cash = rows.loc["(cash) Index vol"]
    assert cash["status"] == "cash" and cash["pnl_cash"] == cash["pnl_total"] == -250.0
    total = rows["pnl_actual"] + rows["pnl_new_trade"].fillna(0) + rows["pnl_expiry"] + rows["pnl_amendment"] \
        + rows["pnl_fx_translation"] + rows["pnl_cash"]
    assert_allclose(rows["pnl_total"], total, rtol=1e-12, atol=1e-9)
    books = t["book_pnl"].set_index("book")
    assert books.at["Index vol", "pnl_cash"] == -251.5
    assert books.at["Index vol", "positions"] == 9  # the cash row is not a position
    assert t["runs"].at[0, "positions_archived"] == 11


def test_official_break_is_official_minus_total_and_a_finding(whole):
    """official_break = official P&L - pnl_total per book; beyond the limit it is warned and the run exits 3."""
    code, t = whole
    books = t["book_pnl"].set_index("book")
    assert_allclose(books.at["Index vol", "official_break"], 1_000_000.0 - books.at["Index vol", "pnl_total"],
                    rtol=1e-15)
    assert pd.isna(books.at["Euro single names", "official_pnl"])
    ledger = t["input_exceptions"].set_index("rule")
    assert ledger.at["official P&L break", "key"] == "Index vol"
    assert ledger.at["official P&L break", "severity"] == "warning"
    assert ledger.at["official P&L of a book without positions", "key"] == "Ghost book"
    assert code == EXIT_FINDINGS


def _edit_run(root: Path, kind: str, rows: list[dict[str, object]]) -> None:
    write_folder(root, RUN, {kind: rows})


def test_official_break_within_its_limit_is_no_finding(tmp_path):
    """A book whose official P&L matches its total to within the job's limit exits 0 with its break archived."""
    write_hedged_desk(tmp_path / "data")
    assert _run(tmp_path) in (EXIT_OK, EXIT_FINDINGS)
    books = _tables(tmp_path)["book_pnl"].set_index("book")
    official = [{"book": b, "pnl": float(books.at[b, "pnl_total"]) + 12.5} for b in books.index]
    _edit_run(tmp_path / "data", "official_pnl", official)
    assert _run(tmp_path) == EXIT_OK
    again = _tables(tmp_path)["book_pnl"].set_index("book")
    assert_allclose(again["official_break"], 12.5, rtol=1e-9)


def test_assignment_is_exercised_and_its_shares_are_new_at_the_strike(tmp_path):
    """An assigned short put is `exercised`: explained to N (intrinsic at the run-date spot - prior mark) and handed
    over for the shares with no cash (pnl_amendment = -N x intrinsic); the shares bought at the strike are a new
    trade worth N (spot - strike) on the night. The pair's P&L is N (intrinsic - prior mark), counted once: the
    short put's holder is paid the strike for shares worth the spot (plain arithmetic, README "Statuses")."""
    data = tmp_path / "data"
    write_hedged_desk(data)
    positions = [r for r in read_rows(data, RUN, "positions") if r["trade_id"] != "T2"]
    positions.append({"trade_id": "T2-SHR", "book": "Index vol", "instrument_id": "ZEN-SHR", "quantity": 500.0,
                      "trade_date": RUN, "trade_price": None})
    write_folder(data, RUN, {"positions": positions, "trade_activity": [
        {"activity_id": "X1", "trade_id": "T2", "kind": "assignment", "quantity": 5.0, "price": None},
        {"activity_id": "X2", "trade_id": "T2-SHR", "kind": "new", "quantity": 500.0, "price": 120.0},
        {"activity_id": "X3", "trade_id": "T6", "kind": "increase", "quantity": 2.0, "price": 14.0},
        {"activity_id": "X4", "trade_id": "T7", "kind": "new", "quantity": 2.0, "price": 1.5},
        {"activity_id": "X5", "trade_id": "T8", "kind": "new", "quantity": 1.0, "price": None},
        {"activity_id": "X6", "trade_id": "T5", "kind": "close", "quantity": -7.0, "price": 0.03}]})
    _run(tmp_path)
    t = _tables(tmp_path)
    rows = t["position_pnl"].set_index("trade_id")
    put = rows.loc["T2"]
    assert put["status"] == "exercised" and put["price_run"] == 120.0 - 103.0
    assert_allclose(put["pnl_actual"], -5 * 100 * ((120.0 - 103.0) - put["price_prior"]), rtol=1e-12)
    assert_allclose(put["pnl_explained"] + put["pnl_residual"], put["pnl_actual"], rtol=1e-12)
    assert_allclose(put["pnl_amendment"], 5 * 100 * (120.0 - 103.0), rtol=1e-12)  # -N x intrinsic, N = -500
    shares = rows.loc["T2-SHR"]
    assert shares["status"] == "new" and shares["pnl_new_trade"] == 500 * (103.0 - 120.0)
    pair = put["pnl_total"] + shares["pnl_total"]
    assert_allclose(pair, -5 * 100 * ((120.0 - 103.0) - put["price_prior"]), rtol=1e-12)
    assert t["book_pnl"].set_index("book").at["Index vol", "exercised"] == 1
    assert not (t["input_exceptions"]["rule"] == "position break").any()


def test_partial_assignment_hands_the_assigned_contracts_over_at_no_cash(tmp_path):
    """Two of five short puts assigned: the trade stays (carried, three short), the two assigned contracts leave at
    0 against the run-date mark (pnl_amendment = quantity x multiplier x mark, README "Trade activity"), and with the
    200 shares bought at the strike the night's P&L is the three kept puts' move plus the two assigned puts'
    N (intrinsic - prior mark), counted once (plain arithmetic)."""
    data = tmp_path / "data"
    write_hedged_desk(data)
    positions = [dict(r, quantity=-3.0) if r["trade_id"] == "T2" else r for r in read_rows(data, RUN, "positions")]
    positions.append({"trade_id": "T2-SHR", "book": "Index vol", "instrument_id": "ZEN-SHR", "quantity": 200.0,
                      "trade_date": RUN, "trade_price": None})
    write_folder(data, RUN, {"positions": positions, "trade_activity": [
        {"activity_id": "X1", "trade_id": "T2", "kind": "assignment", "quantity": 2.0, "price": None},
        {"activity_id": "X2", "trade_id": "T2-SHR", "kind": "new", "quantity": 200.0, "price": 120.0}]})
    _run(tmp_path)
    rows = _tables(tmp_path)["position_pnl"].set_index("trade_id")
    put, shares = rows.loc["T2"], rows.loc["T2-SHR"]
    assert put["status"] == "carried" and put["quantity"] == -5.0  # the prior quantity explained
    assert_allclose(put["pnl_amendment"], 2 * 100 * put["price_run"], rtol=1e-12)
    assert_allclose(shares["pnl_new_trade"], 200 * (103.0 - 120.0), rtol=1e-12)
    kept = -3 * 100 * (put["price_run"] - put["price_prior"])
    assigned = -2 * 100 * ((120.0 - 103.0) - put["price_prior"])
    assert_allclose(put["pnl_total"] + shares["pnl_total"], kept + assigned, rtol=1e-9)
    ledger = _tables(tmp_path)["input_exceptions"]
    assert not ((ledger["rule"] == "position break") & ledger["key"].isin(["T2", "T2-SHR"])).any()


def test_correction_restates_without_pnl_and_a_break_is_warned(tmp_path):
    """A correction restates the quantity explained with no amendment; a change no activity explains is a
    `position break` naming the trade and both quantities."""
    data = tmp_path / "data"
    write_hedged_desk(data)
    positions = [dict(r, quantity=-4.0) if r["trade_id"] == "H2" else r for r in read_rows(data, RUN, "positions")]
    positions = [dict(r, quantity=12.0) if r["trade_id"] == "T1" else r for r in positions]
    write_folder(data, RUN, {"positions": positions, "trade_activity": [
        {"activity_id": "K1", "trade_id": "T1", "kind": "correction", "quantity": 2.0, "price": None}]})
    _run(tmp_path)
    t = _tables(tmp_path)
    rows = t["position_pnl"].set_index("trade_id")
    assert rows.at["T1", "quantity"] == 12.0 and rows.at["T1", "pnl_amendment"] == 0.0
    assert "restated" in rows.at["T1", "flags"]
    assert_allclose(rows.at["T1", "pnl_actual"], 12 * 100 * (rows.at["T1", "price_run"] - rows.at["T1", "price_prior"]),
                    rtol=1e-12)
    breaks = t["input_exceptions"][t["input_exceptions"]["rule"] == "position break"].set_index("key")
    assert breaks.at["H2", "detail"] == "prior quantity -3 + activity 0 = -3, run-date quantity -4"
    assert breaks.at["H2", "severity"] == "warning" and breaks.at["H2", "book"] == "Index vol"
    assert "T6" in breaks.index  # 4 -> 6 lots with no activity row


def test_without_the_files_the_night_is_version_one(tmp_path):
    """No trade_activity, cash_flows or official_pnl: no cash row, no break, amendments at trade_price."""
    write_hedged_desk(tmp_path / "data")
    _run(tmp_path)
    t = _tables(tmp_path)
    rows = t["position_pnl"].set_index("trade_id")
    assert (rows["status"] != "cash").all() and (rows["pnl_cash"] == 0).all()
    assert t["book_pnl"]["official_break"].isna().all()
    assert_allclose(rows.at["T6", "pnl_amendment"], 2 * 100 * (rows.at["T6", "price_run"] - 14.0), rtol=1e-12)
    assert rows.at["T8", "status"] == "new_unpriced"
    assert dt.date(2026, 11, 30) == RUN
