"""Weighted vol time: a variance clock for the vol terms, with discounting kept on the calendar clock.

A desk expects little variance over a weekend or a holiday and more on a central-bank day. With
day weights (one per weekday, one for the job's holidays, one per listed event date), the time
that carries variance between two dates is::

    variance years(a, b) = sum of weight(d) for the days d in (a, b]  /  days per year of the basis

(under ``BUS/252`` days that are not business days weigh 0 whatever their weight, as the basis
already leaves them out). Time to expiry and the night's elapsed time on the basis clock stay what
they are for discounting, forwards and carry; the variance clock measures how much implied variance
is left and how much of it a night uses up.

A marked vol is quoted on the basis clock. Its variance-clock vol keeps the total variance,
``vol_var = vol sqrt(tau / tau_var)``, so every model price is unchanged; only the Taylor
coordinates change (greeks in vol_var, ``r = tau_var / tau`` at the prior state)::

    vega_var  = vega sqrt(r)        volga_var = volga r        vanna_var = vanna sqrt(r)
    decay per variance year = -vega vol / (2 tau r)      (time passing at fixed vol_var and basis time)
    carry per year          = theta + vega vol / (2 tau)  (time passing at fixed total variance)
    pnl_theta = units (carry dt + decay dt_var)  =  pnl_theta_carry + pnl_theta_decay

With every weight 1 the variance clock is the basis clock (r = 1, dt_var = dt) and the terms are
today's; the job then skips the restatement, so its rows are bit for bit the same, and the theta
split reports decay = units (-vega vol / (2 tau)) dt and carry = pnl_theta - decay.
The order-independent revaluation and the exposures stay on the basis clock.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from attribution.arrays import FloatArray
from attribution.config import VolTimeSettings
from attribution.explain import MarketState
from attribution.pricing import Greeks
from attribution.timebasis import DAYS_PER_YEAR_BUSINESS, DAYS_PER_YEAR_CALENDAR, TimeBasis


@dataclass(frozen=True, slots=True)
class VarianceClock:
    """Per instrument of each date's market, ``tau_var / tau`` (1 where either is 0), and the night's variance years."""

    ratio0: FloatArray
    ratio1: FloatArray
    dt_years: float


def day_weights(basis: TimeBasis, settings: VolTimeSettings, days: NDArray[np.datetime64]) -> FloatArray:
    """The variance weight of each day: event, else holiday, else its weekday's; 0 off the BUS/252 calendar."""
    days = np.asarray(days, dtype="datetime64[D]")
    weekday = (days.astype(np.int64) + 3) % 7            # 1970-01-01 was a Thursday; Monday = 0
    w = np.asarray(settings.weekdays, dtype=float)[weekday]
    holidays = np.array(basis.holidays, dtype="datetime64[D]")
    w = np.where(np.isin(days, holidays), settings.holiday, w)
    if settings.events:
        event_days = np.array([d for d, _ in settings.events], dtype="datetime64[D]")
        event_w = np.array([x for _, x in settings.events], dtype=float)
        at = np.searchsorted(event_days, days)
        hit = (at < event_days.size) & (event_days[np.minimum(at, event_days.size - 1)] == days)
        w = np.where(hit, event_w[np.minimum(at, event_days.size - 1)], w)
    if basis.name == "BUS/252":
        w = np.where(np.is_busday(days, holidays=holidays), w, 0.0)
    return w


