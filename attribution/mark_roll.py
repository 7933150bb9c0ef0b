"""Rolling a missing option mark forward from the last good one, for a few business days at most.

An instrument whose option mark is missing (no row, or a row rejected by a row rule) on a date
would leave every trade in it unexplained on that night and on the next (whose prior leg has no
mark). Instead, the last good mark of an earlier date, at most ``checks.mark_roll_days``
business days back, gives the vol: the instrument is priced by the model at that vol on this
date's spot, time, rate and yield, flagged ``mark_rolled`` on its positions and warned in the
ledger. The position stays explained with no vol move on the rolled night, and the difference
between the model and the real mark shows up as mark gap when the real mark returns. Older than
the limit (or with no earlier mark), the trades are rejected as before.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pandas as pd

from attribution.american import american_price_unchecked
from attribution.config import JobConfig
from attribution.contract import clean_night
from attribution.errors import JobFailure
from attribution.exceptions_log import WARNING, ExceptionLog
from attribution.loading import available_dates, read_night
from attribution.market import InstrumentMarket, build_market
from attribution.pricing import price_unchecked
from attribution.timebasis import TimeBasis

ROLLED_RULE = "mark rolled forward"


def roll_marks(market: InstrumentMarket, terms: pd.DataFrame, config: JobConfig, basis: TimeBasis, marks_file: str,
               log: ExceptionLog) -> InstrumentMarket:
    """``market`` with each missing mark rolled forward from the latest earlier date that has a usable one."""
    as_of = market.as_of
    data_root, checks = config.data_root, config.checks
    missing_text = f"no usable option mark on {as_of}"
    wanted = market.listed & (market.reason == missing_text) & (market.tau_years > 0)  # expiring: intrinsic
    if not wanted.any() or checks.mark_roll_days < 1:
        return market
    vol = market.vol.copy()
    source = np.full(len(market.ids), None, dtype=object)
    for day in roll_dates(data_root, as_of, basis, checks.mark_roll_days):
        need = wanted & (source == None)  # noqa: E711 - element-wise test on an object array
        if not need.any():
            break
        try:  # an earlier folder that cannot be read gives no mark; the night goes on without it
            raw = read_night(data_root, day)  # type: ignore[arg-type]
        except JobFailure:
            continue
        scratch = ExceptionLog(day)  # that date's own findings belong to its own night
        old = build_market(clean_night(raw, scratch, checks, config.reporting_currency), terms.loc[market.ids[need]],
                           basis, checks, scratch, config.american_precision)
        good = old.usable & (old.tau_years > 0)
        idx = np.flatnonzero(need)[good]
        vol[idx] = old.vol[good]
        source[idx] = day
    rolled = wanted & (source != None)  # noqa: E711
    if not rolled.any():
        return market
    i = np.flatnonzero(rolled)
    price = market.price.copy()
    spot = market.escrowed_spot  # the spot the model prices on (less the dividends' present value)
    with np.errstate(all="ignore"):
        price[i] = price_unchecked(spot[i], market.strike[i], market.tau_years[i], vol[i], market.rate[i],
                                   market.div_yield[i], market.cp[i])
        a = i[market.american[i]]
        if a.size:
            price[a] = american_price_unchecked(spot[a], market.strike[a], market.tau_years[a], vol[a],
                                                market.rate[a], market.div_yield[a], market.cp[a],
                                                scheme=market.american_scheme)
    reason = market.reason.copy()
    reason[i] = ""
    days = np.array([np.busday_count(d, as_of, holidays=np.array(basis.holidays, dtype="datetime64[D]"))
                     for d in source[i]])
    detail = [f"no usable mark on {as_of}: implied vol {v:.4g} of {d} ({n} business day{'s' if n != 1 else ''} "
              f"back) kept, priced {p:.6g} by the model" for v, d, n, p in zip(vol[i], source[i], days, price[i],
                                                                                strict=True)]
    log.add(marks_file, market.ids[i].to_numpy(), ROLLED_RULE, np.array(detail, dtype=object), WARNING)
    return dataclasses.replace(market, vol=vol, price=price, marked_vol=np.where(rolled, vol, market.marked_vol),
                               usable=reason == "", reason=reason, mark_rolled=rolled)


def roll_dates(data_root: object, as_of: object, basis: TimeBasis, max_days: int, listed: list | None = None) -> list:
    """Folders before ``as_of`` within ``max_days`` business days of it, latest first (``listed``: the data
    folder's dates when already known)."""
    holidays = np.array(basis.holidays, dtype="datetime64[D]")
    dates = available_dates(data_root) if listed is None else listed  # type: ignore[arg-type]
    earlier = [d for d in dates if d < as_of]  # type: ignore[operator]
    within = []
    for day in reversed(earlier):  # the business days to as_of only grow going back: stop at the first too far
        if np.busday_count(day, as_of, holidays=holidays) > max_days:
            break
        within.append(day)
    return within
