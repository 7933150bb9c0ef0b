"""Valuation by instrument kind and exercise style: the one entry point the explain, the exposures and
the order-independent revaluation call, so that they never ask what an instrument is.

Every function takes position- or instrument-aligned arrays, an ``american`` mask (None: all
European) and a ``kind`` array of codes (:data:`KIND_CODES`; None: every row an option). Options:
European rows go to :mod:`attribution.pricing` (or :mod:`attribution.revaluation`'s specialised
kernel); American rows to :mod:`attribution.american` / :mod:`attribution.american_greeks`,
computed once per distinct state: rows that share ``group`` (e.g. the instrument index, or the
pair of instrument indices of both dates) share one computation; without ``group`` the distinct
rows are found from the values themselves. Delta-one kinds (data contract version 2, "Instrument
kinds"), per unit of underlying, with the same greek units as options and S the escrowed spot:

* ``underlying``: V = S (the spot itself, not escrowed: a share is worth its price); delta 1, every
  other greek exactly 0;
* ``forward`` (strike K = the agreed delivery price): V = S e^(-q tau) - K e^(-r tau);
* ``future``: the cost-of-carry price F* = S e^((r - q) tau) (its marked price is the settlement
  price, so the basis F - F* is the mark gap).

Every function returns the same arrays for every kind; a delta-one row is never "exercised".
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from attribution.american import STANDARD, Scheme, american_price_and_exercised_unchecked
from attribution.american_greeks import american_greeks_and_exercised_unchecked
from attribution.arrays import BoolArray, FloatArray
from attribution.pricing import Greeks, greeks_unchecked, price_unchecked
from attribution.revaluation import FACTOR_NAMES, N_STATES, RevaluationShares, shapley_allocate, shapley_shares

OPTION, UNDERLYING, FUTURE, FORWARD = 0, 1, 2, 3
KIND_CODES: dict[str, int] = {"option": OPTION, "underlying": UNDERLYING, "future": FUTURE, "forward": FORWARD}
KIND_NAMES: dict[int, str] = {code: name for name, code in KIND_CODES.items()}


@dataclass(frozen=True, slots=True)
class MarketState:
    """The five risk factors of each position or instrument on one date (decimals, years).

    ``div_pv`` is the present value of the discrete dividends to expiry (:mod:`attribution.dividends`);
    every model prices on :attr:`escrowed_spot` = ``spot - div_pv`` and moves ``div_pv`` with the
    dividend factor. Without dividends it is 0 and the escrowed spot is the spot, bit for bit.
    """

    spot: FloatArray
    vol: FloatArray
    tau_years: FloatArray
    rate: FloatArray
    div_yield: FloatArray
    div_pv: FloatArray | float = 0.0

    def __post_init__(self) -> None:
        """``div_pv`` as an array shaped like ``spot`` (a scalar 0 when no dividends are given)."""
        object.__setattr__(self, "div_pv", np.broadcast_to(np.asarray(self.div_pv, dtype=float),
                                                           np.shape(self.spot)).copy())

    @property
    def escrowed_spot(self) -> FloatArray:
        """The spot the model prices on: spot less the dividends' present value."""
        return self.spot - self.div_pv


def kind_codes(names: NDArray[np.object_]) -> NDArray[np.int8]:
    """Codes of kind names (null means ``option``); raises on a name outside the contract."""
    values = np.asarray(names, dtype=object)
    out = np.full(values.shape, OPTION, dtype=np.int8)
    for name, code in KIND_CODES.items():
        out[values == name] = code
    null = np.array([v is None or (isinstance(v, float) and v != v) for v in values.tolist()], dtype=bool)
    unknown = ~np.isin(values, list(KIND_CODES)) & ~null.reshape(values.shape)
    if unknown.any():
        raise ValueError(f"unknown instrument kind {values[unknown][0]!r}")
    return out


