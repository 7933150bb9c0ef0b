"""One early exercise of an American option in the demo year (invented, like the rest of the desk).

The desk's single-stock names list American options. Once in the year, a position in one of them whose
clean mark sits in its exercise region (a deep in-the-money put, or a call before a large dividend) is
exercised by its holder (``exercise``), or, when the desk is short, assigned (``assignment``). The
trade leaves the positions file that night; the shares it delivers (quantity x multiplier, bought for a
call, sold for a put) are a new trade of the book on the underlying's share line, priced at the strike,
and the desk sells (or buys back) them the next night at the spot (data contract: "Trade activity").
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from attribution.arrays import FloatArray
from attribution.demo.desk import DeskSpec
from attribution.demo.market import ListedInstruments, MarketPaths
from attribution.demo.nights import Night, Trades

EXERCISE_AT = 0.4          # the exercise is looked for from this share of the year outwards
MIN_DAYS_LEFT = 10         # an early exercise: at least this many calendar days before expiry


@dataclass(frozen=True, slots=True)
class Exercise:
    """The exercised trade (a row of :class:`Trades`) and the shares it delivers."""

    night: int                # index of the night it is exercised on
    row: int                  # the trade's row in Trades
    instrument: int           # its listed instrument
    und: int
    book: int
    contracts: float          # the position exercised (signed; < 0: assigned on a short position)
    shares: float             # units of the underlying delivered to the desk (signed)
    strike: float             # per unit of underlying, in that night's units
    is_call: bool

    @property
    def activity(self) -> str:
        """``exercise`` when the desk held the option, ``assignment`` when it was short."""
        return "exercise" if self.contracts > 0 else "assignment"


def plan_exercise(desk: DeskSpec, market: MarketPaths, store: ListedInstruments, trades: Trades,
                  nights: list[Night], splits: list[FloatArray]) -> Exercise | None:
    """Choose the exercise (None when no American position is in its exercise region on two nights running) and
    take the trade out of that night's and every later night's positions."""
    n = len(nights)
    american = np.array([u.exercise == "american" for u in desk.underlyings])
    order = sorted(range(1, n - 1), key=lambda d: abs(d - EXERCISE_AT * (n - 1)))
    for d in order:
        night, before = nights[d], nights[d - 1]
        rows = np.intersect1d(night.rows, before.rows)
        inst = trades.instrument[rows]
        pos = np.searchsorted(night.live, inst)
        days_left = (store.expiry[inst] - market.dates[d]).astype(int)
        ok = american[store.und[inst]] & night.exercise_region[pos] & (days_left >= MIN_DAYS_LEFT)
        if not ok.any():
            continue
        held = before.quantity[_where(before.rows, rows)]  # the whole position held at the prior close
        strike = store.strike[inst] / splits[d][inst]
        multiplier = desk.param("multiplier")[store.und[inst]] * splits[d][inst]
        intrinsic = np.abs(night.spot[pos] - strike)
        score = np.where(ok, np.abs(held) * multiplier * intrinsic * np.where(held > 0, 2.0, 1.0), 0.0)
        k = int(np.argmax(score))
        row = int(rows[k])
        cp = 1.0 if store.is_call[inst[k]] else -1.0
        chosen = Exercise(night=d, row=row, instrument=int(inst[k]), und=int(store.und[inst[k]]),
                          book=int(trades.book[row]), contracts=float(held[k]),
                          shares=float(held[k] * multiplier[k] * cp), strike=float(strike[k]),
                          is_call=bool(store.is_call[inst[k]]))
        _forget(market, store, trades, nights, chosen)
        return chosen
    return None


def _where(rows: np.ndarray, wanted: np.ndarray) -> np.ndarray:
    """Positions of ``wanted`` (each present) in ``rows`` (unsorted, unique)."""
    order = np.argsort(rows)
    return order[np.searchsorted(rows, wanted, sorter=order)]


def _forget(market: MarketPaths, store: ListedInstruments, trades: Trades, nights: list[Night],
            chosen: Exercise) -> None:
    """Take the exercised trade out of its night and every later one, and out of the trading counts of those nights
    (a later amendment, close or expiry of it never happens)."""
    quantity = chosen.contracts
    left = False
    for k in range(chosen.night, len(nights)):
        later = nights[k]
        hit = later.rows == chosen.row
        if hit.any():
            if later.quantity[hit][0] != quantity:
                trades.counts["amended"] -= 1
            quantity = later.quantity[hit][0]
            later.rows, later.quantity = later.rows[~hit], later.quantity[~hit]
        elif not left and k > chosen.night:
            left = True
            trades.counts["expired" if store.expiry[chosen.instrument] < market.dates[k] else "closed"] -= 1
