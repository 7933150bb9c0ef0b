"""Discrete cash dividends: the escrowed model's present value per instrument, and the night's ex-dates.

Where ``dividends.parquet`` lists an underlying, its options, forwards and futures are valued on the
escrowed spot ``S - D``, with ``D`` the present value on the as_of date of the dividends going ex
after the as_of date and on or before the instrument's expiry, each discounted from its ex_date at
the zero rate of the instrument's currency (:func:`attribution.curves.zero_rates`), over the job's
time basis::

    D = sum over as_of < ex_date <= expiry of amount * exp(-r(t) * t),   t = year fraction as_of -> ex_date

The continuous ``dividend_yield`` of the underlying then carries only what is not in the schedule
(borrow, or 0). An instrument without an expiry (a holding of the underlying itself) has ``D = 0``.

The pairs (instrument, dividend) are built with one sorted search over integer keys, never a loop
over instruments; a book has tens of thousands of instruments and a handful of dividends each.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from attribution.arrays import FloatArray
from attribution.curves import zero_rates
from attribution.timebasis import TimeBasis

_DAY_OFFSET = np.int64(2**31)  # days since 1970 made non-negative for the packed (underlying, day) key


def _packed(codes: NDArray[np.intp], days: NDArray[np.int64]) -> NDArray[np.int64]:
    """One sortable int64 per (underlying code, day): the code in the high bits, the day in the low."""
    return (codes.astype(np.int64) << np.int64(32)) | (days.astype(np.int64) + _DAY_OFFSET)


def _pairs(as_of: dt.date, underlying: NDArray[np.object_], expiry: NDArray[np.datetime64],
           dividends: pd.DataFrame) -> tuple[NDArray[np.intp], NDArray[np.intp], pd.DataFrame]:
    """(instrument index, dividend row) of every dividend in each instrument's window, and the rows."""
    day = np.datetime64(as_of, "D")
    ahead = dividends[dividends["ex_date"].to_numpy(dtype="datetime64[D]") > day]
    m = len(ahead)
    if m == 0 or len(underlying) == 0:
        empty = np.zeros(0, dtype=np.intp)
        return empty, empty, ahead
    codes, _ = pd.factorize(np.concatenate([ahead["underlying"].to_numpy(dtype=object),
                                            np.asarray(underlying, dtype=object)]))
    div_code, inst_code = codes[:m], codes[m:]
    div_day = ahead["ex_date"].to_numpy(dtype="datetime64[D]").astype(np.int64)
    order = np.lexsort((div_day, div_code))
    ahead = ahead.iloc[order].reset_index(drop=True)
    keys = _packed(div_code[order], div_day[order])
    has_expiry = ~np.isnat(expiry) & (inst_code >= 0)
    exp_day = np.where(has_expiry, expiry.astype("datetime64[D]").astype(np.int64), 0)
    lo = np.searchsorted(keys, _packed(inst_code, np.full(len(inst_code), day.astype(np.int64))), side="right")
    hi = np.searchsorted(keys, _packed(inst_code, exp_day), side="right")
    count = np.where(has_expiry, np.maximum(hi - lo, 0), 0)
    inst_idx = np.repeat(np.arange(len(underlying), dtype=np.intp), count)
    first = np.cumsum(count) - count
    div_idx = np.repeat(lo, count) + (np.arange(count.sum(), dtype=np.intp) - np.repeat(first, count))
    return inst_idx, div_idx.astype(np.intp), ahead


def schedule_pv(as_of: dt.date, underlying: NDArray[np.object_], currency: NDArray[np.object_],
                expiry: NDArray[np.datetime64], dividends: pd.DataFrame, curves: pd.DataFrame,
                basis: TimeBasis) -> FloatArray:
    """``D`` per instrument (per unit of underlying, in its currency); 0 without dividends in its window.

    NaN where a dividend falls in the window but the currency has no curve (the instrument is already
    unusable for that reason).
    """
    inst_idx, div_idx, ahead = _pairs(as_of, underlying, expiry, dividends)
    pv = np.zeros(len(underlying))
    if inst_idx.size == 0:
        return pv
    ex_day = ahead["ex_date"].to_numpy(dtype="datetime64[D]")[div_idx]
    t_years = basis.year_fraction(np.datetime64(as_of, "D"), ex_day)
    rate, _ = zero_rates(curves, np.asarray(currency, dtype=object)[inst_idx], t_years)
    discounted = ahead["amount"].to_numpy(dtype=float)[div_idx] * np.exp(-rate * t_years)
    return np.bincount(inst_idx, weights=discounted, minlength=len(underlying))


def going_ex(prior: pd.DataFrame, run: pd.DataFrame, prior_as_of: dt.date, as_of: dt.date) -> pd.DataFrame:
    """Dividends with ``prior_as_of < ex_date <= as_of``: underlying, ex_date, amount (one row per pair).

    The run date's row wins where both dates list the same (underlying, ex_date): it is the later
    knowledge of the amount; a row only the prior date listed still goes ex.
    """
    lo, hi = np.datetime64(prior_as_of, "D"), np.datetime64(as_of, "D")
    parts = []
    for frame in (run, prior):
        day = frame["ex_date"].to_numpy(dtype="datetime64[D]")
        parts.append(frame[(day > lo) & (day <= hi)])
    both = pd.concat(parts, ignore_index=True)
    return both.drop_duplicates(["underlying", "ex_date"], keep="first").reset_index(drop=True)


