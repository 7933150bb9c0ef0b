"""The demo desk's delta hedges and its run-date events (data contract, version 2).

Each book holds, for every underlying it trades, one hedge trade that leaves the book roughly
delta-neutral at each close: shares (kind ``underlying``) for stocks, an FX forward (kind ``forward``,
struck at the first date's forward rate, delivered after the demo's last date) for FX pairs, an index
future (kind ``future``, settling after the demo's last date) for indexes. Every night the hedge is
rebalanced to minus the options' delta, rounded to whole units or contracts, by an ``increase`` or
``decrease`` activity at the hedge's value plus a small cost (a share of the spot, or of the future's
price), with a commission in ``cash_flows.parquet``. The options' own changes are written as activity
too: new trades at their trade price, quantity changes and closes at the clean mark less a spread
against the desk, the year's early exercise (:mod:`attribution.demo.exercise`) with the shares it
delivers. The futures' settlement prices carry a small basis to the cost-of-carry price
S e^((r - q) tau); a forward is worth S e^(-q tau) - K e^(-r tau) (q: the pair's foreign rate).

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
from attribution.demo.exercise import Exercise
from attribution.demo.market import ListedInstruments, MarketPaths, zero_rate
from attribution.demo.nights import Night, Trades
from attribution.demo.official import Holdings

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
    holdings: list[Holdings]                  # the hedges (and delivered shares) as the desk values them, per night
    delivered_trade: str                      # trade id of the shares an early exercise delivered ("" without one)


def _instrument_terms(desk: DeskSpec, market: MarketPaths) -> tuple[NDArray[np.str_], NDArray[np.str_],
                                                                   np.datetime64, FloatArray]:
    """Hedge instrument ids, their kinds (per underlying), the futures' and forwards' date and the multipliers."""
    last = market.dates[-1].astype("datetime64[D]").item()
    month = ((last.month + 2) // 3) * 3 + 3  # a quarter after the last date's quarter
    year = last.year + (month - 1) // 12
    settle = np.datetime64(dt.date(year, (month - 1) % 12 + 1, 15), "D")
    kinds = np.array([{"index": "future", "fx": "forward"}.get(u.kind, "underlying") for u in desk.underlyings])
    code = np.array([u.name.replace("/", "") for u in desk.underlyings])
    date = str(settle).replace("-", "")
    ids = np.where(kinds == "future", np.char.add(code, "-FUT-" + date),
                   np.where(kinds == "forward", np.char.add(code, "-FWD-" + date), np.char.add(code, "-SPOT")))
    multiplier = np.where(kinds == "future", desk.param("multiplier"), 1.0)
    return ids, kinds, settle, multiplier


def _carry(desk: DeskSpec, market: MarketPaths, d: int, settle: np.datetime64) -> tuple[FloatArray, FloatArray,
                                                                                       FloatArray]:
    """Per underlying, to the hedges' date: the years left, the currency's zero rate and the yield (foreign rate)."""
    tau = np.full(len(desk.underlyings), (settle - market.dates[d]).astype(float) / 365.0)
    codes = [c.code for c in desk.currencies]
    rate = np.array([zero_rate(market.zero_rates[d, codes.index(u.currency)], market.tenors_years, tau[:1])[0]
                     for u in desk.underlyings])
    return tau, rate, market.dividend_yield[d]


def forward_strikes(desk: DeskSpec, market: MarketPaths, settle: np.datetime64) -> FloatArray:
    """The delivery price agreed on the first date: that date's forward rate S e^((r - q) tau), to six digits."""
    tau, rate, div = _carry(desk, market, 0, settle)
    forward = market.spot[0] * np.exp((rate - div) * tau)
    digits = 5 - np.floor(np.log10(forward)).astype(int)
    return np.array([round(float(f), int(k)) for f, k in zip(forward, digits, strict=True)])


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
                     day: np.datetime64, trade_ids: NDArray[np.str_], rng: np.random.Generator,
                     exercised_row: int = -1
                     ) -> tuple[list[NDArray[np.str_]], list[NDArray[np.str_]], list[FloatArray], list[FloatArray]]:
    """New trades at their trade price; quantity changes and closes at the clean mark less a spread; the trade
    ``exercised_row`` (if it is gone tonight) exercised or assigned whole, without a price."""
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
    exercised = gone == exercised_row
    kind[2] = np.where(exercised, np.where(gone_q > 0, "exercise", "assignment"), kind[2])
    price[2] = np.where(exercised, np.nan, price[2])
    return trade, kind, quantity, price


