"""The demo desk's own P&L per book and night (``official_pnl.parquet``), from its books of record.

The desk does not run the job: it values its own positions. Its P&L of a night, per book, is the value
of what it holds at the run date's close less the value at the prior close (each in the reporting
currency at its own date's FX rate), less what it paid for what it bought (activity quantity x
multiplier x price, at the run date's FX), plus what it sold, what expired and settled, the dividends
its shares earned, and its fees; a future is settled in cash every night, so only its price move counts
(at the run date's FX). Options are valued at the desk's own close; hedges at the spot, at a forward's
value S e^(-q tau) - K e^(-r tau), or at the future's settlement price; a trade booked without a price
is valued at the close on its first night (no day-one P&L), an exercised option is given up for the
shares it delivers.

Its figure then differs from the job's total only as a real desk's does, by its rounding policy: its ledger
books each commission to the whole unit of its currency, and it reports the P&L to the whole unit of the
reporting currency. The planted breaks (:func:`late_booking`; a fat-finger mark the desk's books do not
carry) are the rest.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pyarrow as pa
from numpy.typing import NDArray

from attribution.arrays import BoolArray, FloatArray, IntArray


@dataclass(frozen=True, slots=True)
class Holdings:
    """Positions held at one close, as the desk values them (one element per trade)."""

    trade: NDArray[np.str_]
    key: IntArray            # the trade as an integer (see :func:`keys_of`)
    book: IntArray
    und: IntArray
    ccy: IntArray            # currency (index into the desk's currencies)
    quantity: FloatArray     # contracts
    multiplier: FloatArray   # units of underlying per contract that night
    value: FloatArray        # per unit of underlying, in its currency
    future: BoolArray        # settled in cash every night
    share: BoolArray         # a holding of the underlying itself (earns its dividends)


def join(parts: list[Holdings]) -> Holdings:
    """One :class:`Holdings` of several."""
    return Holdings(*(np.concatenate([getattr(p, f) for p in parts]) for f in Holdings.__slots__))


@dataclass(frozen=True, slots=True)
class DeskEvents:
    """What else moves the desk's P&L on each night (index: night; None on the first)."""

    activity: list[dict[str, pa.Array] | None]      # trade_activity columns
    cash: list[dict[str, pa.Array] | None]          # cash_flows columns
    dividend_und: IntArray                          # every dividend: underlying, ex-date, amount per unit
    dividend_ex: NDArray[np.datetime64]
    dividend_amount: FloatArray


def _column(table: dict[str, pa.Array], name: str) -> np.ndarray:
    return np.asarray(table[name].to_numpy(zero_copy_only=False))


def keys_of(trades: np.ndarray, key_of: dict[str, int]) -> IntArray:
    """Integer keys of trade ids (a few hundred a night: a dict look-up each)."""
    return np.fromiter((key_of[t] for t in trades.tolist()), dtype=np.int64, count=len(trades))


def _night(h0: Holdings, h1: Holdings, fx0: FloatArray, fx1: FloatArray, ratio: FloatArray,
           activity: dict[str, pa.Array] | None, key_of: dict[str, int], n_books: int) -> FloatArray:
    """Per book: run-date value - prior value - purchases + sales and settlements (no cash flows or dividends)."""
    def total(books: IntArray, amounts: FloatArray) -> FloatArray:
        return np.bincount(books, weights=amounts, minlength=n_books)

    value1 = h1.quantity * h1.multiplier * h1.value * fx1[h1.ccy]
    value0 = h0.quantity * h0.multiplier * h0.value * np.where(h0.future, fx1[h0.ccy], fx0[h0.ccy])
    pnl = total(h1.book, value1) - total(h0.book, value0)
    keys, first = np.unique(np.concatenate([h1.key, h0.key]), return_index=True)  # the run date's row first
    book = np.concatenate([h1.book, h0.book])[first]
    multiplier = np.concatenate([h1.multiplier, h0.multiplier * ratio[h0.und]])[first]
    value = np.concatenate([h1.value, np.full(h0.key.size, np.nan)])[first]
    rate = np.concatenate([fx1[h1.ccy], fx1[h0.ccy]])[first]
    moved = np.zeros(keys.size, dtype=bool)
    if activity is not None:
        wanted = keys_of(_column(activity, "trade_id"), key_of)
        at = np.minimum(np.searchsorted(keys, wanted), keys.size - 1)
        if (keys[at] != wanted).any():
            raise RuntimeError("demo: an activity of a trade the desk does not hold on either night")
        kind = _column(activity, "kind")
        price = _column(activity, "price").astype(float)
        price = np.where(np.isin(kind, ("exercise", "assignment")), 0.0, np.where(np.isnan(price), value[at], price))
        quantity = _column(activity, "quantity").astype(float)
        pnl -= total(book[at], quantity * multiplier[at] * price * rate[at])
        moved[at] = True
    gone = ~np.isin(h0.key, h1.key) & ~moved[np.searchsorted(keys, h0.key)]
    settled = h0.quantity * h0.multiplier * h0.value * fx1[h0.ccy]  # expired: settled at its last value
    return pnl + total(h0.book[gone], settled[gone])


