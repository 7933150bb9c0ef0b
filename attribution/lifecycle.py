"""Matching the prior date's and the run date's positions by trade_id, and each leg's checks.

Statuses (see README.md, "Statuses"):

* ``carried``: held on both dates; explained on the prior quantity, a quantity change is an
  amendment line;
* ``closed``: held on the prior date only; explained to the run-date mark;
* ``new`` / ``new_unpriced``: booked on the run date, with / without a trade price;
* ``expired``: held on the prior date, expiry after it and on or before the run date; settles at
  intrinsic on the run-date spot;
* ``settled``: held on the prior date, its expiry date: already settled by that night's run (as
  ``expired``), it is carried here with the (normally zero) change from its expiry-day mark to
  intrinsic, so that an expiry is counted once.

A trade whose leg on either date cannot be used is rejected whole: it gets a ``rejected`` row
keyed by its trade_id for each failing leg, and no row in ``position_pnl``.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from attribution import keys
from attribution.contract import CleanNight
from attribution.exceptions_log import ExceptionLog
from attribution.market import InstrumentMarket, take

CARRIED, CLOSED, NEW, NEW_UNPRICED, EXPIRED, SETTLED = "carried", "closed", "new", "new_unpriced", "expired", "settled"
EXERCISED = "exercised"  # exercised or assigned whole on the run date (trade_activity.parquet)
STATUSES = (CARRIED, CLOSED, NEW, NEW_UNPRICED, EXPIRED, SETTLED, EXERCISED)
EXPIRIES = (EXPIRED, SETTLED)


@dataclass(frozen=True, slots=True)
class Legs:
    """One element per accepted trade: where it sits on each date and its status."""

    trade_id: NDArray[np.object_]
    book: NDArray[np.object_]
    instrument_id: NDArray[np.object_]
    status: NDArray[np.object_]
    row0: NDArray[np.intp]   # row in the prior positions, -1 for new trades
    row1: NDArray[np.intp]   # row in the run-date positions, -1 when gone
    inst0: NDArray[np.intp]  # instrument in the prior market, -1 for new trades
    inst1: NDArray[np.intp]  # instrument in the run-date market
    fx_rate: NDArray[np.float64]        # the run date's rate of the currency (reporting currency per unit)
    fx_rate_prior: NDArray[np.float64]  # the prior date's rate; NaN for trades booked on the run date

    def __len__(self) -> int:
        return len(self.trade_id)


def _reject(log: ExceptionLog, file: str, trade_ids: NDArray[np.object_], bad: NDArray[np.bool_],
            rule: str, detail: str | NDArray[np.object_]) -> None:
    if bad.any():
        log.add(file, trade_ids[bad], rule, detail[bad] if isinstance(detail, np.ndarray) else detail)


def _reject_by_reason(log: ExceptionLog, file: str, trade_ids: NDArray[np.object_], bad: NDArray[np.bool_],
                      rule: str, reason: NDArray[np.object_]) -> None:
    """Like ``_reject``, but a position in an option already expired gets its own rule."""
    lapsed = np.zeros(len(bad), dtype=bool)  # the texts of the rejected rows only
    lapsed[bad] = [str(text).startswith("the option expired") for text in reason[bad]]
    _reject(log, file, trade_ids, lapsed, "active position on an expired option", reason)
    _reject(log, file, trade_ids, bad & ~lapsed, rule, reason)


def _leg_reason(night: CleanNight, market: InstrumentMarket, inst_ids: NDArray[np.object_],
                idx: NDArray[np.intp]) -> NDArray[np.object_]:
    """Why a position of ``night``'s date cannot be priced on that date ("" where it can).

    A position needs a clean row for its instrument in its own date's instruments file: terms
    borrowed from the other date are only for settling trades this date no longer holds.
    """
    as_of = night.raw.as_of
    reason = take(market.reason, idx, "").astype(object, copy=False)
    absent = ~take(market.listed, idx, False)  # only these rows need the file's list (texts made for them alone)
    if absent.any():
        in_file = pd.Series(inst_ids[absent], dtype=object).isin(
            night.raw.tables["instruments.parquet"]["instrument_id"]).to_numpy()
        reason[absent] = np.where(in_file, f"its row in instruments.parquet of {as_of} breaks a rule (see that row)",
                                  f"instrument_id not in instruments.parquet of {as_of}").astype(object)
    return reason


def _terms_changed(market0: InstrumentMarket, market1: InstrumentMarket, instruments_file: str,
                   log: ExceptionLog) -> NDArray[np.bool_]:
    """Per instrument of ``market0``: listed on both dates with different terms (logged per instrument)."""
    j = market1.places(market0.ids)
    both = market0.listed & take(market1.listed, j, False)
    detail = np.full(len(j), "", dtype=object)
    jj = np.where(both, j, 0)
    for name in ("kind", "underlying", "option_type", "american", "strike", "expiry", "multiplier",
                 "currency"):  # eight fields, not rows
        if not both.any():
            break
        before, after = getattr(market0, name), getattr(market1, name)
        differs = both & (before != after[jj]) & ~(pd.isna(before) & pd.isna(after[jj]))  # a null term is no change
        if differs.any():
            text = pd.Series(before[differs]).astype(str) + " -> " + pd.Series(after[jj][differs]).astype(str)
            detail[differs] = detail[differs] + f"{name} " + text.to_numpy(dtype=object) + "; "
    changed = detail != ""
    log.add(instruments_file, market0.ids[changed].to_numpy(), "instrument terms changed between dates",
            pd.Series(detail[changed], dtype=object).str.rstrip("; ").to_numpy(dtype=object))
    return changed


def match_keys(left: NDArray[np.object_], right: NDArray[np.object_]) -> tuple[NDArray[np.intp], NDArray[np.intp]]:
    """For unique keys on each side: the row of each left key on the right (-1 if absent), and back.

    One hash pass over both sides (``pd.factorize`` on object arrays) and integer look-ups after it,
    which is several times faster than building string indexes for millions of trade ids.
    """
    codes, uniques = pd.factorize(np.concatenate([left, right]), use_na_sentinel=False)
    left_codes, right_codes = codes[: len(left)], codes[len(left):]
    where_right = np.full(len(uniques), -1, dtype=np.intp)
    where_right[right_codes] = np.arange(len(right), dtype=np.intp)
    where_left = np.full(len(uniques), -1, dtype=np.intp)
    where_left[left_codes] = np.arange(len(left), dtype=np.intp)
    return where_right[left_codes], where_left[right_codes]


def _locate(market: InstrumentMarket, night: CleanNight, instrument_ids: NDArray[np.object_]) -> NDArray[np.intp]:
    """Index in ``market`` of the instrument of each of ``night``'s clean positions (``instrument_ids``), -1
    where absent: by the codes from reading when the night has them (each distinct id looked up once)."""
    coded = night.position_keys.get("instrument_id")
    if coded is None or len(coded) != len(instrument_ids):
        return market.locate(instrument_ids)
    return market.locate_codes(coded)


def _other_instrument(at0: NDArray[np.intp], at1: NDArray[np.intp], ids0: NDArray[np.object_],
                      ids1: NDArray[np.object_]) -> NDArray[np.bool_]:
    """Per pair of rows: their instrument ids differ. ``at0``, ``at1``: the ids' places in one market (whose ids are
    distinct; -1 where absent), so two places found differ exactly when the ids do; only ids found in neither
    are compared as text."""
    differs = at0 != at1
    neither = np.flatnonzero((at0 < 0) & (at1 < 0))
    if neither.size:
        differs[neither] = ids0[neither] != ids1[neither]
    return differs


def match_legs(prior: CleanNight, run: CleanNight, market0: InstrumentMarket, market1: InstrumentMarket,
               log: ExceptionLog, trades: keys.NightTrades | None = None) -> Legs:
    """Match trades across the two dates, run each leg's checks, and return the accepted ones.

    ``trades``: the two files' trade ids already matched (:class:`attribution.keys.NightTrades`), if done."""
    p0, p1 = prior.positions, run.positions
    file0, file1 = prior.raw.path("positions.parquet"), run.raw.path("positions.parquet")
    run_day = np.datetime64(run.raw.as_of, "D")
    ids0, ids1 = p0["trade_id"].to_numpy(dtype=object), p1["trade_id"].to_numpy(dtype=object)
    coded = [night.position_keys.get("trade_id") for night in (prior, run)]
    if coded[0] is not None and coded[1] is not None and (len(coded[0]), len(coded[1])) == (len(ids0), len(ids1)):
        at = trades.run_in_prior if trades is not None and trades.matches(coded[0], coded[1]) else None
        j1, j0 = keys.match(coded[0], coded[1], at)  # prior row -> run row, run row -> prior row
    else:
        j1, j0 = match_keys(ids0, ids1)
    ok0 = np.ones(len(p0), dtype=bool)
    ok1 = np.ones(len(p1), dtype=bool)

    # The other leg was rejected by a row rule on its own date.
    gone1 = pd.Series(ids0, dtype=object).isin(run.rejected_trades["trade_id"]).to_numpy()
    gone0 = pd.Series(ids1, dtype=object).isin(prior.rejected_trades["trade_id"]).to_numpy()
    _reject(log, file0, ids0, gone1, "trade rejected on the other date",
            f"its row in {file1} breaks a rule (see that row)")
    _reject(log, file1, ids1, gone0, "trade rejected on the other date",
            f"its row in {file0} breaks a rule (see that row)")
    ok0 &= ~gone1
    ok1 &= ~gone0

    inst_p0 = p0["instrument_id"].to_numpy(dtype=object)
    inst_p1 = p1["instrument_id"].to_numpy(dtype=object)
    both = j1 >= 0
    i0 = _locate(market0, prior, inst_p0)
    i1_of_p1 = _locate(market1, run, inst_p1)
    i1_of_p0 = _locate(market1, prior, inst_p0)
    changed = np.zeros(len(p0), dtype=bool)
    changed[both] = _other_instrument(i1_of_p0[both], i1_of_p1[j1[both]], inst_p0[both], inst_p1[j1[both]])
    _reject(log, file1, ids0, ok0 & changed, "trade changed instrument between dates",
            "a trade_id must keep its instrument; book a close and a new trade instead")
    ok0 &= ~changed
    ok1[j1[changed]] = False

    expiry0 = take(market0.expiry, i0, np.datetime64("NaT"))
    expired = (i0 >= 0) & (expiry0 <= run_day)

    # Instruments are static: every trade in an option whose terms differ between the two files is
    # rejected (the instrument gets a row of its own); a carried trade gets one row, on the prior date.
    moved = _terms_changed(market0, market1, run.raw.path("instruments.parquet"), log)
    moved0 = ok0 & take(moved, i0, False)
    moved1 = ok1 & (j0 < 0) & take(moved, _locate(market0, run, inst_p1), False)
    for file, ids, inst, bad in ((file0, ids0, inst_p0, moved0), (file1, ids1, inst_p1, moved1)):  # two dates
        detail = np.full(len(inst), "", dtype=object)  # texts for the rejected rows only
        detail[bad] = ("the terms of " + inst[bad].astype(str)
                       + " differ between the two instruments files (see that row)")
        _reject(log, file, ids, bad, "instrument terms changed between dates", detail)
    ok0 &= ~moved0
    ok1 &= ~moved1

    # Prior leg: the instrument must be listed and priced on the prior date (this also catches a
    # position held on the prior date in an option that had already expired).
    reason0 = _leg_reason(prior, market0, inst_p0, i0)
    bad0 = ok0 & (reason0 != "")
    _reject_by_reason(log, file0, ids0, bad0, "position cannot be priced on the prior date", reason0)
    ok0 &= ~bad0

    # Run leg of trades still held and not expired: listed and priced on the run date.
    active1 = np.ones(len(p1), dtype=bool)
    expires_tonight = expired & (expiry0 == run_day)
    active1[j0 >= 0] = ~expires_tonight[j0[j0 >= 0]]
    reason1 = _leg_reason(run, market1, inst_p1, i1_of_p1)
    bad1 = ok1 & active1 & (reason1 != "")
    _reject_by_reason(log, file1, ids1, bad1, "position cannot be priced on the run date", reason1)
    ok1 &= ~bad1

    ok0 &= ~_settle_checks(prior, run, market1, ids0, ok0, both, expired, expiry0, i1_of_p0, log)

    # A failure on either leg rejects the trade on both dates.
    held = both & ok0 & take(ok1, np.where(both, j1, -1), False)
    ok0 &= held | ~both
    ok1[j1[both & ~held]] = False
    ok1[(j0 >= 0)] &= ok0[j0[j0 >= 0]]

    settled = expired & (expiry0 <= np.datetime64(prior.raw.as_of, "D"))
    legs = _assemble(p0, p1, ids0, ids1, j1, j0, ok0, ok1, expired, settled, i0, i1_of_p0, i1_of_p1, run)
    return _apply_fx(legs, prior, run, market1, log)