def _delivered(exercise: Exercise | None, d: int, hedge_value: FloatArray) -> tuple[int, float]:
    """(-1, 0) or, on the exercise night and the next, the underlying and the delivered shares' price that night."""
    if exercise is None or d not in (exercise.night, exercise.night + 1):
        return -1, 0.0
    return exercise.und, float(hedge_value[exercise.und] if d > exercise.night else exercise.strike)


def hedge_book(desk: DeskSpec, market: MarketPaths, store: ListedInstruments, trades: Trades, nights: list[Night],
               trade_ids: NDArray[np.str_], rng: np.random.Generator, splits: list[FloatArray],
               hedge_splits: list[FloatArray], exercise: Exercise | None = None) -> HedgeBook:
    """Hedges of every book and underlying it trades, rebalanced nightly, and the run-date event tables.

    ``splits``: per night, the split ratio of each listed instrument; ``hedge_splits``: per night, each
    underlying's (a share hedge's multiplier follows its stock's split, as the options' do); ``exercise``: the
    year's early exercise, whose shares are delivered on its night (a new trade at the strike) and sold or
    bought back at the next night's spot."""
    ids, kinds, settle, multiplier = _instrument_terms(desk, market)
    is_future, is_forward = kinds == "future", kinds == "forward"
    strikes = np.where(is_forward, forward_strikes(desk, market, settle), np.nan)
    names = [u.name for u in desk.underlyings]
    n_und = len(names)
    traded = np.zeros((len(desk.books), n_und), bool)
    for b, book in enumerate(desk.books):
        traded[b, [names.index(x) for x in book.underlyings]] = True
    cells = np.argwhere(traded)
    hedge_ids = np.array([f"{desk.trade_id_prefix}H{b:02d}{u:03d}" for b, u in cells])
    delivered_id = f"{desk.trade_id_prefix}EX-0001" if exercise is not None else ""
    book_names = np.array([b.name for b in desk.books])[cells[:, 0]]
    currency = np.array([u.currency for u in desk.underlyings])
    codes = [c.code for c in desk.currencies]
    ccy = np.array([codes.index(c) for c in currency])
    instruments = {
        "instrument_id": pa.array(ids, pa.string()), "underlying": pa.array(names, pa.string()),
        "option_type": pa.nulls(n_und, pa.string()), "exercise": pa.nulls(n_und, pa.string()),
        "strike": pa.array(strikes, pa.float64(), mask=~is_forward),
        "expiry": pa.array([settle.item() if k != "underlying" else None for k in kinds], pa.date32()),
        "multiplier": pa.array(multiplier, pa.float64()), "currency": pa.array(currency, pa.string()),
        "kind": pa.array(kinds, pa.string())}
    positions, marks, activity, cash, multipliers, holdings = [], [], [], [], [], []
    held = np.zeros(len(cells))
    rebalances = 0
    for d, night in enumerate(nights):
        tau, rate, div = _carry(desk, market, d, settle)
        carry = np.exp((rate - div) * tau)
        fut_price = market.spot[d] * carry * (1.0 + rng.normal(0.0, BASIS_SD, carry.size))
        forward_value = market.spot[d] * np.exp(-div * tau) - np.nan_to_num(strikes) * np.exp(-rate * tau)
        hedge_value = np.where(is_future, fut_price, np.where(is_forward, forward_value, market.spot[d]))
        reference = np.where(is_future, fut_price, market.spot[d])  # what costs and commissions are a share of
        night_multiplier = multiplier * hedge_splits[d]
        multipliers.append(night_multiplier)
        hedge_delta = np.where(is_future, carry, np.where(is_forward, np.exp(-div * tau), 1.0)) * night_multiplier
        target = -np.round(_option_deltas(desk, store, trades, night, splits[d])[cells[:, 0], cells[:, 1]]
                           / hedge_delta[cells[:, 1]])
        target = target + 0.0  # no negative zero in the files
        und, price_delivered = _delivered(exercise, d, hedge_value)
        rows = {"trade_id": hedge_ids, "book": book_names, "instrument_id": ids[cells[:, 1]], "quantity": target}
        if exercise is not None and d == exercise.night:  # the delivered shares, held tonight only
            rows = {"trade_id": np.append(hedge_ids, delivered_id),
                    "book": np.append(book_names, desk.books[exercise.book].name),
                    "instrument_id": np.append(ids[cells[:, 1]], ids[und]),
                    "quantity": np.append(target, exercise.shares / night_multiplier[und])}
        n_rows = rows["trade_id"].size
        trade_date = np.full(n_rows, market.dates[0])
        trade_date[len(cells):] = market.dates[d]
        trade_price = np.full(n_rows, np.nan)
        trade_price[len(cells):] = price_delivered
        positions.append({"trade_id": pa.array(rows["trade_id"], pa.string()),
                          "book": pa.array(rows["book"], pa.string()),
                          "instrument_id": pa.array(rows["instrument_id"], pa.string()),
                          "quantity": pa.array(rows["quantity"]), "trade_date": pa.array(trade_date, pa.date32()),
                          "trade_price": pa.array(trade_price, pa.float64(), mask=np.isnan(trade_price))})
        u_rows = np.append(cells[:, 1], und)[:n_rows]
        book_rows = np.append(cells[:, 0], exercise.book if exercise else 0)[:n_rows]
        holdings.append(Holdings(trade=rows["trade_id"], key=trade_ids.size + np.arange(n_rows), book=book_rows,
                                 und=u_rows, ccy=ccy[u_rows], quantity=rows["quantity"],
                                 multiplier=night_multiplier[u_rows], value=hedge_value[u_rows],
                                 future=is_future[u_rows], share=kinds[u_rows] == "underlying"))
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
        cost = np.sign(move) * HEDGE_COST * reference[cells[:, 1]]
        price = hedge_value[cells[:, 1]] + cost
        trade, kind, quantity, prices = _option_activity(desk, store, trades, nights[d - 1], night, market.dates[d],
                                                         trade_ids, rng, exercise.row if exercise else -1)
        trade.append(hedge_ids[hit])
        kind.append(np.where(np.abs(target[hit]) > np.abs(held[hit]), "increase", "decrease"))
        quantity.append(move[hit])
        prices.append(price[hit])
        if exercise is not None and d in (exercise.night, exercise.night + 1):
            opening = d == exercise.night
            units = exercise.shares / night_multiplier[und]
            trade.append(np.array([delivered_id]))
            kind.append(np.array(["new" if opening else "close"]))
            quantity.append(np.array([units if opening else -units]))
            prices.append(np.array([price_delivered if opening else
                                    price_delivered * (1.0 - np.sign(units) * HEDGE_COST)]))
        all_trades = np.concatenate(trade)
        day = str(market.dates[d]).replace("-", "")
        activity.append({"activity_id": pa.array(np.char.add(f"A{day}-", np.arange(all_trades.size).astype(str)),
                                                 pa.string()),
                         "trade_id": pa.array(all_trades, pa.string()),
                         "kind": pa.array(np.concatenate(kind), pa.string()),
                         "quantity": pa.array(np.concatenate(quantity), pa.float64()),
                         "price": pa.array(np.concatenate(prices), pa.float64(),
                                           mask=np.isnan(np.concatenate(prices)))})
        fee = -np.abs(move[hit]) * night_multiplier[cells[hit, 1]] * reference[cells[hit, 1]] * COMMISSION
        cash.append({"flow_id": pa.array(np.char.add(f"C{day}-", np.arange(hit.sum()).astype(str)), pa.string()),
                     "book": pa.array(book_names[hit], pa.string()), "trade_id": pa.array(hedge_ids[hit], pa.string()),
                     "currency": pa.array(currency[cells[hit, 1]], pa.string()), "amount": pa.array(fee, pa.float64()),
                     "kind": pa.array(np.full(hit.sum(), "commission"), pa.string())})
        held = target
    return HedgeBook(instruments, positions, marks, activity, cash, rebalances, multipliers, holdings, delivered_id)
