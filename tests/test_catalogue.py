"""The catalogue of bad inputs: each case, its expected outcome, and that nothing is ever lost.

Every case starts from the mini desk (tests/mini_desk.py, written from README.md, "Input files"), changes
one thing, and runs the whole job through the command line (``attribution.cli.main``). The outcome is one of:

* the run fails: exit code 1, a message naming the file (or folder) and the field, the archive untouched
  (an existing one keeps its bytes, a missing one is not created);
* the bad row is rejected or warned in ``input_exceptions`` with the expected file, key and rule, exactly
  the expected trades are rejected, and the night is archived.

For every archived case conservation is checked on the archive (data contract, "Archive"): every trade_id of
both dates' positions files is in ``position_pnl`` once or has a ``rejected`` row keyed by it in a positions
file (never both); a row without trade_id has a rejected row keyed by its row number; the run record's
counts add up (in = archived + rejected) and so do the book rows (statuses sum to positions, books sum to
the night).

Decisions documented here (README "Input files" to follow): a positions file with zero rows is a valid flat
book (prior trades close or expire); an empty option_marks file rejects every position that needs a mark
that date, while a trade expiring that day still settles on the underlying's spot.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import math
import shutil
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import duckdb
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from attribution.cli import main
from attribution.engine import EXIT_FAILED, EXIT_FINDINGS, EXIT_OK, EXIT_USAGE
from attribution.lifecycle import STATUSES
from attribution.loading import folder_for
from tests.conservation import assert_conserved
from tests.contract_files import edit_row, put_rows, read_rows
from tests.hedged_desk import write_hedged_desk, write_whole_book
from tests.mini_desk import PRIOR, RUN, write_mini_desk

NAN, INF = math.nan, math.inf
ALL_TRADES = frozenset({"T1", "T2", "T3", "T4", "T5", "T6", "T7", "T8"})
ZEN_TRADES = frozenset({"T1", "T2", "T5", "T6", "T7", "T8"})  # T4 is ZEN too, but settles on spot alone


class Desk:
    """A copy of the mini desk that a case edits in place."""

    def __init__(self, root: Path) -> None:
        self.root = root

    def path(self, day: dt.date, kind: str) -> Path:
        return folder_for(self.root, day) / f"{kind}.parquet"

    def rows(self, day: dt.date, kind: str) -> list[dict[str, object]]:
        return read_rows(self.root, day, kind)

    def put(self, day: dt.date, kind: str, rows: list[dict[str, object]]) -> None:
        put_rows(self.root, day, kind, rows)

    def edit(self, day: dt.date, kind: str, key: str, /, **values: object) -> None:
        """Set ``values`` on the row whose first column is ``key``."""
        edit_row(self.root, day, kind, key, **values)

    def drop(self, day: dt.date, kind: str, key: str) -> None:
        rows = self.rows(day, kind)
        first = next(iter(rows[0]))
        self.put(day, kind, [r for r in rows if r[first] != key])

    def append(self, day: dt.date, kind: str, /, **values: object) -> None:
        self.put(day, kind, [*self.rows(day, kind), values])

    def column(self, day: dt.date, kind: str, name: str, values: pa.Array | None) -> None:
        """Replace (or, with None, drop) one column, keeping the rest of the file as it is."""
        t = pq.read_table(self.path(day, kind))
        t = t.drop_columns([name]) if values is None else t.set_column(t.schema.get_field_index(name), name, values)
        pq.write_table(t, self.path(day, kind))


@dataclass(frozen=True)
class Fails:
    """The run stops before anything is archived; the message names ``where`` and ``what``."""

    where: str
    what: str
    code: int = EXIT_FAILED


@dataclass(frozen=True)
class Explained:
    """The night is archived; ``rows`` (date, file, key, rule, severity) are in the ledger; ``rejected`` exactly."""

    rows: tuple[tuple[dt.date, str, str, str, str], ...] = ()
    rejected: frozenset[str] = frozenset()
    statuses: dict[str, str] = field(default_factory=dict)


@dataclass(frozen=True)
class Case:
    name: str
    change: Callable[[Desk], None]
    expect: Fails | Explained
    args: tuple[str, ...] = ()


def _rej(day: dt.date, kind: str, key: str, rule: str) -> tuple[dt.date, str, str, str, str]:
    return (day, kind, key, rule, "rejected")


def _warn(day: dt.date, kind: str, key: str, rule: str) -> tuple[dt.date, str, str, str, str]:
    return (day, kind, key, rule, "warning")


def _truncate(d: Desk) -> None:
    data = d.path(RUN, "positions").read_bytes()
    d.path(RUN, "positions").write_bytes(data[: len(data) // 3])


def _expired_option(d: Desk) -> None:
    for day in (PRIOR, RUN):
        d.append(day, "instruments", instrument_id="ZEN-C90-N26", underlying="ZEN", option_type="call",
                 exercise="european", strike=90.0, expiry=dt.date(2026, 11, 20), multiplier=100.0, currency="USD")
    d.append(PRIOR, "positions", trade_id="T9", book="Index vol", instrument_id="ZEN-C90-N26", quantity=2.0,
             trade_date=PRIOR, trade_price=None)


def _both_dates(kind: str, key: str, **values: object) -> Callable[[Desk], None]:
    def change(d: Desk) -> None:
        for day in (PRIOR, RUN):
            d.edit(day, kind, key, **values)
    return change


def _stale(d: Desk) -> None:
    [prior] = [r for r in d.rows(PRIOR, "option_marks") if r["instrument_id"] == "ZEN-P120-M27"]
    d.edit(RUN, "option_marks", "ZEN-P120-M27", price=prior["price"], implied_vol=prior["implied_vol"])


def _bad_curve_point(d: Desk) -> None:
    d.append(RUN, "rate_curves", currency="USD", tenor_years=5.0, zero_rate=NAN)


def _extra_column(d: Desk) -> None:
    t = pq.read_table(d.path(RUN, "positions"))
    pq.write_table(t.append_column("desk_note", pa.array(["checked"] * t.num_rows)), d.path(RUN, "positions"))


def _duplicate_row(day: dt.date, kind: str, key: str) -> Callable[[Desk], None]:
    def change(d: Desk) -> None:
        rows = d.rows(day, kind)
        first = next(iter(rows[0]))
        d.put(day, kind, rows + [r for r in rows if r[first] == key])
    return change


def _hedged(*changes: Callable[[Desk], None]) -> Callable[[Desk], None]:
    """The desk with its delta hedges (tests/hedged_desk.py), then ``changes``."""
    def change(d: Desk) -> None:
        write_hedged_desk(d.root)
        for each in changes:
            each(d)
    return change


def _whole(*changes: Callable[[Desk], None]) -> Callable[[Desk], None]:
    """The hedged desk with the run date's activity and cash flows (tests/hedged_desk.py; no official P&L),
    then ``changes``."""
    def change(d: Desk) -> None:
        write_whole_book(d.root)
        d.path(RUN, "official_pnl").unlink()
        for each in changes:
            each(d)
    return change


P, R = PRIOR, RUN
NO_VOL = "position cannot be priced on the run date"
CASES = [
    # ---- the run fails
    Case("missing run-date folder", lambda d: shutil.rmtree(folder_for(d.root, RUN)),
         Fails("as_of=2026-11-30", "folder for 2026-11-30 not found")),
    Case("missing named prior folder", lambda d: None, Fails("as_of=2026-11-26", "not found"),
         ("--prior", "2026-11-26")),
    Case("missing required file", lambda d: d.path(RUN, "option_marks").unlink(),
         Fails("option_marks.parquet", "required file is missing")),
    Case("truncated parquet", _truncate, Fails("as_of=2026-11-30/positions.parquet", "cannot be read as Parquet")),
    Case("wrong column type", lambda d: d.column(RUN, "underlying_marks", "spot", pa.array(["103", "49"])),
         Fails("underlying_marks.parquet", "column 'spot' has type string, the contract wants float64")),
    Case("missing column", lambda d: d.column(PRIOR, "option_marks", "implied_vol", None),
         Fails("as_of=2026-11-27/option_marks.parquet", "required column 'implied_vol' is missing")),
    pytest.param(Case("prior equal to run date", lambda d: None, Fails("prior date 2026-11-30", "--prior", EXIT_USAGE),
                      ("--prior", "2026-11-30"))),
    pytest.param(Case("prior after run date", lambda d: None, Fails("prior date 2026-12-01", "--prior", EXIT_USAGE),
                      ("--prior", "2026-12-01"))),
    # ---- files that are valid but unusual
    Case("optional fx file absent", lambda d: d.path(RUN, "fx_rates").unlink(),
         Explained((_rej(R, "fx_rates", "EUR", "no FX rate for currency"), _rej(R, "positions", "T3", "no FX rate")),
                   frozenset({"T3"}))),
    Case("empty run-date positions (flat book)", lambda d: d.put(RUN, "positions", []),
         Explained(statuses={"T1": "closed", "T3": "closed", "T4": "expired", "T6": "closed"})),
    Case("empty run-date option_marks (rolled from the prior date)", lambda d: d.put(RUN, "option_marks", []),
         Explained(tuple(_warn(R, "option_marks", i, "mark rolled forward")
                         for i in ("ZEN-C100-J27", "ZEN-P120-M27", "QRX-C50-F27", "ZEN-P90-D26")),
                   frozenset(), {"T4": "expired", "T1": "carried", "T5": "closed", "T7": "new"})),
    Case("empty option_marks on both dates", lambda d: (d.put(RUN, "option_marks", []),
                                                         d.put(PRIOR, "option_marks", [])),
         Explained((_rej(R, "positions", "T7", NO_VOL),), ALL_TRADES)),
    Case("empty prior instruments", lambda d: d.put(PRIOR, "instruments", []),
         Explained((_rej(P, "positions", "T1", "position cannot be priced on the prior date"),),
                   frozenset({"T1", "T2", "T3", "T4", "T5", "T6"}), {"T7": "new", "T8": "new_unpriced"})),
    Case("extra column accepted", _extra_column, Explained()),
    Case("integer quantity column accepted", lambda d: d.column(PRIOR, "positions", "quantity",
                                                                pa.array([10, -5, 20, 3, 7, 4], pa.int64())),
         Explained()),
    # ---- row rules of one file
    Case("duplicate trade_id", _duplicate_row(RUN, "positions", "T2"),
         Explained((_rej(R, "positions", "T2", "duplicate trade_id"),
                    _rej(P, "positions", "T2", "trade rejected on the other date")), frozenset({"T2"}))),
    Case("null book", lambda d: d.edit(PRIOR, "positions", "T5", book=None),
         Explained((_rej(P, "positions", "T5", "book is null"),), frozenset({"T5"}))),
    Case("null trade_id", lambda d: d.edit(RUN, "positions", "T7", trade_id=None),
         Explained((_rej(R, "positions", "(null) row 4", "trade_id is null"),))),
    pytest.param(Case("null trade_id on both dates, same row", _both_dates("positions", "T2", trade_id=None),
                      Explained((_rej(P, "positions", "(null) row 1", "trade_id is null"),
                                 _rej(R, "positions", "(null) row 1", "trade_id is null"))))),
    Case("unknown instrument", lambda d: d.edit(RUN, "positions", "T8", instrument_id="ZEN-C999-Z27"),
         Explained((_rej(R, "positions", "T8", NO_VOL),), frozenset({"T8"}))),
    Case("unknown underlying", _both_dates("instruments", "QRX-C50-F27", underlying="QRZ"),
         Explained((_rej(R, "instruments", "QRX-C50-F27", "unknown underlying"),
                    _rej(P, "instruments", "QRX-C50-F27", "unknown underlying"),
                    _rej(P, "positions", "T3", "position cannot be priced on the prior date")), frozenset({"T3"}))),
    Case("option type not call or put", _both_dates("instruments", "ZEN-P120-M27", option_type="PUT"),
         Explained((_rej(P, "instruments", "ZEN-P120-M27", "option_type must be call or put"),),
                   frozenset({"T2"}))),
    Case("exercise neither european nor american", _both_dates("instruments", "QRX-C50-F27", exercise="bermudan"),
         Explained((_rej(R, "instruments", "QRX-C50-F27", "exercise must be european or american"),),
                   frozenset({"T3"}))),
    Case("negative strike", lambda d: d.edit(RUN, "instruments", "ZEN-P90-D26", strike=-90.0),
         Explained((_rej(R, "instruments", "ZEN-P90-D26", "strike must be > 0"),
                    _rej(P, "positions", "T5", "closed position cannot be priced on the run date"),
                    _rej(R, "positions", "T7", NO_VOL)), frozenset({"T5", "T7"}))),
    Case("duplicate instrument", _duplicate_row(RUN, "instruments", "ZEN-C100-J27"),
         Explained((_rej(R, "instruments", "ZEN-C100-J27", "duplicate instrument_id"),),
                   frozenset({"T1", "T6", "T8"}))),
    Case("instrument terms changed", lambda d: d.edit(RUN, "instruments", "ZEN-P120-M27", expiry=dt.date(2027, 4, 16)),
         Explained((_rej(R, "instruments", "ZEN-P120-M27", "instrument terms changed between dates"),),
                   frozenset({"T2"}))),
    Case("zero spot", lambda d: d.edit(RUN, "underlying_marks", "QRX", spot=0.0),
         Explained((_rej(R, "underlying_marks", "QRX", "spot must be > 0"),), frozenset({"T3"}))),
    Case("negative vol", lambda d: d.edit(PRIOR, "option_marks", "ZEN-P120-M27", implied_vol=-0.25),
         Explained((_rej(P, "option_marks", "ZEN-P120-M27", "implied_vol must be > 0"),), frozenset({"T2"}))),
    Case("percent-scaled vol", lambda d: d.edit(RUN, "option_marks", "ZEN-C100-J27", implied_vol=27.0),
         Explained((_rej(R, "option_marks", "ZEN-C100-J27", "implied_vol is absurd"),
                    _warn(R, "option_marks", "ZEN-C100-J27", "mark rolled forward")), statuses={"T1": "carried"})),
    Case("price below intrinsic", lambda d: d.edit(RUN, "option_marks", "ZEN-P120-M27", price=10.0),
         Explained((_rej(R, "option_marks", "ZEN-P120-M27", "price outside no-arbitrage bounds"),),
                   frozenset({"T2"}))),
    Case("price above its upper bound", lambda d: d.edit(RUN, "option_marks", "QRX-C50-F27", price=60.0),
         Explained((_rej(R, "option_marks", "QRX-C50-F27", "price outside no-arbitrage bounds"),),
                   frozenset({"T3"}))),
    Case("active position past expiry", _expired_option,
         Explained((_rej(P, "positions", "T9", "active position on an expired option"),), frozenset({"T9"}))),
    Case("NaN quantity", lambda d: d.edit(PRIOR, "positions", "T1", quantity=NAN),
         Explained((_rej(P, "positions", "T1", "quantity is not a finite number"),
                    _rej(R, "positions", "T1", "trade rejected on the other date")), frozenset({"T1"}))),
    Case("infinite quantity", lambda d: d.edit(RUN, "positions", "T7", quantity=-INF),
         Explained((_rej(R, "positions", "T7", "quantity is not a finite number"),), frozenset({"T7"}))),
    Case("absurdly large quantity", lambda d: d.edit(RUN, "positions", "T1", quantity=5e12),
         Explained((_rej(R, "positions", "T1", "quantity is absurdly large"),), frozenset({"T1"}))),
    Case("negative trade price", lambda d: d.edit(RUN, "positions", "T7", trade_price=-1.5),
         Explained((_rej(R, "positions", "T7", "trade_price must be a finite number >= 0 when given"),),
                   frozenset({"T7"}))),
    Case("NaN price", lambda d: d.edit(RUN, "option_marks", "ZEN-P90-D26", price=NAN),
         Explained((_rej(R, "option_marks", "ZEN-P90-D26", "price is not a finite number"),
                    _warn(R, "option_marks", "ZEN-P90-D26", "mark rolled forward")), statuses={"T7": "new"})),
    Case("infinite price", lambda d: d.edit(PRIOR, "option_marks", "QRX-C50-F27", price=INF),
         Explained((_rej(P, "option_marks", "QRX-C50-F27", "price is not a finite number"),), frozenset({"T3"}))),
    Case("NaN spot", lambda d: d.edit(RUN, "underlying_marks", "ZEN", spot=NAN),
         Explained((_rej(R, "underlying_marks", "ZEN", "spot is not a finite number"),
                    _rej(P, "positions", "T4", "expired position cannot be settled")), ZEN_TRADES | {"T4"})),
    Case("infinite spot", lambda d: d.edit(PRIOR, "underlying_marks", "QRX", spot=INF),
         Explained((_rej(P, "underlying_marks", "QRX", "spot is not a finite number"),), frozenset({"T3"}))),
    Case("no curve for a currency", lambda d: d.drop(RUN, "rate_curves", "EUR"),
         Explained((_rej(R, "rate_curves", "EUR", "no curve for currency"),), frozenset({"T3"}))),
    Case("curve with a bad point", _bad_curve_point,
         Explained((_rej(R, "rate_curves", "USD @ 5.0y", "zero_rate is not a finite number"),
                    _rej(R, "rate_curves", "USD @ 1.0y", "curve has a rejected point"),
                    _rej(R, "rate_curves", "USD", "no curve for currency")), ZEN_TRADES)),
    Case("no FX rate", lambda d: d.drop(RUN, "fx_rates", "EUR"),
         Explained((_rej(R, "fx_rates", "EUR", "no FX rate for currency"), _rej(R, "positions", "T3", "no FX rate")),
                   frozenset({"T3"}))),
    # ---- instrument kinds (data contract version 2)
    Case("hedges of every kind explained", _hedged(), Explained(statuses={"H1": "carried", "H2": "carried",
                                                                          "H3": "carried"})),
    Case("unknown kind", _hedged(lambda d: d.edit(RUN, "instruments", "ZEN-FUT-M27", kind="swap")),
         Explained((_rej(R, "instruments", "ZEN-FUT-M27", "kind must be option, underlying, future or forward"),
                    _rej(R, "positions", "H2", NO_VOL)), frozenset({"H2"}))),
    Case("option type on a future", _hedged(_both_dates("instruments", "ZEN-FUT-M27", option_type="call")),
         Explained((_rej(P, "instruments", "ZEN-FUT-M27", "option_type must be null for kind future"),),
                   frozenset({"H2"}))),
    Case("expiry on an underlying", _hedged(_both_dates("instruments", "ZEN-SHR", expiry=dt.date(2027, 1, 1))),
         Explained((_rej(P, "instruments", "ZEN-SHR", "expiry must be null for kind underlying"),),
                   frozenset({"H1"}))),
    Case("forward without a strike", _hedged(_both_dates("instruments", "QRX-FWD-J27", strike=None)),
         Explained((_rej(P, "instruments", "QRX-FWD-J27", "strike is not a finite number"),), frozenset({"H3"}))),
    Case("future without an expiry", _hedged(_both_dates("instruments", "ZEN-FUT-M27", expiry=None)),
         Explained((_rej(P, "instruments", "ZEN-FUT-M27", "expiry is null"),), frozenset({"H2"}))),
    Case("future without a mark", _hedged(lambda d: d.put(RUN, "future_marks", [])),
         Explained((_rej(R, "positions", "H2", NO_VOL),), frozenset({"H2"}))),
    Case("future mark not positive", _hedged(lambda d: d.edit(PRIOR, "future_marks", "ZEN-FUT-M27", price=0.0)),
         Explained((_rej(P, "future_marks", "ZEN-FUT-M27", "price must be > 0"),
                    _rej(P, "positions", "H2", "position cannot be priced on the prior date")), frozenset({"H2"}))),
    Case("duplicate future mark", _hedged(_duplicate_row(RUN, "future_marks", "ZEN-FUT-M27")),
         Explained((_rej(R, "future_marks", "ZEN-FUT-M27", "duplicate instrument_id"),), frozenset({"H2"}))),
    Case("future mark of an option", _hedged(lambda d: d.append(RUN, "future_marks", instrument_id="ZEN-C100-J27",
                                                                price=10.0)),
         Explained((_rej(R, "future_marks", "ZEN-C100-J27", "mark of no future"),))),
    # ---- trade activity, cash flows, official P&L (data contract version 2)
    Case("whole book explained", _whole(), Explained(statuses={"T5": "closed", "T8": "new", "H1": "carried"})),
    Case("activity kind unknown", _whole(lambda d: d.append(RUN, "trade_activity", activity_id="A9", trade_id="T1",
                                                            kind="swap", quantity=0.0, price=None)),
         Explained((_rej(R, "trade_activity", "A9", "activity kind unknown"),))),
    Case("price on a correction", _whole(lambda d: d.append(RUN, "trade_activity", activity_id="A9", trade_id="T1",
                                                            kind="correction", quantity=0.0, price=1.0)),
         Explained((_rej(R, "trade_activity", "A9", "price must be null for a correction or cancel"),))),
    Case("duplicate activity_id", _whole(_duplicate_row(RUN, "trade_activity", "A1")),
         Explained((_rej(R, "trade_activity", "A1", "duplicate activity_id"),
                    _warn(R, "trade_activity", "T6", "position break")))),
    Case("activity of an unknown trade", _whole(lambda d: d.append(RUN, "trade_activity", activity_id="A9",
                                                                   trade_id="ZZ", kind="increase", quantity=1.0,
                                                                   price=1.0)),
         Explained((_warn(R, "trade_activity", "A9", "activity of an unknown trade"),))),
    Case("position break", _whole(lambda d: d.edit(RUN, "trade_activity", "A5", quantity=-10.0)),
         Explained((_warn(R, "trade_activity", "H1", "position break"),))),
    Case("cash flow kind unknown", _whole(lambda d: d.edit(RUN, "cash_flows", "C2", kind="bonus")),
         Explained((_rej(R, "cash_flows", "C2", "cash flow kind unknown"),))),
    Case("cash flow without an FX rate", _whole(lambda d: d.edit(RUN, "cash_flows", "C3", currency="CHF")),
         Explained((_rej(R, "cash_flows", "C3", "no FX rate"),))),
    Case("cash flow of another book's trade", _whole(lambda d: d.edit(RUN, "cash_flows", "C1", trade_id="T3")),
         Explained((_warn(R, "cash_flows", "C1", "cash flow of no trade of its book"),))),
    Case("duplicate official book", _whole(lambda d: d.put(RUN, "official_pnl", [{"book": "Index vol", "pnl": 1.0},
                                                                               {"book": "Index vol", "pnl": 2.0}])),
         Explained((_rej(R, "official_pnl", "Index vol", "duplicate book"),))),
    Case("trade_id that reads like a keyless row's key", lambda d: d.edit(
        PRIOR, "positions", "T5", trade_id="(null) row 9", instrument_id="ZEN-NOPE"),
         Explained((_rej(P, "positions", "(null) row 9", "position cannot be priced on the prior date"),),
                   frozenset({"(null) row 9"}))),
    Case("multiplier that overflows", _both_dates("instruments", "ZEN-C100-J27", multiplier=1e308),
         Explained((_rej(P, "positions", "T1", "P&L is not a finite number"),
                    _rej(P, "positions", "T6", "P&L is not a finite number"),
                    _rej(R, "positions", "T8", "P&L is not a finite number")), frozenset({"T1", "T6", "T8"}))),
    Case("FX rate that overflows", lambda d: d.edit(RUN, "fx_rates", "EUR", rate=1e308),
         Explained((_rej(P, "positions", "T3", "P&L is not a finite number"),), frozenset({"T3"}))),
    Case("denormal spot", lambda d: (d.edit(PRIOR, "underlying_marks", "QRX", spot=5e-324),
                                     d.edit(PRIOR, "option_marks", "QRX-C50-F27", price=0.0)),
         Explained((_rej(P, "underlying_marks", "QRX", "spot is too small to price"),
                    _rej(P, "positions", "T3", "position cannot be priced on the prior date")), frozenset({"T3"}))),
    Case("tenors 0.0 and -0.0", lambda d: (d.append(RUN, "rate_curves", currency="USD", tenor_years=0.0,
                                                    zero_rate=0.04),
                                           d.append(RUN, "rate_curves", currency="USD", tenor_years=-0.0,
                                                    zero_rate=0.05)),
         Explained((_rej(R, "rate_curves", "USD @ 0.0y", "duplicate point"),
                    _rej(R, "rate_curves", "USD", "no curve for currency")), ZEN_TRADES)),
    # ---- suspect but explained
    Case("trade_date after the run date, null, year 1", lambda d: (
        d.edit(RUN, "positions", "T8", trade_date=dt.date(2027, 1, 4)),
        d.edit(RUN, "positions", "T7", trade_date=None),
        d.edit(RUN, "positions", "T1", trade_date=dt.date(1, 1, 1))),
         Explained((_warn(R, "positions", "T8", "trade_date after the run date"),
                    _warn(R, "positions", "T7", "trade_date is null"),
                    _warn(R, "positions", "T1", "trade_date is implausible")),
                   statuses={"T1": "carried", "T7": "new", "T8": "new_unpriced"})),
    Case("stale mark", _stale,
         Explained((_warn(R, "option_marks", "ZEN-P120-M27", "stale mark"),), statuses={"T2": "carried"})),
    Case("expiry-day mark above intrinsic", lambda d: d.edit(RUN, "option_marks", "ZEN-C95-EXP", price=9.5),
         Explained((_warn(R, "option_marks", "ZEN-C95-EXP", "expiry-day mark is not the intrinsic value"),),
                   statuses={"T4": "expired"})),
    Case("vol does not reprice the mark", lambda d: d.edit(RUN, "option_marks", "ZEN-C100-J27", implied_vol=0.35),
         Explained((_warn(R, "option_marks", "ZEN-C100-J27", "implied vol inconsistent with price"),),
                   statuses={"T1": "carried", "T8": "new_unpriced"})),
]


@pytest.fixture(scope="module")
def base(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The mini desk and an archive holding its clean run-date night (the state every case starts from)."""
    root = tmp_path_factory.mktemp("base")
    write_mini_desk(root / "data")
    assert _run(root, ()) == EXIT_OK
    return root


