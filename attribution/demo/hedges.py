"""The demo desk's delta hedges and its run-date events (data contract, version 2).

Each book holds, for every underlying it trades, one hedge trade that leaves the book roughly
delta-neutral at each close: shares or currency units (kind ``underlying``) for stocks and FX pairs,
an index future (kind ``future``, settling after the demo's last date) for indexes. Every night the
hedge is rebalanced to minus the options' delta, rounded to whole units or contracts, by an
``increase`` or ``decrease`` activity at the hedge's mark plus a small cost, with a commission in
``cash_flows.parquet``. The options' own changes are written as activity too: new trades at their
trade price, quantity changes and closes at the clean mark less a spread against the desk. The
futures' settlement prices carry a small basis to the cost-of-carry price S e^((r - q) tau).

All arrays; the only loops run over nights, books and underlyings (a few dozen), never over trades.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass

import numpy as np
import pyarrow as pa
from numpy.typing import NDArray

from attribution.arrays import FloatArray
from attribution.demo.desk import DeskSpec
from attribution.demo.market import ListedInstruments, MarketPaths, zero_rate
from attribution.demo.nights import Night, Trades

HEDGE_COST = 0.0002        # execution cost of a hedge rebalance, share of its price, against the desk
COMMISSION = 0.00005       # commission per rebalance, share of its notional
OPTION_SPREAD = 0.01       # option changes and closes at the clean mark less up to this share, against the desk
BASIS_SD = 0.0003          # daily noise of a future's settlement price around S e^((r - q) tau)


@dataclass(frozen=True, slots=True)
class HedgeBook:
    """The hedge instruments and, per night, the hedge positions and the run-date event tables."""

    instruments: dict[str, pa.Array]          # extra rows of instruments.parquet (every night)
    positions: list[dict[str, pa.Array]]      # extra rows of positions.parquet, per night
    future_marks: list[dict[str, pa.Array]]   # future_marks.parquet, per night
    activity: list[dict[str, pa.Array] | None]  # trade_activity.parquet, per night (None on the first)
    cash_flows: list[dict[str, pa.Array] | None]  # cash_flows.parquet, per night (None on the first)
    rebalances: int
    multipliers: list[FloatArray]             # the hedge instruments' multiplier per night (x a split's ratio)


def _instrument_terms(desk: DeskSpec, market: MarketPaths) -> tuple[NDArray[np.str_], NDArray[np.bool_], np.datetime64,
                                                                   FloatArray]:
    """Hedge instrument ids, which are futures, the futures' settlement date and the hedges' multipliers."""
    last = market.dates[-1].astype("datetime64[D]").item()
    month = ((last.month + 2) // 3) * 3 + 3  # a quarter after the last date's quarter
    year = last.year + (month - 1) // 12
    settle = np.datetime64(dt.date(year, (month - 1) % 12 + 1, 15), "D")
    is_future = np.array([u.kind == "index" for u in desk.underlyings])
    code = np.array([u.name.replace("/", "") for u in desk.underlyings])
    ids = np.where(is_future, np.char.add(code, "-FUT-" + str(settle).replace("-", "")), np.char.add(code, "-SPOT"))
    multiplier = np.where(is_future, desk.param("multiplier"), 1.0)
    return ids, is_future, settle, multiplier


def _future_prices(desk: DeskSpec, market: MarketPaths, d: int, settle: np.datetime64,
                   rng: np.random.Generator) -> tuple[FloatArray, FloatArray]:
    """Settlement price and the hedge delta e^((r - q) tau) of each underlying's future tonight."""
    tau = np.full(len(desk.underlyings), (settle - market.dates[d]).astype(float) / 365.0)
    codes = [c.code for c in desk.currencies]
    rate = np.array([zero_rate(market.zero_rates[d, codes.index(u.currency)], market.tenors_years, tau[:1])[0]
                     for u in desk.underlyings])
    carry = np.exp((rate - market.dividend_yield[d]) * tau)
    return market.spot[d] * carry * (1.0 + rng.normal(0.0, BASIS_SD, carry.size)), carry


