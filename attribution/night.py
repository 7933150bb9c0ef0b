"""One night's position rows: market states on both dates, explain, lifecycle lines, exposures.

Takes the matched legs (:mod:`attribution.lifecycle`) and the two instrument markets
(:mod:`attribution.market`) and returns the ``position_pnl`` rows of the night as one frame,
all amounts in the reporting currency. All arithmetic is on whole arrays.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from attribution.activity import LegActivity
from attribution.american import Scheme
from attribution.arrays import BoolArray, FloatArray, ObjectArray
from attribution.contract import CleanNight
from attribution.dividends import income_per_unit
from attribution.exceptions_log import ExceptionLog
from attribution.explain import Explain, MarketState, explain_overnight
from attribution.frame_rows import moved_rows
from attribution.lifecycle import (
    CARRIED,
    CLOSED,
    EXERCISED,
    EXPIRED,
    EXPIRIES,
    NEW,
    NEW_UNPRICED,
    Legs,
    trade_date_flags,
)
from attribution.market import InstrumentMarket, take
from attribution.pricing import Greeks
from attribution.revaluation import FACTOR_NAMES
from attribution.schema import (
    EXPOSURE_COLUMNS,
    PNL_COLUMNS,
    POSITION_PNL,
    REVAL_COLUMNS,
    TAYLOR_TERMS,
    V2_AMOUNT_COLUMNS,
)
from attribution.smile_night import NightSmiles, vol_columns
from attribution.timebasis import DAYS_PER_YEAR_CALENDAR, TimeBasis
from attribution.valuation import FUTURE, KIND_NAMES, OPTION, revaluation_shares, settlement_value, value_and_greeks
from attribution.vol_time import VarianceClock, clock_terms, decay_per_year


def _state(market: InstrumentMarket, idx: NDArray[np.intp]) -> MarketState:
    return MarketState(market.spot[idx], market.vol[idx], market.tau_years[idx], market.rate[idx],
                       market.div_yield[idx], market.dividend_pv[idx])


def pair_blocks(rows: NDArray[np.intp], pair: NDArray[np.intp], size: int,
                ) -> Iterator[tuple[NDArray[np.intp], NDArray[np.intp]]]:
    """``rows`` (ascending) in blocks of about ``size``, with their ``pair`` codes: every row of one pair in one
    block (a pair of more than ``size`` rows is a block of its own), each block's rows ascending. One block (all
    of ``rows``) when they are ``size`` or fewer; none when there is no row."""
    if rows.size <= size:
        if rows.size:
            yield rows, pair
        return
    order = np.argsort(pair, kind="stable")
    ordered = pair[order]
    start = 0
    while start < rows.size:
        end = start + size
        if end >= rows.size:
            end = rows.size
        else:  # back to the first row of the pair found there, or on past it when the pair began at start
            end = int(np.searchsorted(ordered, ordered[end], side="left"))
            if end <= start:
                end = int(np.searchsorted(ordered, ordered[start], side="right"))
        block = np.sort(order[start:end])
        yield rows[block], pair[block]
        start = end


def _flags(parts: list[tuple[NDArray[np.bool_], str]], n: int) -> NDArray[np.object_]:
    """Comma-separated flag words per row (a loop over the few flag kinds, not over rows)."""
    out = np.full(n, "", dtype=object)
    for mask, word in parts:
        if mask.any():
            words = out[mask]
            out[mask] = np.where(words == "", word, words + ("," + word))
    return out


def _vol_and_time(ex: Explain, units: FloatArray, s0: MarketState, s1: MarketState, dt_years: float | FloatArray,
                  i0: NDArray[np.intp], i1: NDArray[np.intp], smiles: NightSmiles | None, dynamics: str,
                  clock: VarianceClock | None) -> dict[str, FloatArray]:
    """Theta's decay and carry, the vol terms' smile parts, and (with a variance clock) the restated terms."""
    g = ex.greeks_prior
    if clock is None:
        decay = units * decay_per_year(g, s0, np.ones(len(units))) * dt_years
        out = {"pnl_theta_decay": decay, "pnl_theta_carry": ex.theta - decay}
        vega_u, volga_u, vega, volga = g.vega, g.volga, ex.vega, ex.volga
    else:
        t = clock_terms(g, units, s0, s1, dt_years, clock.dt_years, clock.ratio0[i0], clock.ratio1[i1])
        out = {f"pnl_{name}": t[name] for name in ("vega", "volga", "vanna", "theta", "theta_decay", "theta_carry")}
        explained = ex.explained + sum(t[name] - getattr(ex, name) for name in ("vega", "volga", "vanna", "theta"))
        out.update(pnl_explained=explained, pnl_residual=ex.actual - explained, pnl_higher_order=ex.model - explained)
        vega_u, volga_u, vega, volga = t["vega_per_unit"], t["volga_per_unit"], t["vega"], t["volga"]
    if smiles is not None:
        out.update(_vol_parts(smiles, i0, i1, units, vega_u, volga_u, vega, volga, dynamics))
    return out


VOL_PARTS_ROWS = 1 << 16  # rows whose smile parts are computed at once (each part of each row is its own)


def _vol_parts(smiles: NightSmiles, i0: NDArray[np.intp], i1: NDArray[np.intp], units: FloatArray,
               vega_u: FloatArray, volga_u: FloatArray, vega: FloatArray, volga: FloatArray,
               dynamics: str) -> dict[str, FloatArray]:
    """:func:`~attribution.smile_night.vol_columns` over blocks of :data:`VOL_PARTS_ROWS` rows: the same values,
    without a dozen temporary arrays of every row at once (a million-position night: 100 MB less at its peak)."""
    n = len(units)
    if n <= VOL_PARTS_ROWS:
        return vol_columns(smiles, i0, i1, units, vega_u, volga_u, vega, volga, dynamics)
    out: dict[str, FloatArray] = {}
    for lo in range(0, n, VOL_PARTS_ROWS):
        rows = slice(lo, lo + VOL_PARTS_ROWS)
        part = vol_columns(smiles, i0[rows], i1[rows], units[rows], vega_u[rows], volga_u[rows], vega[rows],
                           volga[rows], dynamics)
        for name, values in part.items():
            out.setdefault(name, np.empty(n))[rows] = values
    return out


# Overnight rows explained at a time (whole instrument pairs). Each block's terms, states and greeks are temporaries
# of its rows: at 262,144 rows a block (before 2026-12-03) they were the explain's peak at a million positions
# (about 45 MB over the rows' own columns); at 65,536 they are a quarter of it, in the same time (7.2-7.4 s).
OVERNIGHT_BLOCK_ROWS = 65_536
_EXERCISE_NAMES = np.array([None, "european", "american"], dtype=object)


def _within(n: int) -> NDArray[np.object_]:
    """The placeholder limit state of ``n`` rows (the controls set each row's): one string object for every row.
    ``np.full(n, "within", dtype=object)`` would make one string per row (numpy converts the text to a
    fixed-width array first, then each element back to a new object): 58 MB at a million positions."""
    out = np.empty(n, dtype=object)
    out.fill("within")
    return out


def _names(codes: NDArray[np.int8], names: dict[int, str]) -> NDArray[np.object_]:
    """Names of codes (None for a code without one: the exercise of a delta-one kind)."""
    table = np.array([names.get(c) for c in range(-1, max(names) + 1)], dtype=object)
    return table[codes.astype(np.int16) + 1]  # two bytes a row for the places, not eight


def _activity_lines(cols: dict[str, object], activity: LegActivity, status: NDArray[np.object_], scale: FloatArray,
                    qty0: FloatArray, qty1: FloatArray) -> tuple[NDArray[np.bool_], NDArray[np.bool_]]:
    """Lifecycle lines from the run date's activity: a priced ``new`` activity prices the new trade (over
    positions.trade_price), every change is valued at its execution price, an exercised quantity at 0 (handed over
    for the underlying). ``scale`` is multiplier x FX. Returns the ``amended`` and ``amended_at_mark`` flags."""
    is_new = np.isin(status, [NEW, NEW_UNPRICED])
    cols["pnl_new_trade"] = np.where(is_new & activity.priced_new, scale * activity.fill_value, cols["pnl_new_trade"])
    changed = np.isin(status, [CARRIED, CLOSED, EXERCISED])
    exercised = status == EXERCISED
    # An exercise hands the option over for the underlying with no cash: the exercised part leaves at 0 (its
    # intrinsic value goes to the delivered underlying, a new trade priced at the strike), so the pair's P&L
    # is N (intrinsic - prior mark), counted once. A whole exercise is already explained to intrinsic.
    value = activity.fill_value + np.where(exercised, 0.0, activity.exercise_value)
    cols["pnl_amendment"] = np.where(changed, scale * (value + activity.given_up), 0.0)
    amended = changed & (((qty1 != qty0) & ~exercised) | (value != 0))
    return amended, changed & activity.at_mark


def _explain_expiring(cols: dict[str, object], e: NDArray[np.intp], market0: InstrumentMarket,
                      market1: InstrumentMarket, i0: NDArray[np.intp], i1: NDArray[np.intp], strike: FloatArray,
                      cp: FloatArray, units0: FloatArray, price0: FloatArray, dt_years: float,
                      revaluation: bool, american: NDArray[np.bool_], scheme: Scheme) -> None:
    """Rows ``e`` expire tonight (expiry after the prior date, on or before the run date): explained down to
    the intrinsic value at the run-date spot with tau1 = 0, with the same terms and revaluation as a night
    held. The vol is not observable at expiry, so it does not move (vega, volga and vanna are 0); time runs
    only to the expiry (min(night, tau0)); a rate or yield missing on the run date does not move either."""
    if not e.size:
        return
    s0, m1 = _state(market0, i0[e]), _state(market1, i1[e])
    # A settlement needs only the run-date spot: without a run-date rate or yield (no curve), they do not move.
    rate1 = np.where(np.isfinite(m1.rate), m1.rate, s0.rate)
    div1 = np.where(np.isfinite(m1.div_yield), m1.div_yield, s0.div_yield)
    s1 = MarketState(m1.spot, s0.vol, np.zeros(e.size), rate1, div1)
    settle = np.maximum(cp[e] * (m1.spot - strike[e]), 0.0)
    dt_e = np.minimum(dt_years, s0.tau_years)
    ex = explain_overnight(strike[e], cp[e], units0[e], s0, s1, price0[e], settle, dt_e, american[e], scheme=scheme)
    for name in ("actual", *TAYLOR_TERMS, "explained", "residual", "model", "higher_order", "mark_gap"):
        cols[f"pnl_{name}"][e] = getattr(ex, name)  # type: ignore[index]
    for name, values in _vol_and_time(ex, units0[e], s0, s1, dt_e, i0[e], i1[e], None, "", None).items():
        cols[name][e] = values  # type: ignore[index]
    if revaluation:
        shares = revaluation_shares(strike[e], cp[e], s0, s1, american[e], scheme=scheme)
        for factor in ("spot", "vol", "time", "rates", "dividend"):
            cols[f"reval_{factor}"][e] = units0[e] * getattr(shares, factor)  # type: ignore[index]


@dataclass(frozen=True, slots=True)
class FileColumns:
    """What the night's rows take of the two dates' position rows, one element per leg (:func:`file_columns`):
    gathered before the explain, so that those rows need not be held while it runs."""

    qty0: FloatArray          # the prior row's quantity (0 without one), before the activity restates it
    qty1: FloatArray          # the run-date row's quantity (0 when gone, expired or settled)
    trade_price1: FloatArray  # the run-date row's trade_price (NaN without one)
    late: BoolArray           # a new trade booked on or before the prior date
    moved_book: BoolArray     # held over into another book
    strategy: ObjectArray     # the desk's label: the run date's row, else the prior date's


def file_columns(legs: Legs, prior: CleanNight, run: CleanNight) -> FileColumns:
    """The position files' columns the rows of ``legs`` take (quantities, trade price, trade date, book, strategy)."""
    has_prior = legs.row0 >= 0
    expired = np.isin(legs.status, EXPIRIES)  # expired tonight, or settled on the prior date
    qty0 = np.where(has_prior, take(prior.positions["quantity"].to_numpy(float), legs.row0, 0.0), 0.0)
    held1 = (legs.row1 >= 0) & ~expired
    qty1 = np.where(held1, take(run.positions["quantity"].to_numpy(float), legs.row1, 0.0), 0.0)
    trade_price1 = take(run.positions["trade_price"].to_numpy(float), legs.row1, np.nan)
    late = trade_date_flags(run, legs, prior.raw.as_of)
    moved_book = (legs.status == CARRIED) & (legs.row1 >= 0) & (
        take(run.positions["book"].to_numpy(dtype=object), legs.row1, None) != legs.book)
    return FileColumns(qty0, qty1, trade_price1, late, moved_book, _strategy(legs, prior, run))


