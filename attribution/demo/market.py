"""The demo desk's simulated market and listing (invented data, for the demo only).

* :func:`simulate_market` draws the market on the given business dates, vectorised over the
  underlyings with one step per business date: spot with jumps, an at-the-money vol that moves
  against spot and mean-reverts, zero curves per currency (short and long end), dividend yields
  with occasional announcements, and FX rates into the reporting currency;
* :func:`smile_vol` and :func:`zero_rate` turn that state into the implied vol and the rate of an
  option (the rate interpolated exactly as the data contract says: linear in zero rate, flat
  beyond the ends);
* :func:`list_instruments` lists the next monthly and the quarterly expiries with strikes on a
  grid of standard deviations around spot, and later only what the listed range does not cover.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray

from attribution.arrays import FloatArray, IntArray
from attribution.demo.desk import DAYS_PER_YEAR, DeskSpec, desk_holidays


@dataclass(frozen=True, slots=True)
class MarketPaths:
    """The simulated market, one row per business date (columns: underlyings or currencies in definition order)."""

    dates: NDArray[np.datetime64]   # (n_days,) datetime64[D]
    spot: FloatArray                # (n_days, n_underlyings)
    atm_vol: FloatArray             # (n_days, n_underlyings), decimal
    dividend_yield: FloatArray      # (n_days, n_underlyings), continuous decimal; FX: the base currency's rate
    zero_rates: FloatArray          # (n_days, n_currencies, n_tenors), continuously compounded decimal
    fx_to_reporting: FloatArray     # (n_days, n_currencies), reporting currency per unit
    tenors_years: FloatArray        # (n_tenors,)


def zero_rate(curve_points: FloatArray, tenors_years: FloatArray, tau_years: FloatArray) -> FloatArray:
    """A curve's zero rate at ``tau_years``: linear between points, flat beyond the ends (the contract's rule)."""
    return np.interp(tau_years, tenors_years, curve_points)


def smile_vol(atm_vol: FloatArray, skew: FloatArray, curvature: FloatArray, term_slope: FloatArray,
              log_moneyness: FloatArray, tau_years: FloatArray) -> FloatArray:
    """Implied vol of a strike: at-the-money level with a term slope, plus skew and curvature in ln(K/S)/sqrt(tau)."""
    tau_c = np.maximum(tau_years, 1.0 / 52.0)
    m = np.clip(log_moneyness / np.sqrt(tau_c), -2.5, 2.5)
    vol = atm_vol * (1.0 + term_slope * (np.sqrt(tau_c) - 0.5)) + skew * m + curvature * m * m
    return np.clip(vol, 0.03, 1.5)


def _simulate_curves(desk: DeskSpec, steps: int, rng: np.random.Generator) -> FloatArray:
    short = np.array([c.short_rate for c in desk.currencies])
    long = np.array([c.long_rate for c in desk.currencies])
    sd = np.array([c.rate_vol_bp_per_day for c in desk.currencies]) * 1e-4
    z = rng.standard_normal((steps, len(desk.currencies), 2))
    d_short = sd * z[..., 0]
    d_long = sd * (0.6 * z[..., 0] + 0.8 * z[..., 1])
    zeros = np.zeros((1, len(desk.currencies)))
    short_path = short + np.vstack([zeros, np.cumsum(d_short, axis=0)])
    long_path = long + np.vstack([zeros, np.cumsum(d_long, axis=0)])
    shape = np.exp(-np.array(desk.curve_tenors_years) / 2.0)
    return long_path[..., None] + (short_path - long_path)[..., None] * shape


def _simulate_spot_vol(desk: DeskSpec, dt_years: FloatArray, rng: np.random.Generator) -> tuple[FloatArray, FloatArray]:
    p = desk.param
    steps, n = dt_years.size, len(desk.underlyings)
    loading, corr = p("market_loading"), p("spot_vol_corr")
    z_spot = loading * rng.standard_normal((steps, 1)) + np.sqrt(1 - loading**2) * rng.standard_normal((steps, n))
    z_vol = corr * z_spot + np.sqrt(1 - corr**2) * rng.standard_normal((steps, n))
    n_jumps = rng.poisson(p("jumps_per_year") * dt_years[:, None], size=(steps, n))
    jump = n_jumps * p("jump_mean") + np.sqrt(n_jumps) * p("jump_sd") * rng.standard_normal((steps, n))
    atm0, drift, kappa, vov, beta = p("atm_vol"), p("drift"), p("vol_mean_reversion"), p("vol_of_vol"), \
        p("vol_jump_beta")
    log_spot = np.empty((steps + 1, n))
    log_vol = np.zeros((steps + 1, n))
    log_spot[0] = np.log(p("spot"))
    for i, h in enumerate(dt_years):
        sigma = desk.realised_to_implied * atm0 * np.exp(log_vol[i])
        log_spot[i + 1] = log_spot[i] + (drift - 0.5 * sigma**2) * h + sigma * np.sqrt(h) * z_spot[i] + jump[i]
        shock = vov * np.sqrt(h) * z_vol[i] - beta * jump[i]
        log_vol[i + 1] = np.clip(log_vol[i] * (1.0 - kappa * h) + shock, -1.0, 1.5)
    return np.exp(log_spot), atm0 * np.exp(log_vol)


def _simulate_dividends(desk: DeskSpec, dt_years: FloatArray, zero_rates: FloatArray,
                        rng: np.random.Generator) -> FloatArray:
    p = desk.param
    steps, n = dt_years.size, len(desk.underlyings)
    announcements = rng.poisson(p("dividend_jumps_per_year") * dt_years[:, None], size=(steps, n))
    sign = rng.integers(0, 2, size=(steps, n)) * 2.0 - 1.0
    moves = p("dividend_vol_bp_per_day") * 1e-4 * rng.standard_normal((steps, n))
    moves += announcements * sign * p("dividend_jump_bp") * 1e-4
    q = np.maximum(p("dividend_yield") + np.vstack([np.zeros((1, n)), np.cumsum(moves, axis=0)]), 0.0)
    tenors = np.array(desk.curve_tenors_years)
    weights = np.array([np.interp(desk.fx_foreign_rate_tenor_years, tenors, e) for e in np.eye(tenors.size)])
    codes = [c.code for c in desk.currencies]
    for j, u in enumerate(desk.underlyings):
        if u.kind == "fx":
            q[:, j] = zero_rates[:, codes.index(u.foreign_currency), :] @ weights
    return q


def _fx_to_reporting(desk: DeskSpec, spot: FloatArray) -> FloatArray:
    rep = desk.reporting_currency
    fx = np.ones((spot.shape[0], len(desk.currencies)))
    for c, cur in enumerate(desk.currencies):
        for j, u in enumerate(desk.underlyings):
            if u.kind == "fx" and (u.foreign_currency, u.currency) == (cur.code, rep):
                fx[:, c] = spot[:, j]
            elif u.kind == "fx" and (u.foreign_currency, u.currency) == (rep, cur.code):
                fx[:, c] = 1.0 / spot[:, j]
    return fx


def simulate_market(desk: DeskSpec, dates: NDArray[np.datetime64], rng: np.random.Generator) -> MarketPaths:
    """Draw the desk's market on ``dates`` (business days, increasing); time steps are ACT/365F."""
    dt_years = np.diff(dates).astype(float) / DAYS_PER_YEAR
    zero_rates = _simulate_curves(desk, dt_years.size, rng)
    spot, atm_vol = _simulate_spot_vol(desk, dt_years, rng)
    dividend_yield = _simulate_dividends(desk, dt_years, zero_rates, rng)
    return MarketPaths(dates=dates, spot=spot, atm_vol=atm_vol, dividend_yield=dividend_yield,
                       zero_rates=zero_rates, fx_to_reporting=_fx_to_reporting(desk, spot),
                       tenors_years=np.array(desk.curve_tenors_years))