def _settle_checks(prior: CleanNight, run: CleanNight, market1: InstrumentMarket, ids0: NDArray[np.object_],
                   ok0: NDArray[np.bool_], both: NDArray[np.bool_], expired: NDArray[np.bool_],
                   expiry0: NDArray[np.datetime64], i1_of_p0: NDArray[np.intp], log: ExceptionLog,
                   ) -> NDArray[np.bool_]:
    """Prior-date trades gone or expired by the run date: closed ones need the run date's mark,
    expired ones the run date's spot and no rejected run-date terms. Returns the failures."""
    file0 = prior.raw.path("positions.parquet")
    closed = ok0 & ~both & ~expired
    bad_closed = closed & ~take(market1.usable, i1_of_p0, False)
    _reject(log, file0, ids0, bad_closed, "closed position cannot be priced on the run date",
            take(market1.reason, i1_of_p0, "no run-date terms").astype(object))
    settle_on_run = ok0 & expired & (expiry0 > np.datetime64(prior.raw.as_of, "D"))
    terms_bad = take(market1.terms_rejected, i1_of_p0, True)
    bad_exp = settle_on_run & (terms_bad | ~take(market1.spot_known, i1_of_p0, False))
    detail = np.full(len(ids0), "", dtype=object)  # texts for the rejected rows only
    detail[bad_exp] = np.where(terms_bad[bad_exp],
                               f"its row in instruments.parquet of {run.raw.as_of} breaks a rule (see that row)",
                               f"its underlying has no spot on {run.raw.as_of}")
    _reject(log, file0, ids0, bad_exp, "expired position cannot be settled", detail)
    return bad_closed | bad_exp