def position_values(legs: Legs, files: FileColumns, prior: CleanNight, run: CleanNight, market0: InstrumentMarket,
                    market1: InstrumentMarket, basis: TimeBasis, revaluation: bool, smiles: NightSmiles | None = None,
                    smile_dynamics: str = "sticky strike", clock: VarianceClock | None = None,
                    activity: LegActivity | None = None) -> tuple[dict[str, object], int]:
    """The columns of the night's ``position_pnl`` rows (a limit state placeholder), one row per accepted trade, and
    the number of rows: what :func:`position_frame` makes the rows of (a caller can let go of what it holds in
    between: the frame and the columns are then all there is of the night's rows).

    With ``smiles`` (:func:`attribution.smile_night.night_smiles`), the vol terms of positions held
    overnight are split into the smile's parts under ``smile_dynamics``; without, the parts stay 0.
    With a variance ``clock`` (:mod:`attribution.vol_time`) the vol and time terms are restated on it.
    With ``activity`` (:func:`attribution.activity.leg_activity`), changes are priced at their execution
    prices, corrections restate the prior quantity and whole exercises are explained to intrinsic value;
    without, a quantity change is priced at the run-date row's trade_price (version 1).
    ``files``: :func:`file_columns` of ``legs``, gathered before (the dates' position rows may be gone from
    ``prior`` and ``run``: their dates are what is read of them here). A caller that hands ``legs`` and ``files``
    over (keeps no reference to them) has their arrays freed as soon as the rows have what they need of them.
    """
    n = len(legs)
    as_of, prior_as_of = run.raw.as_of, prior.raw.as_of
    status = legs.status
    has_prior = legs.row0 >= 0
    overnight = np.isin(status, [CARRIED, CLOSED, EXERCISED])
    is_new = np.isin(status, [NEW, NEW_UNPRICED])
    expired = np.isin(status, EXPIRIES)  # expired tonight, or settled on the prior date
    i0 = np.maximum(legs.inst0, 0)
    i1 = legs.inst1
    qty0 = files.qty0
    if activity is not None:  # corrections and cancels restate the prior quantity, without P&L
        qty0 = np.where(has_prior, qty0 + activity.restated, 0.0)
    held1 = (legs.row1 >= 0) & ~expired
    qty1, trade_price1 = files.qty1, files.trade_price1
    book, trade_id, instrument_id = legs.book, legs.trade_id, legs.instrument_id
    fx_rate, fx_rate_prior = legs.fx_rate, legs.fx_rate_prior
    del legs  # its row places and prior instruments: freed here when the caller has handed the legs over
    mult = market1.multiplier[i1]
    strike, cp = market1.strike[i1], market1.cp[i1]
    american, scheme = market1.american[i1], market1.american_scheme
    crossed = np.zeros(n, dtype=bool)
    kind = market1.kind[i1]
    option = kind == OPTION
    units0 = qty0 * mult * fx_rate
    units1 = qty1 * mult * fx_rate
    dt_years = float(basis.year_fraction(prior_as_of, as_of)[0])
    late, moved_book, strategy = files.late, files.moved_book, files.strategy
    del files  # its arrays are held by the names above only: each freed where its name is

    cols: dict[str, object] = {c: np.zeros(n) for c in PNL_COLUMNS}
    cols.update({c: np.full(n, np.nan) for c in REVAL_COLUMNS})
    cols.update({c: np.zeros(n) for c in EXPOSURE_COLUMNS})
    cols.update({c: np.zeros(n) for c in V2_AMOUNT_COLUMNS})

    price0 = np.where(has_prior, market0.price[i0], np.nan)
    price1 = np.where(expired, np.nan, market1.price[i1])
    exercised = status == EXERCISED
    if exercised.any():  # explained like a close, to the intrinsic value at the run-date spot
        price1 = np.where(exercised, settlement_value(kind, market1.spot[i1], strike, cp), price1)

    # Greeks at the prior state of everything held on the prior date, once per instrument (American: 7 boundaries).
    p = np.flatnonzero(has_prior)
    g0, exercised0 = value_and_greeks(strike[p], cp[p], _state(market0, i0[p]), american[p], kind=kind[p],
                                      scheme=scheme, group=i0[p])
    in_p = np.full(n, -1, dtype=np.intp)
    in_p[p] = np.arange(p.size)

    # Exposures at the prior state, for everything held on the prior date.
    if p.size:
        s0 = _state(market0, i0[p])
        cols["delta_units"][p] = units0[p] / fx_rate[p] * g0.delta
        cols["delta_cash"][p] = units0[p] * g0.delta * s0.spot
        cols["gamma_cash_1pct"][p] = units0[p] * g0.gamma * s0.spot * s0.spot / 100.0
        cols["vega_per_vol_point"][p] = units0[p] * g0.vega / 100.0
        cols["theta_per_calendar_day"][p] = units0[p] * g0.theta_per_year / DAYS_PER_YEAR_CALENDAR
        # One business day under the run's basis: 1/252 under BUS/252; under ACT/365F the calendar days from
        # the prior date to its next business day / 365 (3/365 from a Friday), not a year / 252.
        one_day = float(basis.year_fraction(prior_as_of, basis.next_business_day(prior_as_of))[0])
        cols["theta_per_business_day"][p] = units0[p] * g0.theta_per_year * one_day
        del s0

    # The overnight explain, in blocks of whole instruments (rows of one instrument pair stay in one block, so
    # each pair is priced once): a row's figures depend on its own inputs alone, so the blocks change no value,
    # and a million rows' terms, states and shares are never held at once.
    overnight_rows = np.flatnonzero(overnight)
    overnight_pairs = i0[overnight_rows] * (len(market1.ids) + 1) + i1[overnight_rows]
    for k, pair in pair_blocks(overnight_rows, overnight_pairs, OVERNIGHT_BLOCK_ROWS):
        kp = in_p[k]
        prior_greeks = (Greeks(*(getattr(g0, name)[kp] for name in Greeks.__slots__)), exercised0[kp])
        s0, s1 = _state(market0, i0[k]), _state(market1, i1[k])
        ex = explain_overnight(strike[k], cp[k], units0[k], s0, s1, price0[k], price1[k], np.full(k.size, dt_years),
                               american[k], scheme=scheme, group=pair, prior=prior_greeks, kind=kind[k])
        crossed[k] = ex.crossed_boundary
        for name in ("actual", *TAYLOR_TERMS, "explained", "residual", "model", "higher_order", "mark_gap"):
            cols[f"pnl_{name}"][k] = getattr(ex, name)
        for name, values in _vol_and_time(ex, units0[k], s0, s1, dt_years, i0[k], i1[k], smiles, smile_dynamics,
                                          clock).items():
            cols[name][k] = values
        del ex, prior_greeks  # the block's terms and greeks: freed before the revaluation's states
        if revaluation:
            shares = revaluation_shares(strike[k], cp[k], s0, s1, american[k], kind=kind[k], scheme=scheme,
                                        group=pair)
            for factor in FACTOR_NAMES:
                cols[f"reval_{factor}"][k] = units0[k] * getattr(shares, factor)
            del shares
        del s0, s1
    del g0, exercised0, in_p  # the prior greeks of a million rows

    expiring_option = (status == EXPIRED) & option
    _explain_expiring(cols, np.flatnonzero(expiring_option), market0, market1, i0, i1, strike, cp, units0, price0,
                      dt_years, revaluation, american, scheme)

    # Decay expected to the next business day, from the run-date state of what is still held.
    h = np.flatnonzero(held1)
    if h.size:
        next_day = basis.next_business_day(as_of)
        step_years = float(basis.year_fraction(as_of, next_day)[0])
        s1 = _state(market1, i1[h])
        g1, _ = value_and_greeks(strike[h], cp[h], s1, american[h], kind=kind[h], scheme=scheme, group=i1[h],
                                 full=False)
        cols["theta_next_business_day"][h] = units1[h] * g1.theta_per_year * step_years
        del s1, g1

    # Lifecycle lines.
    cols["pnl_new_trade"] = np.where(is_new, units1 * (market1.price[i1] - trade_price1), 0.0)
    settle_spot = np.where(market1.expiry[i1] <= np.datetime64(prior_as_of, "D"), market0.spot[i0], market1.spot[i1])
    intrinsic = settlement_value(kind, settle_spot, strike, cp)
    # An option expiring tonight is explained down to intrinsic above; only a settlement that differs from the
    # close stays a lifecycle line (a trade still in the prior file on its expiry date, settled by that night's
    # run), and a future or forward settles here as before.
    cols["pnl_expiry"] = np.where(expired & ~expiring_option, units0 * (intrinsic - np.nan_to_num(price0)), 0.0)
    amended = (status == CARRIED) & (qty1 != qty0)
    fill_price = np.where(np.isnan(trade_price1), market1.price[i1], trade_price1)
    cols["pnl_amendment"] = np.where(amended, (qty1 - qty0) * mult * fx_rate * (market1.price[i1] - fill_price),
                                     0.0)
    at_mark = amended & np.isnan(trade_price1)
    if activity is not None:
        amended, at_mark = _activity_lines(cols, activity, status, mult * fx_rate, qty0, qty1)
    # The prior value revalued at the run date's rate (the terms above are all at the run date's rate). A future
    # is margined daily: its value after the prior night's settlement is 0, so it has nothing to translate (its
    # settlement price is not a value held in the currency).
    value0 = np.where(kind == FUTURE, 0.0, np.nan_to_num(price0))
    cols["pnl_fx_translation"] = np.where(has_prior, qty0 * mult * value0
                                          * (fx_rate - np.nan_to_num(fx_rate_prior)), 0.0)
    cols["pnl_total"] = (cols["pnl_actual"] + np.nan_to_num(cols["pnl_new_trade"]) + cols["pnl_expiry"]
                         + cols["pnl_amendment"] + cols["pnl_fx_translation"] + cols["pnl_cash"])

    del units0, units1, trade_price1, settle_spot, intrinsic, fill_price, value0  # freed before the columns below

    flags = _flags([
        (amended, "amended"),
        (crossed, "crossed_exercise_boundary"),
        (at_mark, "amended_at_mark"),
        (np.zeros(n, dtype=bool) if activity is None else activity.restated != 0, "restated"),
        (status == NEW_UNPRICED, "unpriced"),
        (late, "booked_late"),
        (moved_book, "moved_book"),
        ((has_prior & market0.vol_solved[i0]) | (~expired & market1.vol_solved[i1]), "vol_solved"),
        ((has_prior & market0.vol_mismatch[i0]) | (~expired & market1.vol_mismatch[i1]), "vol_price_mismatch"),
        ((has_prior & market0.rolled()[i0]) | (~expired & market1.rolled()[i1]), "mark_rolled"),
    ], n)

    values: dict[str, object] = {
        "as_of": pd.Timestamp(as_of), "prior_as_of": pd.Timestamp(prior_as_of),
        "book": book, "trade_id": trade_id, "instrument_id": instrument_id,
        "underlying": market1.underlying[i1], "currency": market1.currency[i1], "status": status, "flags": flags,
        "option_type": market1.option_type[i1], "strike": strike,
        "expiry": market1.expiry[i1].astype("datetime64[s]"),
        "quantity": np.where(is_new, qty1, qty0), "quantity_run_date": qty1, "multiplier": mult,
        "fx_rate": fx_rate,
        "spot_prior": np.where(has_prior, market0.spot[i0], np.nan), "spot_run": market1.spot[i1],
        "vol_prior": np.where(has_prior & option, market0.vol[i0], np.nan),
        "vol_run": np.where(expired | ~option, np.nan, market1.vol[i1]),
        "tau_prior_years": np.where(has_prior, market0.tau_years[i0], np.nan),
        "tau_run_years": market1.tau_years[i1],
        "rate_prior": np.where(has_prior, market0.rate[i0], np.nan), "rate_run": market1.rate[i1],
        "div_yield_prior": np.where(has_prior, market0.div_yield[i0], np.nan), "div_yield_run": market1.div_yield[i1],
        "price_prior": price0, "price_run": price1,
        "div_pv_prior": np.where(has_prior, market0.dividend_pv[i0], np.nan),
        "div_pv_run": np.where(expired, np.nan, market1.dividend_pv[i1]),
        **cols,
        "strategy": strategy,
    }
    del i0, qty0, cp  # no column of the rows: freed before the last columns are made
    values["limit_state"] = _within(n)
    values["kind"] = _names(kind, KIND_NAMES)
    # one string object per name, picked by one-byte codes (0 none, 1 european, 2 american)
    values["exercise"] = _EXERCISE_NAMES[option.astype(np.uint8) + (option & american).astype(np.uint8)]
    return values, n