def delta_one(kind: NDArray[np.int8], spot: FloatArray, escrowed: FloatArray, strike: FloatArray,
              tau_years: FloatArray, rate: FloatArray, div_yield: FloatArray) -> tuple[FloatArray, ...]:
    """Price and greeks (:class:`Greeks` field order) of delta-one rows (``kind`` other than option).

    ``spot`` values an ``underlying``; forwards and futures price on the ``escrowed`` spot."""
    s, k, t, r, q = escrowed, strike, tau_years, rate, div_yield
    zeros = np.zeros_like(s)
    with np.errstate(invalid="ignore"):
        disc_q, disc_r, carry = np.exp(-q * t), np.exp(-r * t), np.exp((r - q) * t)
        s_q, k_r, fut = s * disc_q, k * disc_r, s * carry
    is_fwd, is_fut = kind == FORWARD, kind == FUTURE
    price = np.select([is_fwd, is_fut], [s_q - k_r, fut], default=spot)
    delta = np.select([is_fwd, is_fut], [disc_q, carry], default=1.0)
    theta = np.select([is_fwd, is_fut], [q * s_q - r * k_r, -(r - q) * fut], default=0.0)
    rho = np.select([is_fwd, is_fut], [t * k_r, t * fut], default=0.0)
    dividend_rho = np.select([is_fwd, is_fut], [-t * s_q, -t * fut], default=0.0)
    return price, delta, zeros, zeros, theta, rho, dividend_rho, zeros, zeros


def delta_one_price(kind: NDArray[np.int8], spot: FloatArray, escrowed: FloatArray, strike: FloatArray,
                    tau_years: FloatArray, rate: FloatArray, div_yield: FloatArray) -> FloatArray:
    """The price of :func:`delta_one` alone (the same operations), for revaluations that need no greeks."""
    s, k, t, r, q = escrowed, strike, tau_years, rate, div_yield
    with np.errstate(invalid="ignore"):
        s_q, k_r, fut = s * np.exp(-q * t), k * np.exp(-r * t), s * np.exp((r - q) * t)
    price: FloatArray = np.select([kind == FORWARD, kind == FUTURE], [s_q - k_r, fut], default=spot)
    return price


def _delta_one_rows(kind: NDArray[np.int8] | None, n: int) -> NDArray[np.intp]:
    return np.zeros(0, dtype=np.intp) if kind is None else np.flatnonzero(np.asarray(kind)[:n] != OPTION)


def settlement_value(kind: NDArray[np.int8], spot: FloatArray, strike: FloatArray, cp: FloatArray) -> FloatArray:
    """Value per unit of underlying at expiry on ``spot``: an option's intrinsic value, a future's final
    settlement at the spot, a forward's S - K, an underlying's S."""
    kind = np.asarray(kind)
    with np.errstate(invalid="ignore"):
        intrinsic = np.maximum(cp * (spot - strike), 0.0)
    return np.select([kind == OPTION, kind == FORWARD], [intrinsic, spot - strike], default=spot)


def _distinct(rows: NDArray[np.intp], group: NDArray[np.intp] | None,
              values: tuple[FloatArray, ...]) -> tuple[NDArray[np.intp], NDArray[np.intp]]:
    """Rows computed (indices into ``rows``) and, per row, its computed row."""
    if group is not None:
        _, first, inverse = np.unique(group[rows], return_index=True, return_inverse=True)
    else:
        _, first, inverse = np.unique(np.stack([v[rows] for v in values], axis=1), axis=0, return_index=True,
                                      return_inverse=True)
    return first, inverse.reshape(-1)


def _american_rows(american: BoolArray | None, n: int) -> NDArray[np.intp]:
    return np.zeros(0, dtype=np.intp) if american is None else np.flatnonzero(american[:n])


def _american_distinct(american: BoolArray | None, group: NDArray[np.intp] | None, values: tuple[FloatArray, ...],
                       ) -> tuple[NDArray[np.intp], NDArray[np.intp], NDArray[np.intp]]:
    """The American rows, the rows computed for them (one per distinct state) and, per American row, its own."""
    rows = _american_rows(american, values[0].size)
    if not rows.size:
        return rows, rows, rows
    first, inverse = _distinct(rows, group, values)
    return rows, rows[first], inverse


def value(strike: FloatArray, cp: FloatArray, state: MarketState, american: BoolArray | None = None, *,
          kind: NDArray[np.int8] | None = None, scheme: Scheme = STANDARD,
          group: NDArray[np.intp] | None = None) -> FloatArray:
    """Model price per unit of underlying."""
    return value_and_exercised(strike, cp, state, american, kind=kind, scheme=scheme, group=group)[0]