def _assemble(p0: pd.DataFrame, p1: pd.DataFrame, ids0: NDArray[np.object_], ids1: NDArray[np.object_],
              j1: NDArray[np.intp], j0: NDArray[np.intp], ok0: NDArray[np.bool_], ok1: NDArray[np.bool_],
              expired: NDArray[np.bool_], settled: NDArray[np.bool_], i0: NDArray[np.intp],
              i1_of_p0: NDArray[np.intp], i1_of_p1: NDArray[np.intp], run: CleanNight) -> Legs:
    from_prior = np.flatnonzero(ok0)
    new_rows = np.flatnonzero(ok1 & (j0 < 0))
    # statuses as codes into one table of the status texts (no million-row text arrays built and converted)
    names = np.array([CARRIED, CLOSED, EXPIRED, SETTLED, NEW, NEW_UNPRICED], dtype=object)
    code_prior = np.where(expired[from_prior], 2, np.where(j1[from_prior] >= 0, 0, 1))
    priced = ~np.isnan(p1["trade_price"].to_numpy(dtype=float)[new_rows])
    status_new = names[np.where(priced, 4, 5)]
    row1_prior = np.where(code_prior == 0, j1[from_prior], -1)
    row1_prior = np.where((code_prior == 2) & (j1[from_prior] >= 0), j1[from_prior], row1_prior)
    status_prior = names[np.where(settled[from_prior], 3, code_prior)]
    return Legs(
        trade_id=np.concatenate([ids0[from_prior], ids1[new_rows]]),
        book=np.concatenate([p0["book"].to_numpy(dtype=object)[from_prior],
                             p1["book"].to_numpy(dtype=object)[new_rows]]),
        instrument_id=np.concatenate([p0["instrument_id"].to_numpy(dtype=object)[from_prior],
                                      p1["instrument_id"].to_numpy(dtype=object)[new_rows]]),
        status=np.concatenate([status_prior, status_new]),
        row0=np.concatenate([from_prior, np.full(len(new_rows), -1)]).astype(np.intp),
        row1=np.concatenate([row1_prior, new_rows]).astype(np.intp),
        inst0=np.concatenate([i0[from_prior], np.full(len(new_rows), -1)]).astype(np.intp),
        inst1=np.concatenate([i1_of_p0[from_prior], i1_of_p1[new_rows]]).astype(np.intp),
        fx_rate=np.zeros(len(from_prior) + len(new_rows)),
        fx_rate_prior=np.zeros(len(from_prior) + len(new_rows)),
    )


