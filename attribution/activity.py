"""The run date's trade activity, cash flows and official P&L (data contract, version 2).

* Trade activity (``trade_activity.parquet``) prices what changed a position at its execution
  price: a ``new`` activity prices the new trade (over ``positions.trade_price``); an ``increase``,
  ``decrease`` or ``close`` puts quantity x (run-date mark - price) into ``pnl_amendment`` (at the
  mark, flagged, when it has no price); ``correction`` and ``cancel`` restate the prior quantity
  without P&L; an ``exercise`` or ``assignment`` that takes the whole position makes the trade
  ``exercised``, explained like a close to its intrinsic value at the run-date spot; the option is
  then handed over for the underlying with no cash, so its intrinsic value leaves it in
  ``pnl_amendment`` (quantity x intrinsic) and reaches the book once, in the delivered underlying
  priced at the strike by its own ``new`` activity (a partial exercise: the part given up is valued
  against the run-date mark). Every trade is reconciled: prior quantity + activity
  = run-date quantity, else a ``position break`` warning.
* Cash flows (``cash_flows.parquet``) go to ``pnl_cash``: a flow naming a trade of its book to
  that trade's row, any other flow to one row of status ``cash`` per book.
* The official P&L (``official_pnl.parquet``) gives each book with a row ``official_break`` =
  official P&L - ``pnl_total``; a break above the book's ``official_break`` limit is a finding.

Without a file, the night is as in version 1 (two snapshots, no cash, no break).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from attribution.arrays import BoolArray, FloatArray
from attribution.contract import UNPRICED_ACTIVITY, CleanNight
from attribution.exceptions_log import WARNING, ExceptionLog
from attribution.frame_rows import moved_rows
from attribution.group_sums import sums_by_group
from attribution.lifecycle import CARRIED, CLOSED, EXERCISED, NEW, NEW_UNPRICED, Legs
from attribution.market import InstrumentMarket
from attribution.schema import POSITION_PNL
from attribution.valuation import settlement_value

CHANGES = ("new", "increase", "decrease", "close")
EXERCISES = ("exercise", "assignment")
CASH = "cash"
POSITION_BREAK = "position break"  # the ledger rule of a trade whose quantities do not reconcile
OFFICIAL_BREAK = "official P&L break"  # the ledger rule of a break beyond its limit (a finding)
CASH_TRADE_PREFIX = "(cash) "  # trade_id of a book's cash row: this prefix and the book


@dataclass(frozen=True, slots=True)
class LegActivity:
    """The run date's activity summed per leg (one element per leg of :class:`Legs`)."""

    any: BoolArray          # the trade has activity rows
    moved: FloatArray       # sum of every activity quantity (contracts)
    restated: FloatArray    # sum of correction and cancel quantities (contracts)
    fill_value: FloatArray  # sum of quantity x (run-date mark - price) over priced changes (contracts x price)
    exercise_value: FloatArray  # sum of quantity x (run-date mark - intrinsic value) over exercises and assignments
    given_up: FloatArray    # sum of quantity x intrinsic value over exercises and assignments (handed over, no cash)
    at_mark: BoolArray      # a change without a price (valued at the mark)
    priced_new: BoolArray   # a ``new`` activity with a price
    exercised: FloatArray   # sum of exercise and assignment quantities (contracts)