def _option_deltas(desk: DeskSpec, store: ListedInstruments, trades: Trades, night: Night,
                   split: FloatArray) -> FloatArray:
    """Delta in units of underlying of every book and underlying (books x underlyings) at tonight's close
    (``split``: per listed instrument, the ratio its multiplier is multiplied by tonight)."""
    inst = trades.instrument[night.rows]
    delta = night.delta[np.searchsorted(night.live, inst)]
    und = store.und[inst]
    units = night.quantity * desk.param("multiplier")[und] * split[inst] * delta
    n_und = len(desk.underlyings)
    cell = trades.book[night.rows] * n_und + und
    return np.bincount(cell, weights=units, minlength=len(desk.books) * n_und).reshape(len(desk.books), n_und)


def _option_activity(desk: DeskSpec, store: ListedInstruments, trades: Trades, before: Night, night: Night,
                     day: np.datetime64, trade_ids: NDArray[np.str_], rng: np.random.Generator
                     ) -> tuple[list[NDArray[np.str_]], list[NDArray[np.str_]], list[FloatArray], list[FloatArray]]:
    """New trades at their trade price; quantity changes and closes at the clean mark less a spread."""
    q0 = dict(zip(before.rows.tolist(), before.quantity.tolist(), strict=True))
    rows1 = night.rows
    prior_q = np.array([q0.get(r, np.nan) for r in rows1.tolist()])
    new = np.isnan(prior_q)
    changed = ~new & (prior_q != night.quantity)
    gone = before.rows[~np.isin(before.rows, rows1)]
    gone = gone[store.expiry[trades.instrument[gone]] >= day]  # expiries are no activity
    gone_q = before.quantity[np.isin(before.rows, gone)]
    clean = night.clean_price

    def mark(rows: NDArray[np.int64]) -> FloatArray:
        return clean[np.searchsorted(night.live, trades.instrument[rows])]

    d_changed = night.quantity[changed] - prior_q[changed]
    spread = rng.uniform(0.0, OPTION_SPREAD, changed.sum() + gone.size)
    trade = [trade_ids[rows1[new]], trade_ids[rows1[changed]], trade_ids[gone]]
    kind = [np.full(new.sum(), "new"), np.where(np.abs(night.quantity[changed]) > np.abs(prior_q[changed]),
                                                "increase", "decrease"), np.full(gone.size, "close")]
    quantity = [night.quantity[new], d_changed, -gone_q]
    price = [trades.trade_price[rows1[new]],
             mark(rows1[changed]) * (1.0 + np.sign(d_changed) * spread[: changed.sum()]),
             mark(gone) * (1.0 + np.sign(-gone_q) * spread[changed.sum():])]
    return trade, kind, quantity, price