def value_and_exercised(strike: FloatArray, cp: FloatArray, state: MarketState, american: BoolArray | None = None, *,
                        kind: NDArray[np.int8] | None = None, scheme: Scheme = STANDARD,
                        group: NDArray[np.intp] | None = None) -> tuple[FloatArray, BoolArray]:
    """Model price per unit and, per row, whether an American option sits in its exercise region."""
    s, k, t, v, r, q = state.escrowed_spot, strike, state.tau_years, state.vol, state.rate, state.div_yield
    price = price_unchecked(s, k, t, v, r, q, cp)
    d1 = _delta_one_rows(kind, s.size)
    if d1.size:
        price[d1] = delta_one_price(np.asarray(kind)[d1], state.spot[d1], s[d1], k[d1], t[d1], r[d1], q[d1])
    exercised = np.zeros(s.size, dtype=bool)
    rows, u, inverse = _american_distinct(american, group, (s, k, t, v, r, q, cp))
    if rows.size:
        p, e = american_price_and_exercised_unchecked(s[u], k[u], t[u], v[u], r[u], q[u], cp[u], scheme=scheme)
        price[rows], exercised[rows] = p[inverse], e[inverse]
    return price, exercised


def value_and_greeks(strike: FloatArray, cp: FloatArray, state: MarketState, american: BoolArray | None = None, *,
                     kind: NDArray[np.int8] | None = None, scheme: Scheme = STANDARD,
                     group: NDArray[np.intp] | None = None, full: bool = True) -> tuple[Greeks, BoolArray]:
    """Price and the full greek set per unit of underlying, and the American rows in their exercise region.

    ``full=False``: American rows get price, delta, gamma and theta only (one boundary instead of seven).
    """
    s, k, t, v, r, q = state.escrowed_spot, strike, state.tau_years, state.vol, state.rate, state.div_yield
    g = greeks_unchecked(s, k, t, v, r, q, cp)
    d1 = _delta_one_rows(kind, s.size)
    if d1.size:
        parts = delta_one(np.asarray(kind)[d1], state.spot[d1], s[d1], k[d1], t[d1], r[d1], q[d1])
        for name, part in zip(Greeks.__slots__, parts, strict=True):
            getattr(g, name)[d1] = part
    exercised = np.zeros(s.size, dtype=bool)
    rows, u, inverse = _american_distinct(american, group, (s, k, t, v, r, q, cp))
    if rows.size:
        ga, e = american_greeks_and_exercised_unchecked(s[u], k[u], t[u], v[u], r[u], q[u], cp[u], scheme=scheme,
                                                        bumps=full)
        for name in Greeks.__slots__:
            getattr(g, name)[rows] = getattr(ga, name)[inverse]
        exercised[rows] = e[inverse]
    return g, exercised


def _delta_one_shares(kind: NDArray[np.int8], strike: FloatArray, pairs: list[tuple[FloatArray, FloatArray]],
                      pv: tuple[FloatArray, FloatArray], rows: NDArray[np.intp],
                      group: NDArray[np.intp] | None = None) -> FloatArray:
    """Shapley shares (factors x rows) of delta-one rows: their 32 states valued by :func:`delta_one`
    (once per ``group``: rows of one group share both states), split over every row."""
    if group is None:
        first, inverse = np.arange(rows.size), None
    else:
        first, inverse = _distinct(rows, group, ())
    u = rows[first]
    by_state = np.empty((N_STATES, u.size))
    for state in range(N_STATES):
        spot, _vol, tau, rate, div = (pair[state >> f & 1][u] for f, pair in enumerate(pairs))
        escrowed = spot - pv[state >> 4 & 1][u]  # the dividends' value moves with the dividend factor
        by_state[state] = delta_one_price(kind[u], spot, escrowed, strike[u], tau, rate, div)
    shares = shapley_allocate(by_state)  # each row's split depends on its own states alone
    return shares if inverse is None else shares[:, inverse]


