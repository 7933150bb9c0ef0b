"""Discrete dividends and one split on the demo desk's single stocks (invented, like the rest of the desk).

Each stock pays a quarterly cash dividend of a quarter of its initial yield times its initial spot, on
ex-dates spread over the quarter by stock. Its spot drops by the payment on each ex-date, and its
``dividend_yield`` keeps only a small borrow plus the simulated yield moves; the marks value its options
on the escrowed spot (:func:`attribution.dividends.schedule_pv`), as the job does.

The first stock splits 2-for-1 on the middle business date of the demo: from that date its spot and
later dividends are in new units, and the options listed before it have their strikes halved and their
multipliers doubled (same instrument ids), as an exchange adjusts them; ``corporate_actions.parquet``
carries the split on every date.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pyarrow as pa
from numpy.typing import NDArray

from attribution.demo.desk import DeskSpec
from attribution.demo.market import MarketPaths
from attribution.pricing import FloatArray
from attribution.timebasis import DAYS_PER_YEAR_CALENDAR

PAYMENTS_PER_YEAR = 4
DAYS_BETWEEN = 91
FIRST_OFFSET_DAYS = 20       # the first stock's first ex-date, days after the demo's start
STAGGER_DAYS = 17            # each next stock's ex-dates this many days later (modulo the quarter)
BORROW = 0.002               # the continuous part a stock keeps besides its dividends
SPLIT_RATIO = 2.0            # new shares per old share


@dataclasses.dataclass(frozen=True, slots=True)
class Schedule:
    """The desk's dividends, one row per payment."""

    und: NDArray[np.int64]
    ex_date: NDArray[np.datetime64]
    amount: FloatArray            # per share of the ex-date (new shares after the split)
    split_und: int = -1           # the stock that splits (-1: none)
    split_day: np.datetime64 = np.datetime64("NaT")

    def actions(self, names: NDArray[np.str_]) -> list[pa.Array]:
        """corporate_actions.parquet columns: the split, known on every date."""
        hit = [self.split_und] if self.split_und >= 0 else []
        days = np.array([self.split_day] * len(hit), "datetime64[D]")
        return [pa.array(names[hit], pa.string()), pa.array(days, pa.date32()),
                pa.array([SPLIT_RATIO] * len(hit), pa.float64())]

    def columns(self, day: np.datetime64, names: NDArray[np.str_]) -> list[pa.Array]:
        """dividends.parquet columns known on ``day``: the payments with an ex-date after it."""
        ahead = self.ex_date > day
        return [pa.array(names[self.und[ahead]], pa.string()), pa.array(self.ex_date[ahead], pa.date32()),
                pa.array(self.amount[ahead], pa.float64())]

    def split_factor(self, und: NDArray[np.int64], listed_before: NDArray[np.bool_],
                     day: np.datetime64) -> FloatArray:
        """Per instrument: what its listed strike is divided by (and its multiplier multiplied by) on ``day``."""
        hit = (und == self.split_und) & listed_before & (day >= self.split_day)
        return np.where(hit, SPLIT_RATIO, 1.0)


def plan(desk: DeskSpec, market: MarketPaths, horizon: np.datetime64) -> Schedule:
    """Quarterly payments of every stock with a dividend yield, from shortly after the start up to ``horizon``;
    an ex-date falling on a weekend moves to the next weekday."""
    start = market.dates[0]
    q0 = desk.param("dividend_yield")
    und: list[int] = []
    ex: list[np.datetime64] = []
    amount: list[float] = []
    stocks = [j for j, u in enumerate(desk.underlyings) if u.kind == "stock" and q0[j] > 0]
    for k, j in enumerate(stocks):  # a handful of stocks with a handful of payments each
        first = start + np.timedelta64(FIRST_OFFSET_DAYS + (STAGGER_DAYS * k) % DAYS_BETWEEN, "D")
        days = np.busday_offset(np.arange(first, horizon, np.timedelta64(DAYS_BETWEEN, "D")), 0, roll="forward")
        und += [j] * days.size
        ex += list(days)
        amount += [round(float(q0[j] * market.spot[0, j]) / PAYMENTS_PER_YEAR, 2)] * days.size
    und_a, ex_a, amount_a = np.array(und, np.int64), np.array(ex, "datetime64[D]"), np.array(amount, float)
    split_und = next((j for j, u in enumerate(desk.underlyings) if u.kind == "stock"), -1)
    split_day = market.dates[market.dates.size // 2]
    later = (und_a == split_und) & (ex_a >= split_day)
    amount_a[later] = np.round(amount_a[later] / SPLIT_RATIO, 4)
    return Schedule(und_a, ex_a, amount_a, split_und, split_day)


def apply(desk: DeskSpec, market: MarketPaths, schedule: Schedule) -> MarketPaths:
    """The market with each stock's spot dropping by its dividends from their ex-dates, and the stocks'
    continuous yields reduced to the borrow plus their simulated moves."""
    dates = market.dates
    spot = market.spot.copy()
    step = np.searchsorted(dates, schedule.ex_date)  # the first business date on or after each ex-date
    inside = step < dates.size
    old_units = np.where((schedule.und == schedule.split_und) & (schedule.ex_date >= schedule.split_day),
                         SPLIT_RATIO, 1.0)  # the simulated path is in shares before the split
    for s, j, a in zip(step[inside], schedule.und[inside], (schedule.amount * old_units)[inside],
                       strict=True):  # a few dozen payments
        spot[s:, j] *= 1.0 - a / spot[s, j]
    if schedule.split_und >= 0:
        spot[dates >= schedule.split_day, schedule.split_und] /= SPLIT_RATIO
    q = market.dividend_yield.copy()
    stocks = np.array([u.kind == "stock" for u in desk.underlyings])
    q[:, stocks] = np.maximum(q[:, stocks] - desk.param("dividend_yield")[stocks] + BORROW, 0.0)
    return dataclasses.replace(market, spot=spot, dividend_yield=q)


def present_values(market: MarketPaths, d: int, schedule: Schedule, und: NDArray[np.int64], ccy: NDArray[np.int64],
                   expiry: NDArray[np.datetime64]) -> FloatArray:
    """Present value on date ``d`` of each instrument's dividends up to its expiry: the job's own formula
    (:func:`attribution.dividends.schedule_pv`, ACT/365F) with the same arithmetic, so the same bits.

    ``und``, ``ccy``: per instrument, the underlying and the currency (indices into the desk's lists). Each
    payment ``as_of < ex_date <= expiry`` is discounted at the currency's zero rate at its ex-date and the
    payments are added in ex-date order; done per (underlying, currency), a handful, on cumulative sums.
    """
    day = market.dates[d]
    pv = np.zeros(und.size)
    years = (schedule.ex_date - day).astype("timedelta64[D]").astype(float) / DAYS_PER_YEAR_CALENDAR
    for j in np.unique(und):
        mine = np.flatnonzero((schedule.und == j) & (schedule.ex_date > day))
        mine = mine[np.argsort(schedule.ex_date[mine], kind="stable")]
        for c in np.unique(ccy[und == j]):
            rate = np.interp(years[mine], market.tenors_years, market.zero_rates[d, c])
            total = np.concatenate([[0.0], np.cumsum(schedule.amount[mine] * np.exp(-rate * years[mine]))])
            at = (und == j) & (ccy == c)
            pv[at] = total[np.searchsorted(schedule.ex_date[mine], expiry[at], side="right")]
    return pv