def position_frame(values: dict[str, object], n: int) -> pd.DataFrame:
    """The ``position_pnl`` frame of ``values`` (name -> array or scalar), in the archive's column order.

    Built once, without copies: every array becomes its own column as it is (nothing is consolidated or
    reordered afterwards), and text columns stay Python objects (no conversion of a million strings
    into another string type: the archive converts them once, dictionary-encoded).
    """
    def column(value: object) -> object:
        if isinstance(value, np.ndarray) and value.dtype == object:
            return pd.Series(value, dtype=object, copy=False)
        return value

    return pd.DataFrame({name: column(values[name]) for name, _ in POSITION_PNL}, index=pd.RangeIndex(n), copy=False)


def _strategy(legs: Legs, prior: CleanNight, run: CleanNight) -> NDArray[np.object_]:
    """The desk's strategy label of each trade: the run date's row, else the prior date's (closed, expired)."""
    run_label = take(run.positions["strategy"].to_numpy(dtype=object), legs.row1, None)
    prior_label = take(prior.positions["strategy"].to_numpy(dtype=object), legs.row0, None)
    return np.where(pd.isna(run_label), prior_label, run_label)


def stale_flags(frame: pd.DataFrame, stale_instruments: NDArray[np.object_]) -> pd.DataFrame:
    """Add the ``stale_mark`` flag to rows whose run-date mark was found stale."""
    if not len(stale_instruments):  # the usual night: nothing to flag
        return frame
    hit = frame["instrument_id"].isin(stale_instruments).to_numpy() & ~frame["status"].isin(EXPIRIES).to_numpy()
    if hit.any():
        flags = frame["flags"].to_numpy(dtype=object).copy()
        flags[hit] = np.where(flags[hit] == "", "stale_mark", flags[hit] + ",stale_mark")
        frame = frame.assign(flags=flags)
    return frame