def leg_activity(activity: pd.DataFrame, legs: Legs, market0: InstrumentMarket,
                 market1: InstrumentMarket) -> LegActivity:
    """Sum each leg's activity; a change is valued against the run-date mark, an exercise at intrinsic."""
    n = len(legs)
    row = pd.Index(legs.trade_id).get_indexer(activity["trade_id"].to_numpy(dtype=object))
    act = activity[row >= 0]
    leg = row[row >= 0]
    kind = act["kind"].to_numpy(dtype=object)
    qty = act["quantity"].to_numpy(dtype=float)
    price = act["price"].to_numpy(dtype=float)
    inst1 = legs.inst1[leg]
    mark1 = market1.price[inst1]
    intrinsic = settlement_value(market1.kind[inst1], market1.spot[inst1], market1.strike[inst1], market1.cp[inst1])
    change = np.isin(kind, CHANGES)
    exercise = np.isin(kind, EXERCISES)
    value = np.where(change & ~np.isnan(price), qty * (mark1 - price), 0.0)
    by_exercise = np.where(exercise, qty * (mark1 - intrinsic), 0.0)
    given_up = np.where(exercise, qty * intrinsic, 0.0)

    def total(values: FloatArray) -> FloatArray:
        return np.bincount(leg, weights=values, minlength=n).astype(float)

    def some(mask: BoolArray) -> BoolArray:
        return np.bincount(leg, weights=mask.astype(float), minlength=n) > 0

    return LegActivity(any=some(np.ones(len(leg), dtype=bool)), moved=total(qty),
                       restated=total(np.where(np.isin(kind, UNPRICED_ACTIVITY), qty, 0.0)),
                       fill_value=total(value), exercise_value=total(by_exercise),
                       given_up=total(given_up),
                       at_mark=some(change & np.isnan(price) & (kind != "new")),
                       priced_new=some((kind == "new") & ~np.isnan(price)),
                       exercised=total(np.where(exercise, qty, 0.0)))


def leg_quantities(legs: Legs, prior: CleanNight, run: CleanNight) -> tuple[FloatArray, FloatArray]:
    """Each leg's quantity in the prior and the run date's positions file (0 where it has no row)."""
    q0 = np.where(legs.row0 >= 0, prior.positions["quantity"].to_numpy(float)[np.maximum(legs.row0, 0)]
                  if len(prior.positions) else 0.0, 0.0)
    q1 = np.where(legs.row1 >= 0, run.positions["quantity"].to_numpy(float)[np.maximum(legs.row1, 0)]
                  if len(run.positions) else 0.0, 0.0)
    return q0, q1


def official_unknown(official: pd.Series, books: pd.DataFrame, part: frozenset[str] | None, path: str,
                     log: ExceptionLog) -> None:
    """Warn official rows of books with nothing archived tonight (``part``: the books of a split night)."""
    mine = official.index if part is None else official.index[official.index.isin(part)]
    missing = mine[~mine.isin(books["book"])]
    if len(missing):
        log.add(path, missing.to_numpy(dtype=object), "official P&L of a book without positions",
                ("official P&L " + official[missing].map("{:,.2f}".format) + " of a book with no position or cash "
                 "tonight").to_numpy(dtype=object), WARNING)


def with_statuses(legs: Legs, act: LegActivity, qty1: FloatArray) -> Legs:
    """Legs whose exercise or assignment took the whole position become ``exercised``; a new trade
    priced by its ``new`` activity is ``new`` even without a trade_price."""
    whole = (act.exercised != 0) & (qty1 == 0) & np.isin(legs.status, [CARRIED, CLOSED])
    priced = act.priced_new & (legs.status == NEW_UNPRICED)
    if not (whole.any() or priced.any()):
        return legs
    status = np.where(whole, EXERCISED, np.where(priced, NEW, legs.status)).astype(object)
    return Legs(*(status if f == "status" else getattr(legs, f) for f in Legs.__dataclass_fields__))


def reconcile(legs: Legs, qty0: FloatArray, qty1: FloatArray, act: LegActivity, path: str,
              log: ExceptionLog) -> BoolArray:
    """Prior quantity + activity must equal the run-date quantity for every trade; breaks are warned."""
    live = np.isin(legs.status, [CARRIED, CLOSED, EXERCISED, NEW, NEW_UNPRICED])
    expected = qty0 + act.moved
    scale = np.maximum(1.0, np.maximum(np.abs(qty0), np.abs(qty1)))
    broken = live & (np.abs(expected - qty1) > 1e-9 * scale)
    if broken.any():
        detail = pd.Series([f"prior quantity {a:g} + activity {m:g} = {a + m:g}, run-date quantity {b:g}"
                            for a, m, b in zip(qty0[broken], act.moved[broken], qty1[broken], strict=True)],
                           dtype=object)
        log.add(path, legs.trade_id[broken], POSITION_BREAK, detail.to_numpy(), WARNING)
    return broken


