"""Per-instrument market state on one date: spot, strike, time, rate, yield, vol, price.

Built once per date for the instruments (tens of thousands at most), then gathered onto the
positions (up to millions) by integer index. Every reason an instrument cannot be used is kept
as text, so that each position it touches is rejected with that reason; rows of other files at
fault get exception rows of their own here.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from attribution.american import FAST, PRECISE, STANDARD, TWO_BOUNDARY_RULE, Scheme, american_price_unchecked
from attribution.american_greeks import NOT_IDENTIFIABLE_RULE, american_implied_vol
from attribution.arrays import FloatArray
from attribution.config import CheckSettings
from attribution.contract import CleanNight
from attribution.curves import zero_rates
from attribution.dividends import schedule_pv
from attribution.exceptions_log import WARNING, ExceptionLog
from attribution.implied_vol import implied_vol
from attribution.keys import KeyCodes
from attribution.pricing import no_arbitrage_bounds, price_unchecked
from attribution.timebasis import TimeBasis
from attribution.valuation import FORWARD, FUTURE, OPTION, UNDERLYING, MarketState, kind_codes, value


@dataclass(frozen=True, slots=True)
class InstrumentMarket:
    """Arrays aligned with ``ids``: the state of each instrument on ``as_of``.

    ``usable`` is True where an active position can be priced and explained; otherwise
    ``reason`` says why. ``spot_known`` is True where the underlying has a spot (enough to
    settle an expiry). ``listed`` is True where this date's instruments file has a clean row for
    the instrument (a position of this date needs one); where it is False and ``terms_rejected``
    is False the terms were taken from the other date's file, which is how a closed or expired
    trade is settled in an option this date no longer lists.

    ``kind`` holds the codes of :mod:`attribution.valuation`. ``price`` is the mark of
    each kind: the option mark, the spot of an ``underlying``, the settlement price of a ``future``,
    the model value of a ``forward`` (which has no mark). A delta-one kind has ``vol`` 0 (it has no
    volatility), an ``underlying`` ``tau_years`` 0, and NaN stands where a term does not apply.
    """

    as_of: dt.date
    ids: pd.Index
    kind: NDArray[np.int8]
    underlying: NDArray[np.object_]
    currency: NDArray[np.object_]
    option_type: NDArray[np.object_]
    cp: FloatArray
    strike: FloatArray
    multiplier: FloatArray
    expiry: NDArray[np.datetime64]
    tau_years: FloatArray
    spot: FloatArray
    div_yield: FloatArray
    rate: FloatArray
    price: FloatArray
    vol: FloatArray
    marked_vol: FloatArray
    vol_solved: NDArray[np.bool_]
    vol_mismatch: NDArray[np.bool_]
    spot_known: NDArray[np.bool_]
    usable: NDArray[np.bool_]
    reason: NDArray[np.object_]
    listed: NDArray[np.bool_]
    terms_rejected: NDArray[np.bool_]
    american: NDArray[np.bool_]  # exercise = american: priced by attribution.american
    american_scheme: Scheme = STANDARD  # the job's American precision
    div_pv: FloatArray | None = None  # present value of the dividends in each window (attribution.dividends)
    mark_rolled: NDArray[np.bool_] | None = None  # vol rolled from an earlier date's mark (attribution.mark_roll)

    @property
    def escrowed_spot(self) -> FloatArray:
        """The spot the model prices on: spot less the present value of the dividends to expiry."""
        return self.spot if self.div_pv is None else self.spot - self.div_pv

    @property
    def dividend_pv(self) -> FloatArray:
        """``div_pv``, zeros when none was given."""
        return np.zeros_like(self.spot) if self.div_pv is None else self.div_pv

    def rolled(self) -> NDArray[np.bool_]:
        """Per instrument: its mark was missing and was rolled forward from an earlier date."""
        return np.zeros(len(self.ids), dtype=bool) if self.mark_rolled is None else self.mark_rolled

    def locate(self, instrument_ids: NDArray[np.object_]) -> NDArray[np.intp]:
        """Index of each id in this market, -1 where absent.

        Positions repeat instruments many times: the ids are factorised first and only the distinct
        ones looked up (about 4x faster for a million positions over twenty thousand instruments).
        """
        codes, distinct = pd.factorize(np.asarray(instrument_ids, dtype=object), use_na_sentinel=False)
        # the ids passed as an object index: a bare object array would first be inferred as pandas' string type
        found = self.ids.get_indexer(pd.Index(distinct, dtype=object, copy=False))
        return found[codes].astype(np.intp, copy=False)

    def places(self, ids: pd.Index) -> NDArray[np.intp]:
        """Index in this market of each of another market's ``ids``, -1 where absent: :meth:`locate` of ids that are
        distinct already (one look-up on this market's own index, no factorising first)."""
        return self.ids.get_indexer(ids).astype(np.intp, copy=False)

    def locate_codes(self, coded: KeyCodes) -> NDArray[np.intp]:
        """:meth:`locate` of a column already coded (:mod:`attribution.keys`): only its distinct ids looked up."""
        found = self.ids.get_indexer(pd.Index(coded.texts(), dtype=object, copy=False))
        return np.append(found, -1).astype(np.intp, copy=False)[coded.codes]


def take(values: NDArray[np.generic], index: NDArray[np.intp], fill: object) -> NDArray[np.generic]:
    """``values[index]``, with ``fill`` where ``index`` is -1 (safe when ``values`` is empty)."""
    dtype = np.result_type(values.dtype, np.asarray(fill).dtype)
    found = index >= 0
    if found.all():  # the usual case: one gather, no fill array (a million object slots cost more than the gather)
        return values[index].astype(dtype, copy=False)
    out = np.full(len(index), fill, dtype=dtype)
    out[found] = values[index[found]]
    return out


def instrument_terms(own: CleanNight, other: CleanNight | None) -> pd.DataFrame:
    """This date's instruments, completed by the other date's for instruments it no longer lists."""
    if other is None:
        return own.instruments
    extra = other.instruments.loc[~other.instruments.index.isin(own.instruments.index)]
    if not len(extra):
        return own.instruments
    terms = pd.concat([own.instruments, extra])
    # the labels keep the instruments' own index type: concatenated, text labels would be inferred as pandas'
    # string type, on which every lookup of the night's positions by instrument (an object array) is many
    # times slower
    terms.index = terms.index.astype(own.instruments.index.dtype)
    return terms


def _first_reason(reason: NDArray[np.object_], bad: NDArray[np.bool_],
                  text: str | Callable[[NDArray[np.bool_]], NDArray[np.object_]]) -> None:
    """``text`` as the reason of the ``bad`` rows without one yet; a function of that mask gives one text per
    such row (built for those rows only)."""
    fill = bad & (reason == "")
    if fill.any():
        reason[fill] = text(fill) if callable(text) else text


def _texts(values: NDArray[np.object_], rows: NDArray[np.bool_]) -> NDArray[np.object_]:
    """The masked values as text."""
    return pd.Series(values[rows], dtype=object).astype(str).to_numpy()


AMERICAN_SCHEMES = {"standard": STANDARD, "precise": PRECISE, "fast": FAST}


def build_market(night: CleanNight, terms: pd.DataFrame, basis: TimeBasis, checks: CheckSettings,
                 log: ExceptionLog, american_precision: str = "standard") -> InstrumentMarket:
    """The state of every instrument in ``terms`` on ``night``'s date, with its usability.

    ``american_precision``: ``standard`` or ``precise``, the scheme of the American method.
    """
    as_of = night.raw.as_of
    own_ids = night.instruments.index
    n = len(terms)
    ids = terms.index
    underlying = terms["underlying"].to_numpy(dtype=object)
    currency = terms["currency"].to_numpy(dtype=object)
    option_type = terms["option_type"].to_numpy(dtype=object)
    kind_index, kind_names = pd.factorize(terms["kind"].to_numpy(dtype=object), use_na_sentinel=False)
    kind = kind_codes(np.asarray(kind_names, dtype=object))[kind_index]  # each name coded once
    cp = np.where(option_type == "call", 1.0, -1.0)
    american = (terms["exercise"].to_numpy(dtype=object) == "american") & (kind == OPTION)
    scheme = AMERICAN_SCHEMES[american_precision]
    strike = terms["strike"].to_numpy(dtype=float)
    expiry = terms["expiry"].to_numpy(dtype="datetime64[D]")
    tau = basis.year_fraction(np.datetime64(as_of, "D"), expiry) if n else np.zeros(0)
    tau[kind == UNDERLYING] = 0.0  # no expiry: its value does not depend on time
    reason = np.full(n, "", dtype=object)

    listed = np.asarray(ids.isin(own_ids))
    terms_rejected = ~listed & np.asarray(ids.isin(night.raw.tables["instruments.parquet"]["instrument_id"]))
    _first_reason(reason, terms_rejected, f"its row in instruments.parquet of {as_of} breaks a rule (see that row)")
    _first_reason(reason, tau < 0, f"the option expired before {as_of}")  # wording kept for every kind

    u_idx = night.underlyings.index.get_indexer(pd.Index(underlying, dtype=object, copy=False))
    spot_known = u_idx >= 0
    spot = take(night.underlyings["spot"].to_numpy(float), u_idx, np.nan)
    div_yield = take(night.underlyings["dividend_yield"].to_numpy(float), u_idx, np.nan)
    # An underlying whose row was rejected has its own exception row; only an absent one gets a row here.
    unknown_u = ~spot_known & listed & ~pd.Index(underlying, dtype=object, copy=False).isin(
        night.raw.tables["underlying_marks.parquet"]["underlying"])
    log.add(night.raw.path("instruments.parquet"), ids[unknown_u].to_numpy(), "unknown underlying",
            pd.Series(underlying[unknown_u], dtype=object).astype(str).radd("no row in underlying_marks for "))
    _first_reason(reason, ~spot_known, lambda rows: "underlying " + _texts(underlying, rows)
                  + f" has no usable mark on {as_of}")

    rate, has_curve = zero_rates(night.curves, currency, tau)
    has_curve |= kind == UNDERLYING  # a share or a currency unit needs no discounting
    rate[kind == UNDERLYING] = np.nan_to_num(rate[kind == UNDERLYING])
    missing_ccy = sorted(set(currency[~has_curve].tolist()))
    log.add(night.raw.path("rate_curves.parquet"), missing_ccy, "no curve for currency",
            "an instrument in this currency is listed but the file has no usable curve for it")
    _first_reason(reason, ~has_curve, lambda rows: "no rate curve for currency " + _texts(currency, rows)
                  + f" on {as_of}")

    option = kind == OPTION
    m_idx = np.where(option, night.marks.index.get_indexer(ids), -1)
    price = take(night.marks["price"].to_numpy(float), m_idx, np.nan)
    marked_vol = take(night.marks["implied_vol"].to_numpy(float), m_idx, np.nan)
    _first_reason(reason, option & (m_idx < 0), f"no usable option mark on {as_of}")
    price = _delta_one_prices(night, ids, kind, reason, price, spot, strike, tau, rate, div_yield, log)

    put_rate, put_yield = np.where(cp > 0, div_yield, rate), np.where(cp > 0, rate, div_yield)  # put-call symmetry
    two = american & (put_yield < put_rate) & (put_rate < 0)
    log.add(night.raw.path("instruments.parquet"), ids[two & (reason == "")].to_numpy(), TWO_BOUNDARY_RULE,
            "rates and yield of this date give an American option two exercise boundaries")
    _first_reason(reason, two, TWO_BOUNDARY_RULE)
    div_pv = _dividend_pv(night, underlying, currency, expiry, spot, reason, basis, log)
    vol, vol_solved, vol_mismatch = _vols(night, ids, reason, price, marked_vol, spot - div_pv, strike, tau, rate,
                                          div_yield, cp, checks, log, american, scheme, option)
    vol[~option] = 0.0  # a delta-one kind has no volatility
    usable = reason == ""
    return InstrumentMarket(as_of, ids, kind, underlying, currency, option_type, cp, strike,
                            terms["multiplier"].to_numpy(dtype=float), expiry, tau, spot, div_yield, rate, price,
                            vol, marked_vol, vol_solved, vol_mismatch, spot_known, usable, reason, listed,
                            terms_rejected, american, scheme, div_pv)


def _dividend_pv(night: CleanNight, underlying: NDArray[np.object_], currency: NDArray[np.object_],
                 expiry: NDArray[np.datetime64], spot: FloatArray, reason: NDArray[np.object_], basis: TimeBasis,
                 log: ExceptionLog) -> FloatArray:
    """Present value of each instrument's dividends; an unusable schedule or one worth the spot is a reason."""
    as_of = night.raw.as_of
    broken = pd.Index(underlying, dtype=object, copy=False).isin(list(night.broken_schedules))
    _first_reason(reason, broken, lambda rows: "the dividend schedule of " + _texts(underlying, rows)
                  + f" has a rejected row in dividends.parquet of {as_of} (see that row)")
    div_pv = schedule_pv(as_of, underlying, currency, expiry, night.dividends, night.curves, basis)
    with np.errstate(invalid="ignore"):
        worthless = (reason == "") & (div_pv > 0) & ~(spot - div_pv > 0)
    if worthless.any():
        over = pd.DataFrame({"underlying": underlying[worthless], "spot": spot[worthless], "pv": div_pv[worthless]})
        over = over.sort_values("pv", ascending=False).drop_duplicates("underlying")
        log.add(night.raw.path("dividends.parquet"), over["underlying"].to_numpy(),
                "dividends worth more than the spot",
                [f"present value {p:.6g} of the dividends to an expiry is not below the spot {s:.6g}"
                 for p, s in zip(over["pv"], over["spot"], strict=True)])
    _first_reason(reason, worthless, "its dividends' present value is not below the spot on " + str(as_of))
    return div_pv


def _delta_one_prices(night: CleanNight, ids: pd.Index, kind: NDArray[np.int8], reason: NDArray[np.object_],
                      price: FloatArray, spot: FloatArray, strike: FloatArray, tau: FloatArray, rate: FloatArray,
                      div_yield: FloatArray, log: ExceptionLog) -> FloatArray:
    """The mark of each delta-one kind: spot, future settlement price, forward model value.

    A future needs a row in future_marks.parquet; a row there naming no future is rejected.
    """
    price = price.copy()
    marks = night.future_marks
    is_future = kind == FUTURE
    f_idx = np.where(is_future, marks.index.get_indexer(ids), -1)
    price[is_future] = take(marks["price"].to_numpy(float), f_idx, np.nan)[is_future]
    _first_reason(reason, is_future & (f_idx < 0), f"no usable future mark on {night.raw.as_of}")
    not_future = ~marks.index.isin(ids[is_future])
    if not_future.any():
        log.add(night.raw.path("future_marks.parquet"), marks.index[not_future].to_numpy(), "mark of no future",
                "instruments.parquet of this date lists no future with this instrument_id")
    underlying = kind == UNDERLYING
    price[underlying] = spot[underlying]
    forward = np.flatnonzero((kind == FORWARD) & (reason == ""))
    if forward.size:
        state = MarketState(spot[forward], np.zeros(forward.size), tau[forward], rate[forward], div_yield[forward])
        price[forward] = value(strike[forward], np.ones(forward.size), state, kind=kind[forward])
    return price


def _vols(night: CleanNight, ids: pd.Index, reason: NDArray[np.object_], price: FloatArray, marked_vol: FloatArray,
          spot: FloatArray, strike: FloatArray, tau: FloatArray, rate: FloatArray, div_yield: FloatArray,
          cp: FloatArray, checks: CheckSettings, log: ExceptionLog, american: NDArray[np.bool_], scheme: Scheme,
          option: NDArray[np.bool_]) -> tuple[FloatArray, NDArray[np.bool_], NDArray[np.bool_]]:
    """Check option marks against the no-arbitrage bounds, solve missing vols, flag vols that disagree with price.

    American marks: bounds ``[intrinsic, S (call) or K (put)]``; vols solved and checked with the American model.
    Delta-one kinds (``option`` False) have no vol and are not checked here.
    """
    marks_file = night.raw.path("option_marks.parquet")
    candidates = (reason == "") & option
    vol = marked_vol.copy()
    lower, upper = no_arbitrage_bounds(spot, strike, tau, rate, div_yield, cp, american)
    slack = 1e-9 * np.maximum(1.0, np.abs(price))
    outside = candidates & ((price < lower - slack) | (price > upper + slack))
    detail = pd.Series([f"price {p:.6g} outside [{lo:.6g}, {hi:.6g}]" for p, lo, hi in
                        zip(price[outside], lower[outside], upper[outside], strict=True)], dtype=object)
    log.add(marks_file, ids[outside].to_numpy(), "price outside no-arbitrage bounds", detail.to_numpy())
    _first_reason(reason, outside, "option price outside its no-arbitrage bounds")

    expiring = (reason == "") & (tau == 0) & option
    vol[expiring & np.isnan(vol)] = 0.0  # no time left: the value is intrinsic whatever the vol
    _warn_expiry_marks(ids, expiring, price, spot, strike, cp, checks, marks_file, log)
    solve = (reason == "") & np.isnan(vol) & option
    vol_solved = np.zeros(len(ids), dtype=bool)
    if solve.any():
        i = np.flatnonzero(solve)
        result = implied_vol(price[i], spot[i], strike[i], tau[i], rate[i], div_yield[i], cp[i] > 0)
        a = american[i]
        if a.any():
            am = american_implied_vol(price[i[a]], spot[i[a]], strike[i[a]], tau[i[a]], rate[i[a]], div_yield[i[a]],
                                      cp[i[a]] > 0, scheme=scheme)
            result.vol[a], result.reason[a] = am.vol, am.reason
        vol[i] = result.vol
        failed = result.reason != ""
        flat = result.reason == NOT_IDENTIFIABLE_RULE
        log.add(marks_file, ids[i[failed & ~flat]].to_numpy(), "implied vol cannot be solved from price",
                result.reason[failed & ~flat])
        log.add(marks_file, ids[i[flat]].to_numpy(), "american vol not identifiable",
                "the American price hardly moves with vol here (vega below the floor): give implied_vol")
        reason[i[failed]] = "implied vol cannot be solved: " + result.reason[failed]
        vol_solved[i[~failed]] = True

    check = (reason == "") & ~vol_solved & (tau > 0) & option
    vol_mismatch = np.zeros(len(ids), dtype=bool)
    if check.any():
        i = np.flatnonzero(check)
        model = price_unchecked(spot[i], strike[i], tau[i], vol[i], rate[i], div_yield[i], cp[i])
        a = american[i]
        if a.any():
            model[a] = american_price_unchecked(spot[i[a]], strike[i[a]], tau[i[a]], vol[i[a]], rate[i[a]],
                                                div_yield[i[a]], cp[i[a]], scheme=scheme)
        scale = np.maximum(price[i], 0.01 * spot[i])
        off = np.abs(model - price[i]) > checks.iv_price_tolerance * scale
        vol_mismatch[i[off]] = True
        detail = pd.Series([f"implied_vol {v:.4g} prices {m:.6g}, mark is {p:.6g}" for v, m, p in
                            zip(vol[i[off]], model[off], price[i[off]], strict=True)], dtype=object)
        log.add(marks_file, ids[i[off]].to_numpy(), "implied vol inconsistent with price", detail.to_numpy(),
                WARNING)
    return vol, vol_solved, vol_mismatch


def _warn_expiry_marks(ids: pd.Index, expiring: NDArray[np.bool_], price: FloatArray, spot: FloatArray,
                       strike: FloatArray, cp: FloatArray, checks: CheckSettings, marks_file: str,
                       log: ExceptionLog) -> None:
    """On its expiry date an option is worth its intrinsic value (data contract): a mark above it is warned."""
    i = np.flatnonzero(expiring)
    intrinsic = np.maximum(cp[i] * (spot[i] - strike[i]), 0.0)
    off = np.abs(price[i] - intrinsic) > checks.iv_price_tolerance * np.maximum(price[i], 0.01 * spot[i])
    detail = pd.Series([f"mark {p:.6g} on the expiry date, intrinsic value {v:.6g}" for p, v in
                        zip(price[i[off]], intrinsic[off], strict=True)], dtype=object)
    log.add(marks_file, ids[i[off]].to_numpy(), "expiry-day mark is not the intrinsic value", detail.to_numpy(),
            WARNING)


def flag_stale_marks(prior: InstrumentMarket, run: InstrumentMarket, move: float, marks_file: str,
                     log: ExceptionLog) -> NDArray[np.bool_]:
    """Run-date marks unchanged from the prior date while the underlying moved: warned, per instrument."""
    j = prior.places(run.ids)
    both = (j >= 0) & run.usable & (run.tau_years > 0) & (run.kind == OPTION)
    jj = np.where(both, j, 0)
    same_price = run.price == prior.price[jj]
    same_vol = (run.marked_vol == prior.marked_vol[jj]) | (np.isnan(run.marked_vol) & np.isnan(prior.marked_vol[jj]))
    with np.errstate(all="ignore"):
        spot_move = np.abs(run.spot / prior.spot[jj] - 1.0)
    stale = both & prior.usable[jj] & same_price & same_vol & (spot_move > move)
    detail = pd.Series([f"price {p:.6g} unchanged while the underlying moved {m:.2%}" for p, m in
                        zip(run.price[stale], spot_move[stale], strict=True)], dtype=object)
    log.add(marks_file, run.ids[stale].to_numpy(), "stale mark", detail.to_numpy(), WARNING)
    return stale