@dataclass(frozen=True, slots=True)
class VarianceClock:
    """The desk's own clock for option variance: calendar days weighted (weekends and holidays light, event
    days heavy, other business days the rest, so that a year still counts 365), cumulated from ``base``."""

    base: np.datetime64
    cumulative: FloatArray   # cumulative[i]: weighted days from base to base + i

    def years(self, start: NDArray[np.datetime64], end: NDArray[np.datetime64]) -> FloatArray:
        """Weighted years between the dates (the days after ``start`` up to ``end``), as ACT/365F years."""
        i = (start - self.base).astype(np.int64)
        j = (end - self.base).astype(np.int64)
        return (self.cumulative[j] - self.cumulative[i]) / DAYS_PER_YEAR


def variance_clock(desk: DeskSpec, first: np.datetime64, last: np.datetime64) -> VarianceClock:
    """The marks' variance clock from ``first`` to ``last`` (a year after ``first`` sets the business-day weight)."""
    days = np.arange(first, last + 1)
    holidays = np.array(desk_holidays(desk, first.item(), last.item()), dtype="datetime64[D]")
    quiet = ~np.is_busday(days, holidays=holidays)
    month_day = np.array([text[5:] for text in np.datetime_as_string(days, unit="D")])  # a few thousand days
    event = np.isin(month_day, desk.marks.events) & ~quiet
    year = slice(0, min(days.size, 365))
    fixed = desk.marks.weekend_weight * quiet[year].sum() + desk.marks.event_weight * event[year].sum()
    business = max((min(days.size, 365) - fixed) / max((~quiet[year] & ~event[year]).sum(), 1), 0.1)
    weight = np.where(quiet, desk.marks.weekend_weight, np.where(event, desk.marks.event_weight, business))
    return VarianceClock(first, np.concatenate([[0.0], np.cumsum(weight[1:])]))


