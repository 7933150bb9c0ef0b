"""Valuation by exercise style: one entry point over the European kernel and the American method.

Every function takes position- or instrument-aligned arrays and an ``american`` mask (None: all
European). European rows go to :mod:`attribution.pricing` (or :mod:`attribution.revaluation`'s
specialised kernel); American rows to :mod:`attribution.american` / :mod:`attribution.american_greeks`,
computed once per distinct state: rows that share ``group`` (e.g. the instrument index, or the
pair of instrument indices of both dates) share one computation; without ``group`` the distinct
rows are found from the values themselves.
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
          scheme: Scheme = STANDARD, group: NDArray[np.intp] | None = None) -> FloatArray:
    """Model price per unit of underlying."""
    return value_and_exercised(strike, cp, state, american, scheme=scheme, group=group)[0]


def value_and_exercised(strike: FloatArray, cp: FloatArray, state: MarketState, american: BoolArray | None = None, *,
                        scheme: Scheme = STANDARD, group: NDArray[np.intp] | None = None,
                        ) -> tuple[FloatArray, BoolArray]:
    """Model price per unit and, per row, whether an American option sits in its exercise region."""
    s, k, t, v, r, q = state.escrowed_spot, strike, state.tau_years, state.vol, state.rate, state.div_yield
    price = price_unchecked(s, k, t, v, r, q, cp)
    exercised = np.zeros(s.size, dtype=bool)
    rows, u, inverse = _american_distinct(american, group, (s, k, t, v, r, q, cp))
    if rows.size:
        p, e = american_price_and_exercised_unchecked(s[u], k[u], t[u], v[u], r[u], q[u], cp[u], scheme=scheme)
        price[rows], exercised[rows] = p[inverse], e[inverse]
    return price, exercised


def value_and_greeks(strike: FloatArray, cp: FloatArray, state: MarketState, american: BoolArray | None = None, *,
                     scheme: Scheme = STANDARD, group: NDArray[np.intp] | None = None,
                     full: bool = True) -> tuple[Greeks, BoolArray]:
    """Price and the full greek set per unit of underlying, and the American rows in their exercise region.

    ``full=False``: American rows get price, delta, gamma and theta only (one boundary instead of seven).
    """
    s, k, t, v, r, q = state.escrowed_spot, strike, state.tau_years, state.vol, state.rate, state.div_yield
    g = greeks_unchecked(s, k, t, v, r, q, cp)
    exercised = np.zeros(s.size, dtype=bool)
    rows, u, inverse = _american_distinct(american, group, (s, k, t, v, r, q, cp))
    if rows.size:
        ga, e = american_greeks_and_exercised_unchecked(s[u], k[u], t[u], v[u], r[u], q[u], cp[u], scheme=scheme,
                                                        bumps=full)
        for name in Greeks.__slots__:
            getattr(g, name)[rows] = getattr(ga, name)[inverse]
        exercised[rows] = e[inverse]
    return g, exercised


def revaluation_shares(strike: FloatArray, cp: FloatArray, state0: MarketState, state1: MarketState,
                       american: BoolArray | None = None, *, scheme: Scheme = STANDARD,
                       group: NDArray[np.intp] | None = None) -> RevaluationShares:
    """Order-independent (Shapley) split of the model P&L per unit; American rows revalued by their method.

    The 32 states of an American option share 16 exercise boundaries: the boundary does not depend on
    spot, and states are priced together so that those differing only in spot solve it once.
    """
    shares = shapley_shares(strike, cp, state0.spot, state0.vol, state0.tau_years, state0.rate, state0.div_yield,
                            state1.spot, state1.vol, state1.tau_years, state1.rate, state1.div_yield,
                            state0.div_pv, state1.div_pv)
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