def _european_shares(strike: FloatArray, cp: FloatArray, state0: MarketState, state1: MarketState,
                     rows: NDArray[np.intp] | None, group: NDArray[np.intp] | None = None) -> RevaluationShares:
    """European shares of the option ``rows`` (None: every row), in arrays over every row (0 elsewhere); once per
    ``group`` (rows of one group share both states: their shares per unit are the same numbers)."""
    pv0, pv1 = np.asarray(state0.div_pv, dtype=float), np.asarray(state1.div_pv, dtype=float)
    if rows is None and group is None:
        return shapley_shares(strike, cp, state0.spot, state0.vol, state0.tau_years, state0.rate, state0.div_yield,
                              state1.spot, state1.vol, state1.tau_years, state1.rate, state1.div_yield, pv0, pv1)
    if rows is None:
        rows = np.arange(strike.size)
    out = [np.zeros(strike.size) for _ in FACTOR_NAMES]
    if rows.size:
        first, inverse = (np.arange(rows.size), None) if group is None else _distinct(rows, group, ())
        u = rows[first]
        part = shapley_shares(strike[u], cp[u], state0.spot[u], state0.vol[u], state0.tau_years[u], state0.rate[u],
                              state0.div_yield[u], state1.spot[u], state1.vol[u], state1.tau_years[u], state1.rate[u],
                              state1.div_yield[u], pv0[u], pv1[u])
        for f, name in enumerate(FACTOR_NAMES):
            values = getattr(part, name)
            out[f][rows] = values if inverse is None else values[inverse]
    return RevaluationShares(*out)


def revaluation_shares(strike: FloatArray, cp: FloatArray, state0: MarketState, state1: MarketState,
                       american: BoolArray | None = None, *, kind: NDArray[np.int8] | None = None,
                       scheme: Scheme = STANDARD, group: NDArray[np.intp] | None = None) -> RevaluationShares:
    """Order-independent (Shapley) split of the model P&L per unit; American rows revalued by their method,
    delta-one rows by their formula, so the five shares add up to the model P&L for every kind.

    The 32 states of an American option share 16 exercise boundaries: the boundary does not depend on
    spot, and states are priced together so that those differing only in spot solve it once. ``group``: rows of
    one group share both states (one instrument on both dates), so each group is revalued once, whatever its kind.
    """
    d1 = _delta_one_rows(kind, strike.size)
    if not d1.size:
        shares = _european_shares(strike, cp, state0, state1, None, group)
    else:  # the European kernel refuses a delta-one row's terms (no strike, no vol): options alone go there
        options = np.flatnonzero(np.asarray(kind)[: strike.size] == OPTION)  # every row but d1, in order
        shares = _european_shares(strike, cp, state0, state1, options, group)
        pairs = [(getattr(state0, f), getattr(state1, f)) for f in ("spot", "vol", "tau_years", "rate", "div_yield")]
        pv = (np.asarray(state0.div_pv, dtype=float), np.asarray(state1.div_pv, dtype=float))
        one = _delta_one_shares(np.asarray(kind), strike, pairs, pv, d1, group)
        out = [getattr(shares, name) for name in FACTOR_NAMES]
        for f in range(len(FACTOR_NAMES)):
            out[f][d1] = one[f]
        shares = RevaluationShares(*out)
    rows = _american_rows(american, strike.size)
    if not rows.size:
        return shares
    pairs = [(getattr(state0, name), getattr(state1, name)) for name in ("spot", "vol", "tau_years", "rate",
                                                                          "div_yield")]
    pv = (np.asarray(state0.div_pv), np.asarray(state1.div_pv))  # arrays after __post_init__; move with bit 4
    first, inverse = _distinct(rows, group, (strike, cp, *(a for pair in pairs for a in pair), *pv))
    u = rows[first]
    m = u.size
    columns = [np.concatenate([pair[state >> f & 1][u] for state in range(N_STATES)])
               for f, pair in enumerate(pairs)]
    spot, vol, tau, rate, div = columns
    spot = spot - np.concatenate([pv[state >> 4 & 1][u] for state in range(N_STATES)])
    prices, _ = american_price_and_exercised_unchecked(spot, np.tile(strike[u], N_STATES), tau, vol, rate, div,
                                                        np.tile(cp[u], N_STATES), scheme=scheme)
    american_shares = shapley_allocate(prices.reshape(N_STATES, m))
    out = [getattr(shares, name).copy() for name in FACTOR_NAMES]
    for f in range(len(FACTOR_NAMES)):
        out[f][rows] = american_shares[f][inverse]
    return RevaluationShares(*out)