# ---- listing ---------------------------------------------------------------------------------

@dataclass(slots=True)
class ListedInstruments:
    """Every instrument listed so far (append-only; the row is the instrument's number); mutable."""

    und: IntArray = field(default_factory=lambda: np.zeros(0, np.int64))
    is_call: NDArray[np.bool_] = field(default_factory=lambda: np.zeros(0, bool))
    strike: FloatArray = field(default_factory=lambda: np.zeros(0))
    expiry: NDArray[np.datetime64] = field(default_factory=lambda: np.zeros(0, "datetime64[D]"))
    null_vol: NDArray[np.bool_] = field(default_factory=lambda: np.zeros(0, bool))


def series_key(und: IntArray, expiry: NDArray[np.datetime64]) -> IntArray:
    """(expiry, underlying) as one integer: the key of a series of listed strikes."""
    return expiry.astype(np.int64) * 4096 + und


@dataclass(frozen=True, slots=True)
class StrikeIndex:
    """Listed strikes sorted by (series, ln K), built once to find the nearest strike of many queries."""

    order: IntArray      # positions of the listed strikes in sorted order
    k_sorted: FloatArray  # ln K in that order
    uniq: IntArray       # the distinct series, increasing
    rank: IntArray       # per sorted strike, the rank of its series in uniq
    keys: FloatArray     # rank * 100 + ln K: sorted, series apart since |ln K| < 50


def strike_index(series: IntArray, log_strike: FloatArray) -> StrikeIndex:
    """The index of the listed strikes ``log_strike`` (ln K) of the series ``series``."""
    order = np.lexsort((log_strike, series))
    k_sorted = log_strike[order]
    uniq, rank = np.unique(series[order], return_inverse=True)
    return StrikeIndex(order, k_sorted, uniq, rank, rank * 100.0 + k_sorted)