def _apply_fx(legs: Legs, prior: CleanNight, run: CleanNight, market1: InstrumentMarket,
              log: ExceptionLog) -> Legs:
    """Attach each trade's FX rates of its currency on both dates; a trade without one is rejected.

    The run date's rate converts the explain; the prior date's rate (for a trade held on the prior
    date) is needed for the translation of its prior value, so a missing prior rate rejects the
    trade like a missing run-date rate.
    """
    currency = market1.currency[legs.inst1]
    # each instrument's rates, looked up once per instrument (its currency coded once), then taken per trade
    fx_rate = rates_of(run.fx, market1.currency)[legs.inst1]
    held0 = legs.row0 >= 0
    fx_rate_prior = np.where(held0, rates_of(prior.fx, market1.currency)[legs.inst1], np.nan)
    missing = np.isnan(fx_rate)
    _reject_no_fx(log, prior, run, legs, currency, missing, run)
    missing_prior = ~missing & held0 & np.isnan(fx_rate_prior)
    _reject_no_fx(log, prior, run, legs, currency, missing_prior, prior)
    legs = Legs(*(getattr(legs, f) for f in Legs.__dataclass_fields__ if f not in ("fx_rate", "fx_rate_prior")),
                fx_rate=fx_rate, fx_rate_prior=fx_rate_prior)
    return select(legs, ~(missing | missing_prior))


