"""The demo desk's year of nightly input folders: listing, trading, marks, planted faults, Parquet.

:func:`build_demo` writes ``<root>/as_of=YYYY-MM-DD/{positions, instruments, option_marks,
underlying_marks, rate_curves, fx_rates}.parquet`` for every business day of an invented desk
(definition: ``attribution/demo/demo_desk.toml``, market: :mod:`attribution.demo.market`). Each day,
vectorised over instruments and trades:

* listing: the next monthly and the quarterly expiries, strikes on a grid of standard deviations
  around spot; later listings add new expiries and strikes beyond the listed range;
* marks: the BSM price (:func:`attribution.pricing.bsm_price`; American-style single-stock options: the job's
  American method in its FAST scheme, :data:`attribution.american.FAST`, the desk's own cheaper pricer, so a small
  mark/model gap against the job's standard mode) at the smile vol, the curve rate at
  the option's time to expiry (ACT/365F) and the dividend yield; ``implied_vol`` is left null for a
  fixed share of instruments of clean books; a live option keeps a tiny time value so that its
  mark lies strictly inside the no-arbitrage bounds;
* trading: expiries, closes of whole packages, a few quantity amendments, and new trades
  (single options, short straddles and strangles, or delta-offsetting pairs), a share of them
  booked without a trade_price.

Planted faults (:class:`PlantedFault`): a booking error on the last night (a new trade on a mistyped instrument
id), and a stale mark, a fat-finger mark and a missing mark in each
book whose marks are ``planted_faults``, each inside the no-arbitrage bounds where it has a price;
random errors of the time value (one shared by the book's options that night, plus one per option)
on ~15 % of nights in each book whose marks are ``noisy``, with ``implied_vol`` left at its clean
value. The same seed gives the same tables, byte for byte.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from numpy.typing import NDArray

from attribution.american import FAST, american_price_and_exercised_unchecked
from attribution.arrays import FloatArray
from attribution.demo.desk import (
    DAYS_PER_YEAR,
    DeskSpec,
    default_definition,
    desk_holidays,
    load_desk,
    monthly_expiries,
)
from attribution.demo.desk import business_days as desk_business_days
from attribution.demo.dividends import Schedule, present_values
from attribution.demo.dividends import apply as apply_dividends
from attribution.demo.dividends import plan as plan_dividends
from attribution.demo.exercise import Exercise, plan_exercise
from attribution.demo.faults import mark_faults, noisy_marks
from attribution.demo.hedges import HedgeBook, hedge_book
from attribution.demo.helpers import FromBothEnds, ParquetFiles
from attribution.demo.market import (
    IntArray,
    ListedInstruments,
    MarketPaths,
    VarianceClock,
    list_instruments,
    nearest_strike,
    series_key,
    simulate_market,
    smile_vol,
    strike_index,
    variance_clock,
    zero_rate,
)
from attribution.demo.nights import Night, PlantedFault, Pool, Trades
from attribution.demo.official import DeskEvents, Holdings, LateBooking, desk_pnl, join, late_booking
from attribution.loading import CONTRACT_SCHEMAS, CONTRACT_SCHEMAS_V2
from attribution.pricing import bsm_greeks, bsm_price

DEFAULT_START = dt.date(2025, 11, 3)
# The contract's files; positions carry the optional strategy column (contract version 2).
SCHEMAS: dict[str, pa.Schema] = {**CONTRACT_SCHEMAS,
                                 "positions": CONTRACT_SCHEMAS["positions"].append(pa.field("strategy", pa.string()))}
STRATEGIES = ("outright", "short straddle", "short strangle", "delta-neutral pair")
FAULT_KINDS = ("stale_mark", "fat_finger_mark", "missing_mark", "off_smile_mark", "smile_arbitrage_mark",
               "noisy_marks", "booking_error", "late_booking", "official_break", "early_exercise")
# The desk's own P&L (official_pnl.parquet) reconciles with the job's total within this (reporting currency) on
# every night but the planted breaks; jobs/nightly.toml's [limits] official_break says the same.
OFFICIAL_BREAK_LIMIT = 100.0
LATE_BOOKING_AT = 0.6     # the late-booked trade: on the night nearest this share of the year


@dataclass(frozen=True, slots=True)
class DemoSummary:
    """What :func:`build_demo` wrote. ``holidays`` run from the first date to the last listed expiry."""

    data_root: Path
    desk: str
    definition: Path
    dates: tuple[dt.date, ...]
    holidays: tuple[dt.date, ...]
    books: tuple[str, ...]
    underlyings: tuple[str, ...]
    currencies: tuple[str, ...]
    positions_min: int
    positions_mean: float
    positions_max: int
    trades_new: int
    trades_new_unpriced: int
    trades_closed: int
    trades_expired: int
    trades_amended: int
    instruments_listed: int
    faults: tuple[PlantedFault, ...]

    def describe(self) -> str:
        """A few lines for a terminal."""
        lines = [
            f"{self.desk}: {len(self.dates)} business days {self.dates[0]} to {self.dates[-1]} in {self.data_root}",
            f"{len(self.books)} books, {len(self.underlyings)} underlyings, currencies {', '.join(self.currencies)}",
            f"positions per night: min {self.positions_min}, mean {self.positions_mean:.0f}, max {self.positions_max}",
            f"trades: {self.trades_new} new ({self.trades_new_unpriced} without trade_price), "
            f"{self.trades_closed} closed, {self.trades_expired} expired, {self.trades_amended} amended",
            f"holidays: {', '.join(str(h) for h in self.holidays if h <= self.dates[-1])}",
            f"planted faults: {len(self.faults)}",
            *(f"  {f.as_of} {f.book} {f.instrument_or_trade} {f.kind}: {f.detail}" for f in self.faults
              if f.kind != "noisy_marks"),
        ]
        return "\n".join(lines)



@dataclass(frozen=True, slots=True)
class _Close:
    """Tonight's clean close of every live instrument (the desk's model price, before its errors), and its state."""

    live: IntArray
    und: IntArray
    strike: FloatArray
    is_call: NDArray[np.bool_]
    expiry: NDArray[np.datetime64]
    tau: FloatArray
    spot: FloatArray
    rate: FloatArray
    div: FloatArray
    vol: FloatArray
    price: FloatArray
    lower: FloatArray
    upper: FloatArray
    floor: FloatArray
    delta: FloatArray
    american: NDArray[np.bool_]
    exercised: NDArray[np.bool_]


def _clean_close(desk: DeskSpec, market: MarketPaths, d: int, store: ListedInstruments, listed: int,
                 schedule: Schedule, split: FloatArray, clock: VarianceClock) -> _Close:
    """The desk's clean close on date ``d`` of the first ``listed`` instruments of ``store`` that are live (on the
    escrowed spot, strikes adjusted for the split by ``split``, per instrument). It draws no random number, so
    the nights' closes can be computed ahead, in any order and on any thread.

    The desk prices on its variance clock: the smile vol over the weighted time to expiry, quoted as the
    ACT/365F vol that gives the same price (``implied_vol``)."""
    day = market.dates[d]
    live = np.flatnonzero(store.expiry[:listed] >= day)
    und, strike, is_call = store.und[live], store.strike[live] / split[live], store.is_call[live]
    expiry = store.expiry[live]
    tau = (expiry - day).astype(float) / DAYS_PER_YEAR
    codes = [c.code for c in desk.currencies]
    ccy = np.array([codes.index(u.currency) for u in desk.underlyings])[und]
    payers = np.isin(np.arange(len(desk.underlyings)), schedule.und)[und]  # the others have no dividend to discount
    pv = np.zeros(live.size)
    pv[payers] = present_values(market, d, schedule, und[payers], ccy[payers], expiry[payers])
    spot, div = market.spot[d, und] - pv, market.dividend_yield[d, und]  # the spot the options are valued on
    rate = np.zeros(live.size)
    for c in range(len(codes)):
        rate[ccy == c] = zero_rate(market.zero_rates[d, c], market.tenors_years, tau[ccy == c])
    p = desk.param
    smile = smile_vol(market.atm_vol[d, und], p("skew")[und], p("smile_curvature")[und], p("term_slope")[und],
                      np.log(strike / spot), tau)
    weighted = clock.years(np.full(live.size, market.dates[d]), expiry)
    vol = smile * np.sqrt(np.where(tau > 0, weighted / np.where(tau > 0, tau, 1.0), 1.0))
    price = bsm_price(spot, strike, tau, vol, rate, div, is_call)
    sign = np.where(is_call, 1.0, -1.0)
    lower = np.maximum(sign * (spot * np.exp(-div * tau) - strike * np.exp(-rate * tau)), 0.0)
    upper = np.where(is_call, spot * np.exp(-div * tau), strike * np.exp(-rate * tau))
    american = np.array([u.exercise == "american" for u in desk.underlyings])[und]
    exercised = np.zeros(live.size, dtype=bool)
    if american.any():  # listed single-stock options: the American price (the desk's FAST scheme), wider bounds
        a = np.flatnonzero(american)
        price[a], exercised[a] = american_price_and_exercised_unchecked(
            spot[a], strike[a], tau[a], vol[a], rate[a], div[a], np.where(is_call[a], 1.0, -1.0), scheme=FAST,
            threads=1, memo=None)  # each close's states are its own: nothing to remember
        lower[a] = np.maximum(lower[a], sign[a] * (spot[a] - strike[a]))
        upper[a] = np.where(is_call[a], spot[a], strike[a])
    floor = lower + desk.min_time_value_share * spot
    price = np.where(tau > 0, np.maximum(price, floor), price)
    delta = bsm_greeks(spot, strike, tau, vol, rate, div, is_call).delta
    return _Close(live=live, und=und, strike=strike, is_call=is_call, expiry=expiry, tau=tau, spot=spot, rate=rate,
                  div=div, vol=vol, price=price, lower=lower, upper=upper, floor=floor, delta=delta,
                  american=american, exercised=exercised)


def _marks(desk: DeskSpec, store: ListedInstruments, clean: _Close, rng: np.random.Generator) -> tuple[Night, Pool]:
    """The desk's close of every live instrument tonight, and the pool open for new trades (at clean prices).

    The close is the clean close (:func:`_clean_close`) with a shared error of the time value per underlying and
    a small one per option, inside the no-arbitrage bounds."""
    live, und, strike, is_call, tau, spot, vol, price = (clean.live, clean.und, clean.strike, clean.is_call,
                                                         clean.tau, clean.spot, clean.vol, clean.price)
    noise = desk.marks.common_noise * rng.standard_normal(len(desk.underlyings))[und] \
        + desk.marks.idio_noise * rng.standard_normal(live.size)
    close = np.where(tau > 0, np.clip(price + noise * (price - clean.lower), clean.floor, clean.upper * (1 - 1e-9)),
                     price)
    # An American mark far from the money hardly moves with vol (or sits in its exercise region) and does not
    # identify one (README, American exercise): the desk gives its vol; only marks within a standard deviation
    # of the money leave it to the job.
    near = np.abs(np.log(strike / spot)) < vol * np.sqrt(tau)
    null_vol = store.null_vol[live] & ~(clean.american & (clean.exercised | ~near))
    night = Night(live=live, price=close, vol=np.where(null_vol, np.nan, vol),
                   keep=np.ones(live.size, bool), tau=tau, lower=clean.lower, upper=clean.upper,
                   rows=np.zeros(0, np.int64), quantity=np.zeros(0), spot=spot, rate=clean.rate, div=clean.div,
                   clean_price=price.copy(), delta=clean.delta, exercise_region=clean.exercised)
    open_ = tau * DAYS_PER_YEAR >= desk.trading.min_days_to_expiry_new
    z = np.log(strike / spot) / (vol * np.sqrt(np.maximum(tau, 1e-9)))
    series = series_key(und, clean.expiry) * 2 + is_call
    log_strike = np.log(strike[open_])
    pool = Pool(instrument=live[open_], und=und[open_], series=series[open_],
                 strikes=strike_index(series[open_], log_strike),  # built once for the night's nearest-strike searches
                 is_call=is_call[open_], log_strike=log_strike, spot=spot[open_], tau=tau[open_],
                 vol=vol[open_], rate=clean.rate[open_], div=clean.div[open_], price=price[open_],
                 weight=(np.exp(-0.5 * (z / 0.8) ** 2) / (1.0 + 2.0 * tau))[open_])
    return night, pool


def _sample(rng: np.random.Generator, pool: Pool, mask: NDArray[np.bool_], n: int) -> IntArray:
    cand = np.flatnonzero(mask)
    if cand.size == 0 or n <= 0:
        return np.zeros(0, np.int64)
    w = pool.weight[cand]
    return cand[rng.choice(cand.size, size=n, p=w / w.sum())]


def _pairs(rng: np.random.Generator, pool: Pool, style: str, mask: NDArray[np.bool_], lots: FloatArray,
           side: FloatArray) -> tuple[IntArray, FloatArray, IntArray]:
    """Two-leg packages, legs interleaved: short straddles/strangles, or pairs whose deltas offset; and each
    leg's strategy (index into STRATEGIES)."""
    if style == "short_vol":
        anchor = _sample(rng, pool, mask & ~pool.is_call & (pool.log_strike <= np.log(pool.spot * 1.02)), lots.size)
        straddle = rng.random(anchor.size) < 0.5
        target = np.where(straddle, pool.log_strike[anchor], 2 * np.log(pool.spot[anchor]) - pool.log_strike[anchor])
        partner = nearest_strike(pool.strikes, pool.series[anchor] + 1, target)
        q_anchor, q_partner = -lots[: anchor.size], -lots[: anchor.size]
        label = np.where(straddle, 1, 2)
    else:
        anchor = _sample(rng, pool, mask, lots.size)
        other = nearest_strike(pool.strikes, pool.series[anchor] ^ 1, pool.log_strike[anchor])
        shift = np.where(pool.is_call[anchor], 0.5, -0.5) * pool.vol[anchor] * np.sqrt(pool.tau[anchor])
        same = nearest_strike(pool.strikes, pool.series[anchor], pool.log_strike[anchor] + shift)
        partner = np.where((rng.random(anchor.size) < 0.5) & (same != anchor), same, other)
        legs = np.concatenate([anchor, partner])
        delta = bsm_greeks(pool.spot[legs], np.exp(pool.log_strike[legs]), pool.tau[legs], pool.vol[legs],
                           pool.rate[legs], pool.div[legs], pool.is_call[legs]).delta.reshape(2, -1)
        ratio = np.clip(np.abs(delta[0] / np.where(delta[1] == 0, 1e-12, delta[1])), 0.2, 5.0)
        opposite = np.where(pool.is_call[partner] == pool.is_call[anchor], -1.0, 1.0)
        q_anchor = side[: anchor.size] * lots[: anchor.size]
        q_partner = side[: anchor.size] * opposite * np.maximum(1.0, np.round(lots[: anchor.size] * ratio))
        label = np.full(anchor.size, 3)
    ok = partner >= 0
    return (np.stack([anchor[ok], partner[ok]], axis=1).ravel(),
            np.stack([q_anchor[ok], q_partner[ok]], axis=1).ravel(), np.repeat(label[ok], 2))