def nearest_strike(index: StrikeIndex, q_series: IntArray, q_log_strike: FloatArray) -> IntArray:
    """Index of the nearest listed strike of the same series for every query, -1 where the series is empty."""
    best = np.full(q_series.shape, -1, dtype=np.int64)
    order, k_sorted, uniq, rank = index.order, index.k_sorted, index.uniq, index.rank
    if order.size == 0:
        return best
    q_rank = np.minimum(np.searchsorted(uniq, q_series), uniq.size - 1)
    present = uniq[q_rank] == q_series
    pos = np.searchsorted(index.keys, q_rank * 100.0 + q_log_strike)
    gap = np.full(q_series.shape, np.inf)
    for cand in (pos - 1, pos):
        c = np.clip(cand, 0, order.size - 1)
        ok = present & (cand >= 0) & (cand < order.size) & (rank[c] == q_rank)
        dist = np.where(ok, np.abs(k_sorted[c] - q_log_strike), np.inf)
        better = dist < gap
        best, gap = np.where(better, order[c], best), np.where(better, dist, gap)
    return best


def strike_step(spot: FloatArray) -> FloatArray:
    """A round strike spacing near 1 % of spot: 1, 2 or 5 times a power of ten."""
    base = 0.01 * spot
    mag = 10.0 ** np.floor(np.log10(base))
    return mag * np.where(base / mag < 2, 1.0, np.where(base / mag < 5, 2.0, 5.0))


def list_instruments(desk: DeskSpec, market: MarketPaths, d: int, store: ListedInstruments,
                     expiries: NDArray[np.datetime64], clean: NDArray[np.bool_], rng: np.random.Generator) -> None:
    """List on date ``d`` the expiries in the window and the grid strikes the listed ones do not cover.

    ``expiries``: the monthly expiry dates; ``clean``: per underlying, whether only clean books trade it
    (only their instruments may be marked without an implied vol).
    """
    day, tr = market.dates[d], desk.trading
    ahead = expiries[expiries > day]
    quarterly = ahead[(ahead <= day + tr.quarterly_horizon_days) & (ahead.astype("datetime64[M]").astype(int) % 3 == 2)]
    window = np.union1d(ahead[: tr.monthly_expiries], quarterly)
    grid = np.array(tr.strike_grid_sd)
    tau = (window - day).astype(float) / DAYS_PER_YEAR
    sd = market.atm_vol[d][:, None] * np.sqrt(np.maximum(tau, 1.0 / 12.0))[None, :]
    step = strike_step(market.spot[d])[:, None, None]
    strike = np.round(np.round(market.spot[d][:, None, None] * np.exp(grid * sd[:, :, None]) / step) * step, 8)
    und, exp_idx, _ = np.indices(strike.shape).reshape(3, -1)
    strike, sd_c, expiry = strike.ravel(), sd[und, exp_idx], window[exp_idx]
    series = series_key(und, expiry)
    _, first = np.unique(np.stack([series, np.round(strike * 1e6).astype(np.int64)]), axis=1, return_index=True)
    keep = np.sort(first)
    keep = keep[strike[keep] > 0]
    calls = np.flatnonzero(store.is_call & (store.expiry >= day))
    near = nearest_strike(strike_index(series_key(store.und[calls], store.expiry[calls]), np.log(store.strike[calls])),
                          series[keep], np.log(strike[keep]))
    listed = np.log(np.append(store.strike[calls], 1.0))[near]  # near = -1 (nothing listed) reads the dummy
    gap = np.where(near >= 0, np.abs(np.log(strike[keep]) - listed), np.inf)
    new = keep[gap > 0.75 * np.min(np.diff(np.unique(grid))) * sd_c[keep]]
    n = new.size
    store.und = np.concatenate([store.und, und[new], und[new]])
    store.is_call = np.concatenate([store.is_call, np.ones(n, bool), np.zeros(n, bool)])
    store.strike = np.concatenate([store.strike, strike[new], strike[new]])
    store.expiry = np.concatenate([store.expiry, expiry[new], expiry[new]])
    store.null_vol = np.concatenate([store.null_vol,
                                     (rng.random(2 * n) < tr.null_vol_share) & np.tile(clean[und[new]], 2)])