def income_per_unit(tonight: pd.DataFrame, underlying: NDArray[np.object_]) -> FloatArray:
    """Cash per unit of each ``underlying`` from the dividends going ex tonight (0 where none)."""
    if tonight.empty or len(underlying) == 0:
        return np.zeros(len(underlying))
    per_underlying = tonight.groupby("underlying", sort=False)["amount"].sum()
    return per_underlying.reindex(pd.Index(np.asarray(underlying, dtype=object))).fillna(0.0).to_numpy(dtype=float)


def instrument_pairs(underlying: NDArray[np.object_], currency: NDArray[np.object_]) -> pd.DataFrame:
    """The distinct (underlying, currency) of a date's instruments, in the order they first appear (each
    row labelled by its first instrument), for :func:`schedule_frame`."""
    u_code, _ = pd.factorize(np.asarray(underlying, dtype=object), use_na_sentinel=False)
    c_code, c_names = pd.factorize(np.asarray(currency, dtype=object), use_na_sentinel=False)
    _, first = np.unique(u_code.astype(np.int64) * (len(c_names) + 1) + c_code, return_index=True)
    first = np.sort(first)
    return pd.DataFrame({"underlying": np.asarray(underlying, dtype=object)[first],
                         "currency": np.asarray(currency, dtype=object)[first]}, index=first)


def schedule_frame(as_of: dt.date, prior_as_of: dt.date, run: pd.DataFrame, prior: pd.DataFrame,
                   pairs: pd.DataFrame, curves: pd.DataFrame, basis: TimeBasis,
                   gone: pd.DataFrame | None = None) -> pd.DataFrame:
    """The ``dividend_schedule`` rows of a night: every dividend in force on ``as_of`` (ex_date after it) with
    its present value on the curve of each currency its underlying's instruments trade in, and those that
    went ex tonight (``went_ex``, no present value).

    ``pairs``: distinct (underlying, currency) of the run date's instruments (:func:`instrument_pairs`);
    ``gone``: :func:`going_ex` of the night when already known. The rows are joined to the pairs and
    ordered by (underlying, currency, ex_date) on integer codes: a night has a few hundred rows at most.
    """
    day = np.datetime64(as_of, "D")
    ahead = run[run["ex_date"].to_numpy(dtype="datetime64[D]") > day]
    if gone is None:
        gone = going_ex(prior, run, prior_as_of, as_of)
    underlying = np.concatenate([ahead["underlying"].to_numpy(dtype=object), gone["underlying"].to_numpy(dtype=object)])
    ex_date = np.concatenate([ahead["ex_date"].to_numpy(dtype="datetime64[s]"),
                              gone["ex_date"].to_numpy(dtype="datetime64[s]")])
    amount = np.concatenate([ahead["amount"].to_numpy(dtype=float), gone["amount"].to_numpy(dtype=float)])
    went_ex = np.arange(len(underlying)) >= len(ahead)
    row, pair = _joined(underlying, pairs["underlying"].to_numpy(dtype=object))
    currency = pairs["currency"].to_numpy(dtype=object)[pair]
    underlying, ex_date, amount, went_ex = underlying[row], ex_date[row], amount[row], went_ex[row]
    order = np.lexsort((ex_date.astype(np.int64), pd.factorize(currency, sort=True)[0],
                        pd.factorize(underlying, sort=True)[0]))  # the keys are distinct: a full order
    underlying, currency, ex_date, amount, went_ex = (underlying[order], currency[order], ex_date[order],
                                                      amount[order], went_ex[order])
    t_years = basis.year_fraction(day, ex_date.astype("datetime64[D]")) if len(row) else np.zeros(0)
    rate, _ = zero_rates(curves, currency, t_years)
    pv = amount * np.exp(-rate * t_years)
    return pd.DataFrame({"as_of": pd.Timestamp(as_of), "underlying": pd.Series(underlying, dtype=object),
                         "currency": pd.Series(currency, dtype=pairs["currency"].dtype), "ex_date": ex_date,
                         "amount": amount, "pv": np.where(went_ex, np.nan, pv), "went_ex": went_ex})


def _joined(left: NDArray[np.object_], right: NDArray[np.object_]) -> tuple[NDArray[np.intp], NDArray[np.intp]]:
    """Every (left row, right row) with equal keys, left rows in order and each one's right rows in order
    (an inner join)."""
    codes, _ = pd.factorize(np.concatenate([left, right]), use_na_sentinel=False)
    left_code, right_code = codes[:len(left)], codes[len(left):]
    by_code = np.argsort(right_code, kind="stable")
    sorted_codes = right_code[by_code]
    lo = np.searchsorted(sorted_codes, left_code, side="left")
    count = np.searchsorted(sorted_codes, left_code, side="right") - lo
    first = np.cumsum(count) - count
    left_rows = np.repeat(np.arange(len(left), dtype=np.intp), count)
    right_rows = by_code[np.repeat(lo, count) + (np.arange(count.sum(), dtype=np.intp) - np.repeat(first, count))]
    return left_rows, right_rows.astype(np.intp, copy=False)