def unknown_trades(frame: pd.DataFrame, known: pd.Index, path: str, key: str, rule: str,
                   log: ExceptionLog) -> None:
    """Warn rows of ``frame`` whose trade_id is in neither date's positions (their key is ``key``)."""
    named = frame["trade_id"].notna().to_numpy()
    unknown = named & ~frame["trade_id"].isin(known).to_numpy()
    if unknown.any():
        log.add(path, frame.loc[unknown, key].to_numpy(dtype=object), rule,
                ("trade_id " + frame.loc[unknown, "trade_id"].astype(str) + " is in neither date's positions")
                .to_numpy(dtype=object), WARNING)


def cash_rows(positions: pd.DataFrame, run: CleanNight, reporting_currency: str,
              log: ExceptionLog, books: frozenset[str] | None) -> pd.DataFrame:
    """``positions`` with the night's cash flows in ``pnl_cash`` (and ``pnl_total``), plus one ``cash`` row
    per book for flows that name no trade of that book. ``books``: only flows of these books (a part of
    a night split by book), None for all. ``positions`` is consumed (its columns are updated in place and moved
    into the frame returned, :func:`~attribution.frame_rows.moved_rows`): pass the night's only reference."""
    flows = run.cash_flows
    if books is not None:
        flows = flows[flows["book"].isin(books)]
    if flows.empty:
        return positions
    path = run.raw.path("cash_flows.parquet")
    fx = run.fx.reindex(flows["currency"]).to_numpy(dtype=float)
    no_fx = np.isnan(fx)
    if no_fx.any():
        log.add(path, flows.loc[no_fx, "flow_id"].to_numpy(dtype=object), "no FX rate",
                ("no rate for " + flows.loc[no_fx, "currency"].astype(str) + " in "
                 + run.raw.path("fx_rates.parquet")).to_numpy(dtype=object))
    flows = flows[~no_fx].assign(amount_reporting=flows["amount"].to_numpy(float)[~no_fx] * fx[~no_fx])
    row = _trade_rows(positions, flows)
    on_trade = (row >= 0) & flows["trade_id"].notna().to_numpy()
    cash = np.bincount(row[on_trade], weights=flows["amount_reporting"].to_numpy()[on_trade],
                       minlength=len(positions))
    positions["pnl_cash"] = positions["pnl_cash"].to_numpy(float) + cash  # in place: the night is not held twice
    positions["pnl_total"] = positions["pnl_total"].to_numpy(float) + cash
    named_elsewhere = flows["trade_id"].notna().to_numpy() & ~on_trade
    if named_elsewhere.any():
        log.add(path, flows.loc[named_elsewhere, "flow_id"].to_numpy(dtype=object), "cash flow of no trade of its book",
                ("trade_id " + flows.loc[named_elsewhere, "trade_id"].astype(str) + " is not a position of book "
                 + flows.loc[named_elsewhere, "book"].astype(str) + " tonight; counted on the book's cash row")
                .to_numpy(dtype=object), WARNING)
    book_flows = flows[~on_trade]
    if book_flows.empty:
        return positions
    code, books = pd.factorize(book_flows["book"].to_numpy(dtype=object), sort=True)
    sums, _ = sums_by_group([book_flows["amount_reporting"].to_numpy(dtype=float)], code, len(books))
    per_book = pd.Series(sums[0], index=pd.Index(books, dtype=object, name="book"), name="amount_reporting")
    return moved_rows(positions, extra=_book_cash_rows(per_book, positions, reporting_currency))