def _run(root: Path, extra: tuple[str, ...], archive: Path | None = None) -> int:
    return main(["run", "--as-of", RUN.isoformat(), "--data", str(root / "data"),
                 "--archive", str(archive or root / "archive.duckdb"), "--no-reports", *extra])


def _digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


@pytest.mark.parametrize("case", CASES, ids=[c.name if isinstance(c, Case) else c.values[0].name for c in CASES])
def test_catalogue(case: Case, base: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """Each bad input either fails the run naming file and field, or is rejected/warned by rule; nothing is lost."""
    shutil.copytree(base / "data", tmp_path / "data")
    shutil.copy(base / "archive.duckdb", tmp_path / "archive.duckdb")
    case.change(Desk(tmp_path / "data"))
    capsys.readouterr()
    before = _digest(tmp_path / "archive.duckdb")
    code = _run(tmp_path, case.args)
    err = capsys.readouterr().err
    if isinstance(case.expect, Fails):
        _check_failure(case.expect, code, err, tmp_path, before, case.args)
    else:
        _check_explained(case.expect, code, tmp_path)


def _check_failure(expect: Fails, code: int, err: str, root: Path, before: str, args: tuple[str, ...]) -> None:
    assert expect.where in err and expect.what in err, err
    assert code == expect.code
    assert _digest(root / "archive.duckdb") == before
    fresh = root / "fresh" / "archive.duckdb"
    assert _run(root, args, fresh) == expect.code
    assert not fresh.exists()


def _archived(root: Path) -> dict[str, pd.DataFrame]:
    with duckdb.connect(str(root / "archive.duckdb"), read_only=True) as con:
        return {t: con.execute(f"SELECT * FROM {t} WHERE as_of = ?", [RUN]).df()  # fixed table names
                for t in ("position_pnl", "input_exceptions", "book_pnl", "runs")}


def _check_explained(expect: Explained, code: int, root: Path) -> None:
    tables = _archived(root)
    ledger = tables["input_exceptions"]
    for day, kind, key, rule, severity in expect.rows:
        file = str(folder_for(root / "data", day) / f"{kind}.parquet")
        hit = ledger[(ledger["file"] == file) & (ledger["key"] == key) & (ledger["rule"] == rule)]
        assert list(hit["severity"]) == [severity] * len(hit) and len(hit) >= 1, (file, key, rule, ledger)
    rejected = assert_conserved(root / "data", tables["position_pnl"], ledger)
    assert rejected == expect.rejected
    archived = tables["position_pnl"].set_index("trade_id")["status"]
    for trade, status in expect.statuses.items():
        assert archived[trade] == status
    assert_counts_add_up(tables)
    assert code == (EXIT_FINDINGS if expect.rejected or (ledger["key"].str.startswith("(null)")).any() else EXIT_OK)


def assert_counts_add_up(tables: dict[str, pd.DataFrame]) -> None:
    """The run record and the book rows agree with position_pnl: in = archived + rejected, statuses sum up."""
    [run] = tables["runs"].to_dict("records")
    books, positions = tables["book_pnl"], tables["position_pnl"]
    positions = positions[positions["status"] != "cash"]  # a book's cash row is no position
    assert run["positions_in"] == run["positions_archived"] + run["positions_rejected"]
    assert run["positions_archived"] == len(positions)
    assert int(books["positions"].sum()) == len(positions)
    assert (books[list(STATUSES)].sum(axis=1) == books["positions"]).all()
    assert int(books["rejected"].sum()) == run["positions_rejected"]
    counts = positions.groupby("book").size()
    assert counts.to_dict() == books.loc[books["positions"] > 0].set_index("book")["positions"].to_dict()


def test_catalogue_is_broad() -> None:
    """The catalogue holds at least 25 cases, each with its own name."""
    names = [c.name if isinstance(c, Case) else c.values[0].name for c in CASES]
    assert len(names) >= 25 and len(set(names)) == len(names)


@pytest.mark.parametrize("prior", ["2026-11-30", "2026-12-01"])
def test_prior_not_before_the_run_date_changes_nothing(prior: str, base: Path, tmp_path: Path,
                                                       capsys: pytest.CaptureFixture[str]) -> None:
    """--prior on or after --as-of stops the run with a message naming the prior date; the archive is untouched."""
    shutil.copytree(base / "data", tmp_path / "data")
    shutil.copy(base / "archive.duckdb", tmp_path / "archive.duckdb")
    before = _digest(tmp_path / "archive.duckdb")
    capsys.readouterr()
    assert _run(tmp_path, ("--prior", prior)) != EXIT_OK
    assert f"prior date {prior} must be before the run date 2026-11-30" in capsys.readouterr().err
    assert _digest(tmp_path / "archive.duckdb") == before