def _open(rng: np.random.Generator, desk: DeskSpec, b: int, pool: Pool, n: int, trades: Trades,
          trade_date: NDArray[np.datetime64], unpriced_share: float) -> None:
    """Book about ``n`` new positions in book ``b`` at tonight's clean marks (``trade_date``: n + 1 dates)."""
    book = desk.books[b]
    names = [u.name for u in desk.underlyings]
    mask = np.isin(pool.und, [names.index(x) for x in book.underlyings])
    n_packages = n if book.style == "outright" else -(-n // 2)
    lots = np.floor(np.exp(rng.uniform(np.log(book.lot_min), np.log(book.lot_max + 1), n_packages)))
    side = np.where(rng.random(n_packages) < book.long_share, 1.0, -1.0)
    if book.style == "outright":
        legs = _sample(rng, pool, mask, n_packages)
        quantity, per_package = (side * lots)[: legs.size], 1
        strategy = np.zeros(legs.size, np.int64)
    else:
        legs, quantity, strategy = _pairs(rng, pool, book.style, mask, lots, side)
        per_package = 2
    earned = np.where(rng.random(legs.size) < desk.trading.spread_win_share, -1.0, 1.0)
    spread = earned * np.sign(quantity) * rng.uniform(0.0, desk.trading.half_spread_max, legs.size)
    price = np.where(rng.random(legs.size) < unpriced_share, np.nan, pool.price[legs] * (1.0 + spread))
    base = trades.book.size
    trades.book = np.concatenate([trades.book, np.full(legs.size, b)])
    trades.instrument = np.concatenate([trades.instrument, pool.instrument[legs]])
    trades.quantity = np.concatenate([trades.quantity, quantity])
    trades.trade_date = np.concatenate([trades.trade_date, trade_date[: legs.size]])
    trades.trade_price = np.concatenate([trades.trade_price, price])
    trades.package = np.concatenate([trades.package, base + np.arange(legs.size) // per_package * per_package])
    trades.strategy = np.concatenate([trades.strategy, strategy])
    trades.live = np.concatenate([trades.live, base + np.arange(legs.size)])


def _lifecycle(rng: np.random.Generator, desk: DeskSpec, day: np.datetime64, store: ListedInstruments,
               trades: Trades) -> None:
    """Expiries (expired before tonight), closes of whole packages, and quantity amendments."""
    live = trades.live
    expired = store.expiry[trades.instrument[live]] < day
    live = live[~expired]
    packages = np.unique(trades.package[live])
    closing = packages[rng.random(packages.size) < desk.trading.daily_churn]
    closed = np.isin(trades.package[live], closing) & (store.expiry[trades.instrument[live]] > day)  # expiring: left
    # to settle at its intrinsic value, never closed on its last day
    trades.live = live[~closed]
    carried = trades.live
    n_amend = min(int(rng.poisson(desk.trading.amend_rate * carried.size)), carried.size)
    rows = rng.choice(carried, size=n_amend, replace=False)
    q = trades.quantity[rows]
    new = np.sign(q) * np.maximum(1.0, np.round(np.abs(q) * rng.choice([0.5, 1.5, 2.0], size=n_amend)))
    trades.quantity[rows] = np.where(new == q, q + np.sign(q), new)
    for key, count in (("expired", expired.sum()), ("closed", closed.sum()), ("amended", n_amend)):
        trades.counts[key] += int(count)


def _trade(rng: np.random.Generator, desk: DeskSpec, d: int, market: MarketPaths, store: ListedInstruments,
           trades: Trades, pool: Pool, targets: IntArray) -> None:
    day = market.dates[d]
    if d == 0:  # the opening book, booked on earlier business days
        hol = np.array(desk_holidays(desk, day.item() - dt.timedelta(days=150), day.item()), dtype="datetime64[D]")
        for b, target in enumerate(targets):
            back = rng.integers(1, 60, size=target + 1)
            dates = np.busday_offset(np.full(target + 1, day), -back, roll="backward", holidays=hol)
            _open(rng, desk, b, pool, int(target), trades, dates, 0.0)
        return
    _lifecycle(rng, desk, day, store, trades)
    held = np.bincount(trades.book[trades.live], minlength=len(targets))
    before = trades.book.size
    for b, target in enumerate(targets):
        floor = rng.poisson(0.9 * desk.trading.daily_churn * target)
        n = max(int(floor), int(target + rng.integers(0, 1 + target // 100) - held[b]))
        _open(rng, desk, b, pool, n, trades, np.full(n + 1, day), desk.trading.unpriced_share)
    trades.counts["new"] += trades.book.size - before
    trades.counts["unpriced"] += int(np.isnan(trades.trade_price[before:]).sum())


def _ids(desk: DeskSpec, store: ListedInstruments, trade_count: int) -> tuple[NDArray[np.str_], NDArray[np.str_]]:
    """Instrument ids ``<underlying>-<YYYYMMDD>-<C|P><strike>`` and trade ids ``<prefix><8 digits>``."""
    code = np.array([u.name.replace("/", "") for u in desk.underlyings])[store.und]
    parts = (code, "-", np.char.replace(np.datetime_as_string(store.expiry, unit="D"), "-", ""), "-",
             np.where(store.is_call, "C", "P"), np.char.mod("%.10g", store.strike))
    ids = parts[0]
    for part in parts[1:]:
        ids = np.char.add(ids, part)
    _, first = np.unique(ids, return_index=True)
    again = np.ones(ids.size, bool)
    again[first] = False  # a series listed after the split at a strike an adjusted one had: a new id
    ids = np.where(again, np.char.add(ids, "-2"), ids)
    if np.unique(ids).size != ids.size:
        raise RuntimeError("demo instrument ids are not unique")
    return ids, np.char.mod(f"{desk.trade_id_prefix}%08d", np.arange(trade_count))


def _booking_error(desk: DeskSpec, market: MarketPaths, nights: list[Night], ids: NDArray[np.str_],
                   trades: Trades) -> tuple[dict[int, dict[str, list[object]]], PlantedFault]:
    """A new trade of the faulty book on the last night, booked on a mistyped instrument id that no file lists:
    the job must reject it (and say why) rather than drop it."""
    b = next(i for i, book in enumerate(desk.books) if book.marks == "planted_faults")
    d = len(nights) - 1
    night = nights[d]
    held = night.rows[trades.book[night.rows] == b]
    real = str(ids[trades.instrument[held[0]]])
    wrong = real.replace("-", "", 1)  # the dash after the ticker forgotten
    trade_id = f"{desk.trade_id_prefix}LATE-0001"
    day = market.dates[d].item()
    row: dict[str, list[object]] = {"trade_id": [trade_id], "book": [desk.books[b].name], "instrument_id": [wrong],
                                    "quantity": [5.0], "trade_date": [day], "trade_price": [None],
                                    "strategy": ["booking error"]}
    return {d: row}, PlantedFault(day, desk.books[b].name, trade_id, "booking_error",
                                  f"new trade booked on {wrong!r}, a mistyped {real!r} that no instruments file lists")


def _option_holdings(desk: DeskSpec, market: MarketPaths, store: ListedInstruments, trades: Trades, night: Night,
                     d: int, trade_ids: NDArray[np.str_], split: FloatArray,
                     corrected: dict[int, float]) -> Holdings:
    """The options held on night ``d`` at the desk's own close (``corrected``: instrument -> the desk's mark where
    the marks file carries another)."""
    inst = trades.instrument[night.rows]
    value = night.price[np.searchsorted(night.live, inst)].copy()
    for i, price in corrected.items():
        value[inst == i] = price
    und = store.und[inst]
    codes = [c.code for c in desk.currencies]
    ccy = np.array([codes.index(u.currency) for u in desk.underlyings])[und]
    no = np.zeros(inst.size, dtype=bool)
    return Holdings(trade=trade_ids[night.rows], key=night.rows, book=trades.book[night.rows], und=und, ccy=ccy,
                    quantity=night.quantity, multiplier=desk.param("multiplier")[und] * split[inst], value=value,
                    future=no, share=no)


def _official(desk: DeskSpec, market: MarketPaths, store: ListedInstruments, trades: Trades, nights: list[Night],
              ids: NDArray[np.str_], trade_ids: NDArray[np.str_], hedges: HedgeBook, schedule: Schedule,
              splits: list[FloatArray], hedge_splits: list[FloatArray], faults: list[PlantedFault],
              exercise: Exercise | None) -> tuple[FloatArray, LateBooking | None, list[PlantedFault]]:
    """The desk's own P&L (nights x books), the late-booked trade, and the planted events to list: the exercise, the
    late booking and the break the fat-finger mark makes (the desk's books carry the right mark)."""
    books = [b.name for b in desk.books]
    fat = [f for f in faults if f.kind == "fat_finger_mark"]
    corrected: dict[int, dict[int, float]] = {}
    for f in fat:
        d = list(market.dates).index(np.datetime64(f.as_of, "D"))
        i = int(np.flatnonzero(ids == f.instrument_or_trade)[0])
        corrected.setdefault(d, {})[i] = float(nights[d].price[np.searchsorted(nights[d].live, i)]
                                                / desk.faults.fat_finger_factor)
    holdings = [join([_option_holdings(desk, market, store, trades, night, d, trade_ids, splits[d],
                                       corrected.get(d, {})), hedges.holdings[d]]) for d, night in enumerate(nights)]
    events = DeskEvents(hedges.activity, hedges.cash_flows, schedule.und, schedule.ex_date, schedule.amount)
    ratio = [np.ones(len(desk.underlyings))] + [b / a for a, b in zip(hedge_splits, hedge_splits[1:], strict=False)]
    key_of = {t: k for k, t in enumerate(trade_ids.tolist())}
    for h in hedges.holdings:  # the hedges (a few dozen) and the delivered shares
        key_of.update(zip(h.trade.tolist(), h.key.tolist(), strict=True))
    official = desk_pnl(holdings, events, market.dates, market.fx_to_reporting, ratio,
                        [c.code for c in desk.currencies], books, key_of)
    late = late_booking(holdings, hedges.activity, market.fx_to_reporting, LATE_BOOKING_AT, 4 * OFFICIAL_BREAK_LIMIT,
                        key_of)
    planted = []
    if late is not None:
        day, after = market.dates[late.night].item(), market.dates[late.night + 1].item()
        planted.append(PlantedFault(day, books[late.book], late.trade, "late_booking",
                                    f"new trade in the desk's P&L tonight (day one {late.day_one_pnl:+,.0f}) reaches "
                                    f"the positions file only on {after}: official P&L break tonight, about the "
                                    "opposite the next night"))
    for f in fat:
        planted.append(PlantedFault(f.as_of, f.book, f.instrument_or_trade, "official_break",
                                    "the desk's P&L is struck on its own mark of the instrument, not on the fat finger "
                                    "in option_marks: official P&L break"))
    if exercise is not None:
        name = desk.underlyings[exercise.und].name
        plural = "" if abs(exercise.contracts) == 1 else "s"
        planted.append(PlantedFault(market.dates[exercise.night].item(), books[exercise.book],
                                    str(trade_ids[exercise.row]), "early_exercise",
                                    f"{exercise.activity} of {abs(exercise.contracts):g} American "
                                    f"{'call' if exercise.is_call else 'put'}{plural}"
                                    f" {ids[exercise.instrument]} deep in the "
                                    f"money ({name} {market.spot[exercise.night, exercise.und]:.4g}, strike "
                                    f"{exercise.strike:g}); {exercise.shares:+g} shares delivered "
                                    f"({hedges.delivered_trade}), unwound the next night"))
    return official, late, planted


def _prepare_root(root: Path, dates: NDArray[np.datetime64]) -> None:
    root.mkdir(parents=True, exist_ok=True)
    wanted = {f"as_of={d}" for d in dates}
    stray = sorted(p.name for p in root.glob("as_of=*") if p.name not in wanted)
    if stray:
        raise ValueError(f"{root}: holds {len(stray)} as_of folder(s) outside this demo's dates (first {stray[0]}); "
                         "write the demo into an empty folder")


def _late_activity(activity: pa.Table, late: LateBooking, booked_night: bool) -> pa.Table:
    """The night's activity without the late trade's ``new`` row (its night), or with it (the next night)."""
    if booked_night:
        return activity.filter(pc.not_equal(activity["trade_id"], late.trade))
    row = pa.Table.from_pydict({"activity_id": [f"{activity['activity_id'][0].as_py().split('-')[0]}-late"],
                                "trade_id": [late.trade], "kind": ["new"], "quantity": [late.quantity],
                                "price": [late.price]}, schema=activity.schema)
    return pa.concat_tables([activity, row])


def _split(schedule: Schedule, store: ListedInstruments, before_split: int, day: np.datetime64) -> FloatArray:
    """Per listed instrument: the split ratio its listed strike is divided by on ``day`` (1 when unaffected)."""
    return schedule.split_factor(store.und, np.arange(store.und.size) < before_split, day)


def _terms(instruments: pa.Table, split: FloatArray) -> list[pa.ChunkedArray]:
    """The instruments' columns with strikes divided and multipliers multiplied by the split ratio."""
    strike = pc.divide(instruments["strike"], pa.array(split))
    multiplier = pc.multiply(instruments["multiplier"], pa.array(split))
    return [strike if n == "strike" else multiplier if n == "multiplier" else instruments[n]
            for n in instruments.column_names]


def _write_market(root: Path, desk: DeskSpec, market: MarketPaths, schedule: Schedule,
                  files: ParquetFiles) -> None:
    """Each night's folder and its files that depend on the market alone (written while the trades' files are
    still being made): underlying marks, curves, FX, dividends, corporate actions, books."""
    names = np.array([u.name for u in desk.underlyings])
    codes = np.array([c.code for c in desk.currencies])
    books = [pa.array([b.name for b in desk.books], pa.string()), pa.array([b.desk for b in desk.books], pa.string())]
    n_tenor = market.tenors_years.size
    actions = schedule.actions(names)
    for d, day in enumerate(market.dates):
        folder = root / f"as_of={day}"
        folder.mkdir(exist_ok=True)
        tables = {
            "underlying_marks": [pa.array(names, pa.string()), pa.array(market.spot[d]),
                                 pa.array(market.dividend_yield[d])],
            "rate_curves": [pa.array(codes.repeat(n_tenor), pa.string()),
                            pa.array(np.tile(market.tenors_years, codes.size)), pa.array(market.zero_rates[d].ravel())],
            "fx_rates": [pa.array(codes, pa.string()), pa.array(market.fx_to_reporting[d])],
            "dividends": schedule.columns(day, names),
            "corporate_actions": actions,
            "books": books,
        }
        for name, columns in tables.items():
            files.put(pa.Table.from_arrays(columns, schema=SCHEMAS[name]), folder / f"{name}.parquet")


def _write(root: Path, desk: DeskSpec, market: MarketPaths, store: ListedInstruments, trades: Trades,
           nights: list[Night], ids: NDArray[np.str_], trade_ids: NDArray[np.str_], schedule: Schedule,
           before_split: int, hedges: HedgeBook, booked_wrong: dict[int, dict[str, list[object]]],
           official: FloatArray, late: LateBooking | None, files: ParquetFiles) -> None:
    """Each night's positions, instruments, marks and events, handed to ``files``."""
    names = np.array([u.name for u in desk.underlyings])
    codes = np.array([c.code for c in desk.currencies])
    ccy = np.array([list(codes).index(u.currency) for u in desk.underlyings])
    instrument_id = pa.array(ids, pa.string())
    instruments = pa.Table.from_arrays([
        instrument_id, pa.array(names[store.und], pa.string()),
        pa.array(np.where(store.is_call, "call", "put"), pa.string()),
        pa.array(np.array([u.exercise for u in desk.underlyings])[store.und], pa.string()),
        pa.array(store.strike, pa.float64()),
        pa.array(store.expiry, pa.date32()), pa.array(desk.param("multiplier")[store.und], pa.float64()),
        pa.array(codes[ccy[store.und]], pa.string()), pa.array(np.full(store.und.size, "option"), pa.string())],
        schema=CONTRACT_SCHEMAS_V2["instruments"])
    hedge_instruments = pa.Table.from_pydict(hedges.instruments, schema=CONTRACT_SCHEMAS_V2["instruments"])
    booked = pa.Table.from_arrays([
        pa.array(trade_ids, pa.string()), pa.array(np.array([b.name for b in desk.books])[trades.book], pa.string()),
        instrument_id.take(pa.array(trades.instrument)), pa.array(trades.trade_date, pa.date32()),
        pa.array(trades.trade_price, pa.float64(), mask=np.isnan(trades.trade_price)),
        pa.array(np.array(STRATEGIES, dtype=object)[trades.strategy], pa.string())],
        names=["trade_id", "book", "instrument_id", "trade_date", "trade_price", "strategy"])
    books = [pa.array([b.name for b in desk.books], pa.string()), pa.array([b.desk for b in desk.books], pa.string())]
    for d, night in enumerate(nights):
        folder = root / f"as_of={market.dates[d]}"
        held, quantity = booked.take(pa.array(night.rows)), night.quantity
        if late is not None and d == late.night:  # booked by the desk tonight, in the files only tomorrow
            keep = trade_ids[night.rows] != late.trade
            held, quantity = held.filter(pa.array(keep)), quantity[keep]
        options = pa.Table.from_arrays([held["trade_id"], held["book"], held["instrument_id"], pa.array(quantity),
                                        held["trade_date"], held["trade_price"], held["strategy"]],
                                       schema=SCHEMAS["positions"])
        split = _split(schedule, store, before_split, market.dates[d])[night.live]
        options_listed = pa.Table.from_arrays(_terms(instruments.take(pa.array(night.live)), split),
                                              schema=instruments.schema)
        at = hedge_instruments.schema.get_field_index("multiplier")
        hedge_listed = hedge_instruments.set_column(at, "multiplier", pa.array(hedges.multipliers[d], pa.float64()))
        listed = pa.concat_tables([options_listed, hedge_listed])
        hedge_rows = {**hedges.positions[d], "strategy": ["delta hedge"] * len(hedges.positions[d]["trade_id"])}
        parts = [options, pa.Table.from_pydict(hedge_rows, schema=SCHEMAS["positions"])]
        if d in booked_wrong:
            parts.append(pa.Table.from_pydict(booked_wrong[d], schema=SCHEMAS["positions"]))
        events = {"positions": pa.concat_tables(parts),
                  "instruments": listed,
                  "future_marks": pa.Table.from_pydict(hedges.future_marks[d], schema=SCHEMAS["future_marks"])}
        for name, parts in (("trade_activity", hedges.activity[d]), ("cash_flows", hedges.cash_flows[d])):
            if parts is not None:
                events[name] = pa.Table.from_pydict(parts, schema=SCHEMAS[name])
        if late is not None and d in (late.night, late.night + 1):
            events["trade_activity"] = _late_activity(events["trade_activity"], late, d == late.night)
        if d > 0:
            events["official_pnl"] = pa.Table.from_arrays([books[0], pa.array(official[d], pa.float64())],
                                                          schema=SCHEMAS["official_pnl"])
        for name, table in events.items():
            files.put(table, folder / f"{name}.parquet")
        marks = pa.Table.from_arrays([instrument_id.take(pa.array(night.live[night.keep])),
                                      pa.array(night.price[night.keep]),
                                      pa.array(night.vol[night.keep], mask=np.isnan(night.vol[night.keep]))],
                                     schema=SCHEMAS["option_marks"])
        files.put(marks, folder / "option_marks.parquet")


def _listings(desk: DeskSpec, market: MarketPaths, schedule: Schedule, store: ListedInstruments,
              expiries: NDArray[np.datetime64], clean: NDArray[np.bool_],
              rng: np.random.Generator) -> tuple[IntArray, IntArray, int]:
    """List every night's instruments into ``store`` (the listing draws only ``rng`` and reads only the market, so
    it runs ahead of the marks and trades): per night, how many instruments are listed by then and how many of
    them were listed before the split day; and that count at the end."""
    dates = market.dates
    before_split = 0  # instruments listed before the split day: their strikes and multipliers are adjusted
    listed, before = np.zeros(dates.size, np.int64), np.zeros(dates.size, np.int64)
    for d in range(dates.size):
        if dates[d] < schedule.split_day:
            before_split = store.und.size
        if d % desk.trading.listing_every_days == 0:
            split = _split(schedule, store, before_split, dates[d])
            store.strike = store.strike / split  # listed in tonight's units, so no strike is listed twice
            list_instruments(desk, market, d, store, expiries, clean, rng)
            store.strike[: split.size] *= split  # back in listed units: x / 2 * 2 == x exactly
        listed[d], before[d] = store.und.size, before_split
    return listed, before, before_split


def build_demo(root: Path, *, seed: int = 7, start: dt.date = DEFAULT_START, business_days: int = 261,
               positions_target: int = 2000, definition: Path | None = None) -> DemoSummary:
    """Write the demo desk's nightly input folders for ``business_days`` business days from ``start``."""
    desk = load_desk(definition)
    if business_days < 5:
        raise ValueError(f"business_days must be at least 5 to leave room for the planted faults, not {business_days}")
    if positions_target < 10 * len(desk.books):
        raise ValueError(f"positions_target must be at least {10 * len(desk.books)} (10 per book), not "
                         f"{positions_target}")
    dates = desk_business_days(desk, start, business_days)
    root = Path(root)
    _prepare_root(root, dates)
    market_rng, list_rng, trade_rng, fault_rng, hedge_rng = (np.random.default_rng(s) for s in
                                                             np.random.SeedSequence(seed).spawn(5))
    market = simulate_market(desk, dates, market_rng)
    schedule = plan_dividends(desk, market, dates[-1] + np.timedelta64(500, "D"))
    market = apply_dividends(desk, market, schedule)
    expiries = monthly_expiries(desk, dates[0].item(), dates[-1].item() + dt.timedelta(days=500))
    names = [u.name for u in desk.underlyings]
    clean = np.ones(len(names), bool)
    for book in desk.books:
        clean[[names.index(x) for x in book.underlyings]] &= book.marks == "clean"
    weights = np.array([b.weight for b in desk.books])
    targets = np.ceil(positions_target * weights / weights.sum()).astype(np.int64)
    store, trades, nights = ListedInstruments(), Trades(), []
    clock = variance_clock(desk, dates[0], expiries[-1] + 800)
    listed, before, before_split = _listings(desk, market, schedule, store, expiries, clean, list_rng)

    def close(d: int) -> _Close:
        return _clean_close(desk, market, d, store, int(listed[d]), schedule,
                            _split(schedule, store, int(before[d]), dates[d]), clock)

    # The clean closes (mostly the American prices) are shared with a helper thread, which takes them from the last
    # night backwards, while this thread draws the errors and trades night by night.
    closes = FromBothEnds(dates.size, close)
    for d in range(dates.size):
        night, pool = _marks(desk, store, closes.get(d), fault_rng)
        _trade(trade_rng, desk, d, market, store, trades, pool, targets)
        night.rows, night.quantity = trades.live.copy(), trades.quantity[trades.live]
        nights.append(night)
    closes.close()
    # The Parquet files are independent: written by a helper thread, the market's while this thread makes the faults,
    # hedges and the desk's P&L.
    with ParquetFiles() as files:
        _write_market(root, desk, market, schedule, files)
        ids, trade_ids = _ids(desk, store, trades.book.size)
        faults: list[PlantedFault] = []
        for b, book in enumerate(desk.books):
            if book.marks == "planted_faults":
                faults += mark_faults(desk, market, store, trades, nights, ids, b)
            elif book.marks == "noisy":
                faults += noisy_marks(desk, market, store, nights, b, fault_rng)
        splits = [_split(schedule, store, before_split, day) for day in dates]
        names_und = np.arange(len(desk.underlyings))
        hedge_splits = [schedule.split_factor(names_und, np.ones(names_und.size, bool), day) for day in dates]
        exercise = plan_exercise(desk, market, store, trades, nights, splits)
        hedges = hedge_book(desk, market, store, trades, nights, trade_ids, hedge_rng, splits, hedge_splits, exercise)
        booked_wrong, fault = _booking_error(desk, market, nights, ids, trades)
        faults.append(fault)
        official, late, events = _official(desk, market, store, trades, nights, ids, trade_ids, hedges, schedule,
                                           splits, hedge_splits, faults, exercise)
        faults += events
        _write(root, desk, market, store, trades, nights, ids, trade_ids, schedule, before_split, hedges,
               booked_wrong, official, late, files)
    counts = np.array([night.rows.size for night in nights])
    if late is not None:
        counts[late.night] -= 1  # the late-booked trade is in that night's files only the next night
    first, last_expiry = dates[0].item(), store.expiry.max().item()
    return DemoSummary(
        data_root=root, desk=desk.name, definition=Path(definition) if definition else default_definition(),
        dates=tuple(d.item() for d in dates), holidays=desk_holidays(desk, first, max(last_expiry, dates[-1].item())),
        books=tuple(b.name for b in desk.books), underlyings=tuple(names),
        currencies=tuple(c.code for c in desk.currencies),
        positions_min=int(counts.min()), positions_mean=float(counts.mean()), positions_max=int(counts.max()),
        trades_new=trades.counts["new"], trades_new_unpriced=trades.counts["unpriced"],
        trades_closed=trades.counts["closed"], trades_expired=trades.counts["expired"],
        trades_amended=trades.counts["amended"], instruments_listed=int(store.und.size),
        faults=tuple(sorted(faults, key=lambda f: (f.as_of, f.book, f.kind, f.instrument_or_trade))),
    )