def _trade_rows(positions: pd.DataFrame, flows: pd.DataFrame) -> np.ndarray:
    """The position row of each flow's (book, trade_id), -1 where its book holds no such trade tonight.

    Looked up by trade_id (a night's positions name each trade once), then the book compared: no text key
    is built for every position."""
    trade_ids = positions["trade_id"].to_numpy(dtype=object)
    if not len(trade_ids):
        return np.full(len(flows), -1, dtype=np.intp)
    at = pd.Index(trade_ids, dtype=object, copy=False).get_indexer(
        pd.Index(flows["trade_id"].to_numpy(dtype=object), dtype=object))
    same_book = positions["book"].to_numpy(dtype=object)[np.maximum(at, 0)] == flows["book"].to_numpy(dtype=object)
    return np.where((at >= 0) & same_book, at, -1)


def _book_cash_rows(per_book: pd.Series, positions: pd.DataFrame, reporting_currency: str) -> pd.DataFrame:
    n = len(per_book)
    frame = pd.DataFrame({name: pd.Series([None] * n, dtype=object) for name, _ in POSITION_PNL})
    for name, sql in POSITION_PNL:
        if sql == "DOUBLE":
            frame[name] = 0.0
    for name in (c for c in positions.columns if c.startswith("reval_")):
        frame[name] = np.nan
    for name in ("strike", "fx_rate", "multiplier", "spot_prior", "spot_run", "vol_prior", "vol_run", "tau_prior_years",
                 "tau_run_years", "rate_prior", "rate_run", "div_yield_prior", "div_yield_run", "price_prior",
                 "price_run"):
        frame[name] = np.nan
    as_of = positions["as_of"].iloc[0] if len(positions) else pd.NaT
    prior = positions["prior_as_of"].iloc[0] if len(positions) else pd.NaT
    frame["as_of"], frame["prior_as_of"] = as_of, prior
    frame["book"] = per_book.index.to_numpy(dtype=object)
    frame["trade_id"] = (CASH_TRADE_PREFIX + per_book.index.astype(str)).to_numpy(dtype=object)
    frame["currency"] = reporting_currency
    frame["status"] = CASH
    frame["flags"] = ""
    frame["expiry"] = pd.NaT
    frame["limit_state"] = "within"
    frame["pnl_cash"] = frame["pnl_total"] = per_book.to_numpy(float)
    return frame[positions.columns]


def official_breaks(books: pd.DataFrame, official: pd.Series, limits: list[float], path: str,
                    log: ExceptionLog) -> tuple[pd.DataFrame, int]:
    """``official_pnl`` and ``official_break`` of the books with an official row, and how many breaks
    exceed their book's limit (each warned ``official P&L break``)."""
    if official.empty:
        return books, 0
    pnl = official.reindex(books["book"]).to_numpy(dtype=float)
    brk = pnl - books["pnl_total"].to_numpy(float)
    over = np.abs(np.nan_to_num(brk)) > np.asarray(limits, dtype=float)
    if over.any():
        detail = pd.Series([f"official {o:,.2f} - explained total {t:,.2f} = {b:,.2f}, beyond {lim:,.2f}"
                            for o, t, b, lim in zip(pnl[over], books["pnl_total"].to_numpy(float)[over], brk[over],
                                                    np.asarray(limits, dtype=float)[over], strict=True)], dtype=object)
        log.add(path, books["book"].to_numpy(dtype=object)[over], OFFICIAL_BREAK, detail.to_numpy(), WARNING)
    return books.assign(official_pnl=pnl, official_break=brk), int(over.sum())


__all__ = ["CASH", "CASH_TRADE_PREFIX", "OFFICIAL_BREAK", "POSITION_BREAK", "LegActivity", "cash_rows", "leg_activity",
           "leg_quantities", "official_breaks", "official_unknown", "reconcile",
           "unknown_trades", "with_statuses"]