def desk_pnl(holdings: list[Holdings], events: DeskEvents, dates: NDArray[np.datetime64], fx: FloatArray,
             unit_ratio: list[FloatArray], codes: list[str], books: list[str], key_of: dict[str, int]) -> FloatArray:
    """The desk's reported P&L, nights x books (row 0, the first date, is NaN: it has no prior night).

    ``fx``: nights x currencies; ``unit_ratio[d]``: per underlying, new units per old unit from night d - 1 to d
    (a split)."""
    n_books = len(books)
    out = np.full((len(holdings), n_books), np.nan)
    for d in range(1, len(holdings)):
        h0, h1 = holdings[d - 1], holdings[d]
        pnl = _night(h0, h1, fx[d - 1], fx[d], unit_ratio[d], events.activity[d], key_of, n_books)
        ex = (events.dividend_ex > dates[d - 1]) & (events.dividend_ex <= dates[d])
        if ex.any():  # shares held over an ex-date earn the dividend (per unit, in new units)
            amount = np.zeros(unit_ratio[d].size)
            np.add.at(amount, events.dividend_und[ex], events.dividend_amount[ex])
            per_holding = np.where(h0.share, amount[h0.und], 0.0)
            income = h0.quantity * h0.multiplier * unit_ratio[d][h0.und] * per_holding * fx[d][h0.ccy]
            pnl += np.bincount(h0.book, weights=income, minlength=n_books)
        flows = events.cash[d]
        if flows is not None:  # the desk's ledger rounds each commission to the whole unit of its currency
            ccy = np.array([codes.index(c) for c in _column(flows, "currency")], dtype=np.int64)
            book = np.array([books.index(b) for b in _column(flows, "book").tolist()], dtype=np.int64)
            amount = np.round(_column(flows, "amount").astype(float))
            pnl += np.bincount(book, weights=amount * fx[d][ccy], minlength=n_books)
        out[d] = np.round(pnl)  # reported to the whole unit of the reporting currency
    return out


@dataclass(frozen=True, slots=True)
class LateBooking:
    """A new trade the desk booked on night ``night`` that reaches the job's files only the next night."""

    night: int
    trade: str
    book: int
    quantity: float
    price: float
    day_one_pnl: float       # in the reporting currency: the break it makes on its night (and about minus it next)


def _position(keys: IntArray, wanted: IntArray) -> IntArray:
    """Where each of ``wanted`` is in ``keys`` (unsorted, unique), -1 where absent."""
    order = np.argsort(keys)
    at = np.minimum(np.searchsorted(keys, wanted, sorter=order), keys.size - 1)
    return np.where(keys[order[at]] == wanted, order[at], -1)


def late_booking(holdings: list[Holdings], activity: list[dict[str, pa.Array] | None], fx: FloatArray,
                 target: float, least: float, key_of: dict[str, int]) -> LateBooking | None:
    """The priced new trade with the largest day-one P&L on the night nearest ``target`` (a share of the year)
    where that P&L is above ``least``, and which the next night still holds unchanged (None if there is none)."""
    n = len(holdings)
    for d in sorted(range(1, n - 1), key=lambda k: abs(k - target * (n - 1))):
        act, after = activity[d], activity[d + 1]
        if act is None or after is None:
            continue
        kind, price = _column(act, "kind"), _column(act, "price").astype(float)
        trade, quantity = _column(act, "trade_id"), _column(act, "quantity").astype(float)
        keys = keys_of(trade, key_of)
        new = (kind == "new") & ~np.isnan(price) & ~np.isin(keys, keys_of(_column(after, "trade_id"), key_of))
        h1, h2 = holdings[d], holdings[d + 1]
        at1, at2 = _position(h1.key, keys), _position(h2.key, keys)
        new &= (at1 >= 0) & (at2 >= 0) & ~h1.share[at1] & ~h1.future[at1]
        new &= np.where(at2 >= 0, h2.quantity[at2], np.nan) == np.where(at1 >= 0, h1.quantity[at1], np.nan)
        day_one = np.where(new, quantity * h1.multiplier[at1] * (h1.value[at1] - price) * fx[d][h1.ccy[at1]], 0.0)
        k = int(np.argmax(np.abs(day_one)))
        if abs(day_one[k]) > least:
            return LateBooking(d, str(trade[k]), int(h1.book[at1[k]]), float(quantity[k]), float(price[k]),
                               float(day_one[k]))
    return None