def corporate_flags(frame: pd.DataFrame, restated: pd.Series, went_ex: pd.DataFrame) -> pd.DataFrame:
    """Flag the rows held over a night whose underlying was restated for a split (``restated``) or
    had a dividend going ex (``ex_dividend``); a reader sees why a strike or a spot jumped."""
    if restated.empty and went_ex.empty:  # the usual night: nothing to flag
        return frame
    held = frame["status"].isin([CARRIED, CLOSED, *EXPIRIES]).to_numpy()
    underlying = frame["underlying"]
    parts = [(held & underlying.isin(restated.index).to_numpy(), "restated"),
             (held & underlying.isin(went_ex["underlying"]).to_numpy(), "ex_dividend")]
    if not any(mask.any() for mask, _ in parts):
        return frame
    flags = frame["flags"].to_numpy(dtype=object).copy()
    for mask, word in parts:
        flags[mask] = np.where(flags[mask] == "", word, flags[mask] + "," + word)
    return frame.assign(flags=flags)


def dividend_income(frame: pd.DataFrame, went_ex: pd.DataFrame) -> pd.DataFrame:
    """Holders of the underlying itself on the prior date earn the dividends going ex tonight in ``pnl_cash``.

    Per row of kind ``underlying`` held over the night: quantity x multiplier x FX x amount, added to
    ``pnl_cash`` and ``pnl_total`` (so other cash of the row adds to it).
    """
    if went_ex.empty:
        return frame
    holder = (frame["kind"] == "underlying").to_numpy() & frame["status"].isin([CARRIED, CLOSED]).to_numpy()
    if not holder.any():
        return frame
    per_unit = income_per_unit(went_ex, frame["underlying"].to_numpy(dtype=object)[holder])
    cash = np.zeros(len(frame))
    cash[holder] = (frame["quantity"].to_numpy(float)[holder] * frame["multiplier"].to_numpy(float)[holder]
                    * frame["fx_rate"].to_numpy(float)[holder] * per_unit)
    return frame.assign(pnl_cash=frame["pnl_cash"].to_numpy(float) + cash,
                        pnl_total=frame["pnl_total"].to_numpy(float) + cash)