def variance_years(basis: TimeBasis, settings: VolTimeSettings, start: NDArray[np.datetime64] | dt.date,
                   end: NDArray[np.datetime64] | dt.date) -> FloatArray:
    """Variance-clock years from ``start`` to ``end`` (the weights of the days in (start, end]), element-wise."""
    a = np.atleast_1d(np.asarray(start, dtype="datetime64[D]"))
    b = np.atleast_1d(np.asarray(end, dtype="datetime64[D]"))
    a, b = np.broadcast_arrays(a, b)
    if a.size == 0:
        return np.zeros(a.shape)
    lo, hi = min(a.min(), b.min()), max(a.max(), b.max())
    days = np.arange(lo, hi + np.timedelta64(1, "D"))
    cum = np.concatenate([[0.0], np.cumsum(day_weights(basis, settings, days))])
    ia, ib = (a - lo).astype(np.int64) + 1, (b - lo).astype(np.int64) + 1
    per_year = DAYS_PER_YEAR_BUSINESS if basis.name == "BUS/252" else DAYS_PER_YEAR_CALENDAR
    return (cum[ib] - cum[ia]) / per_year


def clock_ratio(basis: TimeBasis, settings: VolTimeSettings, as_of: dt.date, expiry: NDArray[np.datetime64],
                tau_years: FloatArray) -> FloatArray:
    """``tau_var / tau`` per instrument on ``as_of``; 1 where either is 0 (no time or no variance left)."""
    tau_var = variance_years(basis, settings, np.datetime64(as_of, "D"), expiry)
    ok = (tau_years > 0) & (tau_var > 0)
    return np.where(ok, tau_var / np.where(ok, tau_years, 1.0), 1.0)


def variance_clock(basis: TimeBasis, settings: VolTimeSettings, prior_as_of: dt.date, as_of: dt.date,
                   expiry0: NDArray[np.datetime64], tau0: FloatArray, expiry1: NDArray[np.datetime64],
                   tau1: FloatArray) -> VarianceClock | None:
    """The night's variance clock over both markets' instruments; None when every weight is 1 (the basis clock)."""
    if settings.is_default():
        return None
    return VarianceClock(clock_ratio(basis, settings, prior_as_of, expiry0, tau0),
                         clock_ratio(basis, settings, as_of, expiry1, tau1),
                         float(variance_years(basis, settings, prior_as_of, as_of)[0]))


def decay_per_year(g: Greeks, state0: MarketState, ratio0: FloatArray) -> FloatArray:
    """Theta's variance part per variance-clock year, -vega vol / (2 tau r), 0 without time or vol."""
    ok = (state0.tau_years > 0) & (state0.vol > 0)
    with np.errstate(all="ignore"):
        return np.where(ok, -g.vega * state0.vol / (2.0 * state0.tau_years * ratio0), 0.0)


def clock_terms(g: Greeks, units: FloatArray, state0: MarketState, state1: MarketState, dt_years: float,
                dt_var_years: float, ratio0: FloatArray, ratio1: FloatArray) -> dict[str, FloatArray]:
    """The vol and time terms restated on the variance clock (amounts, scaled by ``units``).

    Keys: ``vega``, ``volga``, ``vanna``, ``theta``, ``theta_decay``, ``theta_carry`` and, per unit,
    ``vega_per_unit``, ``volga_per_unit`` (greeks in the variance-clock vol) for the smile split.
    """
    root0 = np.sqrt(ratio0)
    d_vol = state1.vol / np.sqrt(ratio1) - state0.vol / root0
    d_spot = state1.escrowed_spot - state0.escrowed_spot  # the priced spot: discrete dividends out
    decay = decay_per_year(g, state0, ratio0)
    carry = g.theta_per_year - decay_per_year(g, state0, np.ones_like(ratio0))
    theta_decay = units * decay * dt_var_years
    theta_carry = units * carry * dt_years
    vega_u, volga_u = g.vega * root0, g.volga * ratio0
    return {"vega": units * vega_u * d_vol, "volga": units * 0.5 * volga_u * d_vol * d_vol,
            "vanna": units * g.vanna * root0 * d_spot * d_vol, "theta": theta_decay + theta_carry,
            "theta_decay": theta_decay, "theta_carry": theta_carry, "vega_per_unit": vega_u,
            "volga_per_unit": volga_u, "d_vol": d_vol}