def rates_of(fx: pd.Series, currency: NDArray[np.object_]) -> NDArray[np.float64]:
    """The rate of each currency (``fx``: rate per currency), NaN where it has none; the few currencies are
    hashed once and each row looked up by its code (no index of a text per trade is built)."""
    code, names = pd.factorize(np.asarray(currency, dtype=object))
    rate = fx.reindex(pd.Index(names, dtype=object)).to_numpy(dtype=float)
    return np.append(rate, np.nan)[code]  # code -1 (a null currency) takes the NaN at the end


def _reject_no_fx(log: ExceptionLog, prior: CleanNight, run: CleanNight, legs: Legs, currency: NDArray[np.object_],
                  missing: NDArray[np.bool_], night: CleanNight) -> None:
    """Reject the trades of ``missing`` for want of a rate in ``night``'s fx_rates (one row per currency too)."""
    if not missing.any():
        return
    fx_file = night.raw.path("fx_rates.parquet")
    codes = sorted(set(currency[missing].tolist()))
    log.add(fx_file, codes, "no FX rate for currency",
            "positions in this currency cannot be converted into the reporting currency")
    on_run = missing & (legs.row1 >= 0)
    _reject(log, run.raw.path("positions.parquet"), legs.trade_id, on_run, "no FX rate",
            "no rate for " + currency.astype(str) + f" in {fx_file}")
    _reject(log, prior.raw.path("positions.parquet"), legs.trade_id, missing & ~on_run, "no FX rate",
            "no rate for " + currency.astype(str) + f" in {fx_file}")


def select(legs: Legs, keep: NDArray[np.bool_]) -> Legs:
    """The legs where ``keep`` is True (the same legs when it holds everywhere: no copy of every array)."""
    if keep.all():
        return legs
    return Legs(*(getattr(legs, f)[keep] for f in Legs.__dataclass_fields__))


def trade_date_flags(run: CleanNight, legs: Legs, prior_day: dt.date) -> NDArray[np.bool_]:
    """New trades whose trade_date is on or before the prior date: booked late."""
    trade_date = take(run.positions["trade_date"].to_numpy(dtype="datetime64[D]"), legs.row1, np.datetime64("NaT"))
    is_new = np.isin(legs.status, [NEW, NEW_UNPRICED])
    return is_new & (trade_date <= np.datetime64(prior_day, "D"))