def hedge_book(desk: DeskSpec, market: MarketPaths, store: ListedInstruments, trades: Trades, nights: list[Night],
               trade_ids: NDArray[np.str_], rng: np.random.Generator, splits: list[FloatArray],
               hedge_splits: list[FloatArray]) -> HedgeBook:
    """Hedges of every book and underlying it trades, rebalanced nightly, and the run-date event tables.

    ``splits``: per night, the split ratio of each listed instrument; ``hedge_splits``: per night, each
    underlying's (a share hedge's multiplier follows its stock's split, as the options' do)."""
    ids, is_future, settle, multiplier = _instrument_terms(desk, market)
    names = [u.name for u in desk.underlyings]
    n_und = len(names)
    traded = np.zeros((len(desk.books), n_und), bool)
    for b, book in enumerate(desk.books):
        traded[b, [names.index(x) for x in book.underlyings]] = True
    cells = np.argwhere(traded)
    hedge_ids = np.array([f"{desk.trade_id_prefix}H{b:02d}{u:03d}" for b, u in cells])
    book_names = np.array([b.name for b in desk.books])[cells[:, 0]]
    currency = np.array([u.currency for u in desk.underlyings])
    instruments = {
        "instrument_id": pa.array(ids, pa.string()), "underlying": pa.array(names, pa.string()),
        "option_type": pa.nulls(n_und, pa.string()), "exercise": pa.nulls(n_und, pa.string()),
        "strike": pa.nulls(n_und, pa.float64()),
        "expiry": pa.array([settle.item() if f else None for f in is_future], pa.date32()),
        "multiplier": pa.array(multiplier, pa.float64()), "currency": pa.array(currency, pa.string()),
        "kind": pa.array(np.where(is_future, "future", "underlying"), pa.string())}
    positions, marks, activity, cash, multipliers = [], [], [], [], []
    held = np.zeros(len(cells))
    rebalances = 0
    for d, night in enumerate(nights):
        fut_price, carry = _future_prices(desk, market, d, settle, rng)
        hedge_price = np.where(is_future, fut_price, market.spot[d])
        night_multiplier = multiplier * hedge_splits[d]
        multipliers.append(night_multiplier)
        hedge_delta = np.where(is_future, carry, 1.0) * night_multiplier
        target = -np.round(_option_deltas(desk, store, trades, night, splits[d])[cells[:, 0], cells[:, 1]]
                           / hedge_delta[cells[:, 1]])
        target = target + 0.0  # no negative zero in the files
        positions.append({"trade_id": pa.array(hedge_ids, pa.string()), "book": pa.array(book_names, pa.string()),
                          "instrument_id": pa.array(ids[cells[:, 1]], pa.string()), "quantity": pa.array(target),
                          "trade_date": pa.array(np.full(len(cells), market.dates[0]), pa.date32()),
                          "trade_price": pa.nulls(len(cells), pa.float64())})
        marks.append({"instrument_id": pa.array(ids[is_future], pa.string()),
                      "price": pa.array(fut_price[is_future], pa.float64())})
        if d == 0:
            activity.append(None)
            cash.append(None)
            held = target
            continue
        move = target - held
        hit = move != 0
        rebalances += int(hit.sum())
        price = hedge_price[cells[:, 1]] * (1.0 + np.sign(move) * HEDGE_COST)
        trade, kind, quantity, prices = _option_activity(desk, store, trades, nights[d - 1], night,
                                                         market.dates[d], trade_ids, rng)
        trade.append(hedge_ids[hit])
        kind.append(np.where(np.abs(target[hit]) > np.abs(held[hit]), "increase", "decrease"))
        quantity.append(move[hit])
        prices.append(price[hit])
        all_trades = np.concatenate(trade)
        day = str(market.dates[d]).replace("-", "")
        activity.append({"activity_id": pa.array(np.char.add(f"A{day}-", np.arange(all_trades.size).astype(str)),
                                                 pa.string()),
                         "trade_id": pa.array(all_trades, pa.string()),
                         "kind": pa.array(np.concatenate(kind), pa.string()),
                         "quantity": pa.array(np.concatenate(quantity), pa.float64()),
                         "price": pa.array(np.concatenate(prices), pa.float64(),
                                           mask=np.isnan(np.concatenate(prices)))})
        fee = -np.abs(move[hit]) * night_multiplier[cells[hit, 1]] * price[hit] * COMMISSION
        cash.append({"flow_id": pa.array(np.char.add(f"C{day}-", np.arange(hit.sum()).astype(str)), pa.string()),
                     "book": pa.array(book_names[hit], pa.string()), "trade_id": pa.array(hedge_ids[hit], pa.string()),
                     "currency": pa.array(currency[cells[hit, 1]], pa.string()), "amount": pa.array(fee, pa.float64()),
                     "kind": pa.array(np.full(hit.sum(), "commission"), pa.string())})
        held = target
    return HedgeBook(instruments, positions, marks, activity, cash, rebalances, multipliers)