def reject_non_finite(frame: pd.DataFrame, prior_file: str, run_file: str, log: ExceptionLog) -> pd.DataFrame:
    """Rows with an amount that is not a finite number (an overflow from an absurd multiplier or FX
    rate, an underflow from a denormal spot) leave the night with a ``rejected`` row keyed by the
    trade_id, naming the columns and the inputs to check; nothing non-finite reaches the archive. When a row
    leaves, ``frame`` is consumed (:func:`~attribution.frame_rows.moved_rows`): pass the night's only reference."""
    amounts = [c for c in (*PNL_COLUMNS, *EXPOSURE_COLUMNS, *V2_AMOUNT_COLUMNS) if c in frame.columns]
    unpriced = (frame["status"] == NEW_UNPRICED).to_numpy()  # no trade price: pnl_new_trade is NULL by design
    suspect = _non_finite_rows(frame, amounts, unpriced)  # column by column: no copy of the whole table
    if not suspect.any():
        return frame
    rows = frame.loc[suspect]
    values = rows[amounts].to_numpy(dtype=float)
    bad_cell = ~np.isfinite(values)
    unpriced = (rows["status"] == NEW_UNPRICED).to_numpy()
    bad_cell[:, amounts.index("pnl_new_trade")] &= ~(unpriced & np.isnan(values[:, amounts.index("pnl_new_trade")]))
    reval = rows[list(REVAL_COLUMNS)].to_numpy(dtype=float)
    bad_reval = np.isinf(reval) | (np.isnan(reval) & ~np.isnan(reval).all(axis=1, keepdims=True))
    bad = bad_cell.any(axis=1) | bad_reval.any(axis=1)
    names = np.array(amounts + list(REVAL_COLUMNS), dtype=object)
    cells = np.concatenate([bad_cell, bad_reval], axis=1)[bad]
    rows = rows.loc[bad]
    detail = [f"{', '.join(names[c][:4])}{' ...' if c.sum() > 4 else ''} not finite; inputs: multiplier {m:.6g}, "
              f"fx_rate {f:.6g}, spot {s0:.6g} -> {s1:.6g}, price {p0:.6g} -> {p1:.6g}"
              for c, m, f, s0, s1, p0, p1 in zip(cells, rows["multiplier"], rows["fx_rate"], rows["spot_prior"],
                                                 rows["spot_run"], rows["price_prior"], rows["price_run"], strict=True)]
    on_prior = rows["status"].isin([CARRIED, CLOSED, *EXPIRIES]).to_numpy()
    detail_arr = np.array(detail, dtype=object)
    trades = rows["trade_id"].to_numpy(dtype=object)
    for file, mine in ((prior_file, on_prior), (run_file, ~on_prior)):
        log.add(file, trades[mine], "P&L is not a finite number", detail_arr[mine])
    return moved_rows(frame, ~frame.index.isin(rows.index))  # the kept rows, a column at a time


def _non_finite_rows(frame: pd.DataFrame, amounts: list[str], unpriced: NDArray[np.bool_]) -> NDArray[np.bool_]:
    """Rows with an amount or a revaluation share that is not finite (a NaN share only when the row has another)."""
    bad = np.zeros(len(frame), dtype=bool)
    for name in amounts:
        values = frame[name].to_numpy(dtype=float)
        cell = ~np.isfinite(values)
        if name == "pnl_new_trade":
            cell &= ~(unpriced & np.isnan(values))
        bad |= cell
    nan_share = np.zeros(len(frame), dtype=bool)
    all_nan = np.ones(len(frame), dtype=bool)
    for name in REVAL_COLUMNS:
        values = frame[name].to_numpy(dtype=float)
        bad |= np.isinf(values)
        nan_share |= np.isnan(values)
        all_nan &= np.isnan(values)
    return bad | (nan_share & ~all_nan)

