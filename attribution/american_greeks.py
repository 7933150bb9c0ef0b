"""Greeks and implied vol of American options, consistent with :mod:`attribution.american`'s price.

Greeks (units as in :mod:`attribution.pricing`):

* delta and gamma: analytic derivatives of the price formula with the exercise boundary held
  (the boundary does not depend on spot);
* theta: from the pricing equation in the continuation region,
  ``theta = r V - (r - q) S delta - vol^2 S^2 gamma / 2``, and 0 in the exercise region, where the
  option is worth its intrinsic value whatever the time left. So a deep in-the-money American put
  has no positive theta, unlike its European twin;
* vega, volga, rho, dividend rho: central differences of the price with the boundary re-solved at
  each bumped state (the fixed iteration counts make the price smooth, so the differences are
  clean); vanna: the central difference of the analytic delta on the vol-bumped boundaries.

In the exercise region the value is intrinsic: delta is -1 (put) or +1 (call), every other greek 0.
Options never exercised early (a put with r <= 0, a call with q <= 0) get the European greeks.

Implied vol: a safeguarded secant search on the American price, started from the de-Americanised
European vol (the European implied vol of the mark less its early-exercise premium). Where the
price hardly moves with vol (vega below :data:`VEGA_FLOOR_PER_STRIKE` of the strike per 1.00 of
vol, e.g. a put in its exercise region) the vol is refused with :data:`NOT_IDENTIFIABLE_RULE`.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray

from attribution.american import (
    STANDARD,
    PutValues,
    Scheme,
    _validated,
    american_price_unchecked,
    deterministic_put,
    distinct_states,
    in_option_units,
    put_frame,
    put_values,
    regimes,
    solve_put_boundaries,
)
from attribution.arrays import FloatArray
from attribution.implied_vol import ImpliedVolResult, implied_vol
from attribution.pricing import Greeks, _limits, greeks_unchecked, no_arbitrage_bounds, price_unchecked

VOL_BUMP = 1e-3  # per 1.00 of vol (at most half the vol)
RATE_BUMP = 1e-4  # per 1.00 of rate or yield (the put's rate stays > 0)
VEGA_FLOOR_PER_STRIKE = 1e-4  # below it a vol point moves the price by less than 1e-6 of the strike
NOT_IDENTIFIABLE_RULE = "american implied vol not identifiable (vega below the floor): give implied_vol"
_IV_ITERATIONS = 40
_IV_PRICE_TOL = 1e-12  # of the strike
_IV_MAX_VOL = 10.0


def american_greeks(spot: ArrayLike, strike: ArrayLike, tau_years: ArrayLike, vol: ArrayLike, rate: ArrayLike,
                    div_yield: ArrayLike, is_call: ArrayLike, *, scheme: Scheme = STANDARD,
                    threads: int | None = None) -> Greeks:
    """Price and the full greek set of American options (raises on an invalid or two-boundary input)."""
    shape, (s, k, t, v, r, q, c) = _validated(spot, strike, tau_years, vol, rate, div_yield, is_call)
    g = american_greeks_unchecked(s, k, t, v, r, q, np.where(c != 0, 1.0, -1.0), scheme=scheme, threads=threads)
    return Greeks(*(getattr(g, name).reshape(shape) for name in Greeks.__slots__))


def american_greeks_unchecked(s: FloatArray, k: FloatArray, t: FloatArray, v: FloatArray, r: FloatArray,
                              q: FloatArray, cp: FloatArray, *, scheme: Scheme = STANDARD,
                              threads: int | None = None) -> Greeks:
    """Price and greeks of validated flat float arrays; ``cp`` is +1 call / -1 put."""
    return american_greeks_and_exercised_unchecked(s, k, t, v, r, q, cp, scheme=scheme, threads=threads)[0]


def american_greeks_and_exercised_unchecked(
    s: FloatArray, k: FloatArray, t: FloatArray, v: FloatArray, r: FloatArray, q: FloatArray, cp: FloatArray, *,
    scheme: Scheme = STANDARD, threads: int | None = None, bumps: bool = True,
) -> tuple[Greeks, NDArray[np.bool_]]:
    """Greeks and, per option, whether spot sits in the exercise region (time and vol left, exercised early).

    ``bumps=False``: only price, delta, gamma and theta of the American rows (one boundary, no bumps).
    """
    frame = put_frame(s, k, r, q, cp)
    limit, european, early = regimes(t, v, frame.rr)
    out = tuple(np.zeros(s.size) for _ in Greeks.__slots__)
    exercised = np.zeros(s.size, dtype=bool)
    parts: list[tuple[np.ndarray, Greeks]] = []
    if european.any():
        i = np.flatnonzero(european)
        parts.append((i, greeks_unchecked(s[i], k[i], t[i], v[i], r[i], q[i], cp[i])))
    if limit.any():
        i = np.flatnonzero(limit)
        parts.append((i, _limit_greeks(s[i], k[i], t[i], r[i], q[i], cp[i])))
    if early.any():
        i = np.flatnonzero(early)
        early_greeks, exercised[i] = _early_greeks(s[i], k[i], t[i], v[i], r[i], q[i], cp[i], scheme, threads,
                                                   bumps)
        parts.append((i, early_greeks))
    for i, g in parts:
        for target, name in zip(out, Greeks.__slots__, strict=True):
            target[i] = getattr(g, name)
    return Greeks(*out), exercised


def _limit_greeks(s: FloatArray, k: FloatArray, t: FloatArray, r: FloatArray, q: FloatArray,
                  cp: FloatArray) -> Greeks:
    """tau = 0: the European limits (intrinsic); vol = 0 with time left: differences of the deterministic value."""
    g = Greeks(*(np.array(a, dtype=float) for a in _limits(s, k, t, r, q, cp)))
    live = t > 0
    if not live.any():
        return g
    i = np.flatnonzero(live)
    frame = put_frame(s[i], k[i], r[i], q[i], cp[i])

    def value(spot: FloatArray, tau: FloatArray, rate: FloatArray, yld: FloatArray) -> FloatArray:
        f = put_frame(spot, k[i], rate, yld, cp[i])
        return f.scale * deterministic_put(f.x, tau, f.rr, f.qq)

    si, ti, ri, qi = s[i], t[i], r[i], q[i]
    hs, ht = 1e-6 * si, np.minimum(1e-6, 0.5 * ti)
    g.price[i] = frame.scale * deterministic_put(frame.x, ti, frame.rr, frame.qq)
    g.delta[i] = (value(si + hs, ti, ri, qi) - value(si - hs, ti, ri, qi)) / (2.0 * hs)
    g.theta_per_year[i] = -(value(si, ti + ht, ri, qi) - value(si, ti - ht, ri, qi)) / (2.0 * ht)
    g.rho[i] = (value(si, ti, ri + RATE_BUMP, qi) - value(si, ti, ri - RATE_BUMP, qi)) / (2.0 * RATE_BUMP)
    g.dividend_rho[i] = (value(si, ti, ri, qi + RATE_BUMP) - value(si, ti, ri, qi - RATE_BUMP)) / (2.0 * RATE_BUMP)
    return g


def _to_option(p: PutValues, x: FloatArray, scale: FloatArray, call: np.ndarray) -> tuple[FloatArray, ...]:
    """Price, delta and gamma of the option from its unit-strike put of the symmetry."""
    delta = np.where(call, p.price - x * p.delta, p.delta)
    gamma = np.where(call, x * x * p.gamma, p.gamma) / scale
    return scale * p.price, delta, gamma


def _early_greeks(s: FloatArray, k: FloatArray, t: FloatArray, v: FloatArray, r: FloatArray, q: FloatArray,
                  cp: FloatArray, scheme: Scheme, threads: int | None,
                  bumps: bool = True) -> tuple[Greeks, NDArray[np.bool_]]:
    """Greeks of options exercised early (put of the symmetry with rate > 0): 7 boundaries per distinct state.

    ``bumps=False``: price, delta, gamma and theta only, on one boundary (vega and the rest left 0).
    """
    f = put_frame(s, k, r, q, cp)
    call = cp > 0
    (T, vol, rr, qq), state = distinct_states(t, v, f.rr, f.qq)
    m = T.size
    hv = np.minimum(VOL_BUMP, 0.5 * vol)
    hr_down = np.minimum(RATE_BUMP, 0.5 * rr)
    copies = 7 if bumps else 1
    bump_vol = np.concatenate([vol, vol + hv, vol - hv, vol, vol, vol, vol][:copies])
    bump_r = np.concatenate([rr, rr, rr, rr + RATE_BUMP, rr - hr_down, rr, rr][:copies])
    bump_q = np.concatenate([qq, qq, qq, qq, qq, qq + RATE_BUMP, qq - RATE_BUMP][:copies])
    bounds = solve_put_boundaries(np.tile(T, copies), bump_vol, bump_r, bump_q, scheme, threads=threads)
    base = put_values(bounds, state, f.x, threads=threads)
    _, delta, gamma = _to_option(base, f.x, f.scale, call)
    price = in_option_units(base, f.scale, s, k, t, v, r, q, cp)  # intrinsic and European floors in option units
    held = ~base.exercised  # the exercise region: intrinsic, whatever vol, rates or time
    theta = (r * price - (r - q) * s * delta - 0.5 * v * v * s * s * gamma) * held
    zero = np.zeros_like(price)
    if not bumps:
        return Greeks(price, delta, gamma, zero, theta, zero, zero, zero, zero), base.exercised
    up, down = (put_values(bounds, state + j * m, f.x, threads=threads) for j in (1, 2))
    h_v = hv[state]
    _, delta_up, _ = _to_option(up, f.x, f.scale, call)
    _, delta_down, _ = _to_option(down, f.x, f.scale, call)
    vega = f.scale * (up.price - down.price) / (2.0 * h_v)
    volga = f.scale * (up.price - 2.0 * base.price + down.price) / (h_v * h_v)
    vanna = (delta_up - delta_down) / (2.0 * h_v)
    p_r_up, p_r_down, p_q_up, p_q_down = (put_values(bounds, state + j * m, f.x, derivatives=False,
                                                     threads=threads).price
                                          for j in (3, 4, 5, 6))
    d_rr = f.scale * (p_r_up - p_r_down) / (RATE_BUMP + hr_down[state])
    d_qq = f.scale * (p_q_up - p_q_down) / (2.0 * RATE_BUMP)
    rho, dividend_rho = np.where(call, d_qq, d_rr), np.where(call, d_rr, d_qq)
    return Greeks(price, delta, gamma, vega * held, theta, rho * held, dividend_rho * held,
                  vanna * held, volga * held), base.exercised


def american_implied_vol(price: ArrayLike, spot: ArrayLike, strike: ArrayLike, tau_years: ArrayLike,
                         rate: ArrayLike, div_yield: ArrayLike, is_call: ArrayLike, *,
                         scheme: Scheme = STANDARD) -> ImpliedVolResult:
    """The vol at which the American price equals ``price``; NaN with a reason where none is identifiable.

    Inputs must pass :func:`attribution.american.american_invalid_reasons` (with any vol) and have
    time left; the caller checks that first.
    """
    p, s, k, t, r, q, c = (np.atleast_1d(np.array(a, dtype=float)) for a in
                           np.broadcast_arrays(price, spot, strike, tau_years, rate, div_yield, is_call))
    cp = np.where(c != 0, 1.0, -1.0)
    zero = np.zeros_like(p)
    floor = american_price_unchecked(s, k, t, zero, r, q, cp, scheme=scheme)  # the value at zero vol
    _, upper = no_arbitrage_bounds(s, k, t, r, q, cp, american=np.ones(p.shape, dtype=bool))
    reason = np.full(p.shape, "", dtype=object)
    reason[p >= upper] = "price at or above the no-arbitrage upper bound"
    reason[(reason == "") & (p < floor - 1e-12 * k)] = "price below the American value at zero vol"
    vol = np.full(p.shape, np.nan)
    i = np.flatnonzero(reason == "")
    if i.size:
        vol[i] = _secant(p[i], s[i], k[i], t[i], r[i], q[i], cp[i], _start(p[i], s[i], k[i], t[i], r[i], q[i],
                                                                           cp[i], scheme), scheme)
        hv = np.minimum(VOL_BUMP, 0.5 * vol[i])
        at = american_price_unchecked(s[i], k[i], t[i], vol[i], r[i], q[i], cp[i], scheme=scheme)
        below = american_price_unchecked(s[i], k[i], t[i], vol[i] - hv, r[i], q[i], cp[i], scheme=scheme)
        vega = (at - below) / hv  # from below: a mark at intrinsic fits every vol up to the one found
        flat = ~(vega >= VEGA_FLOOR_PER_STRIKE * k[i])
        vol[i[flat]] = np.nan
        reason[i[flat]] = NOT_IDENTIFIABLE_RULE
    return ImpliedVolResult(vol, reason)


def _start(p: FloatArray, s: FloatArray, k: FloatArray, t: FloatArray, r: FloatArray, q: FloatArray,
           cp: FloatArray, scheme: Scheme) -> FloatArray:
    """De-Americanised European vol: the European vol of the mark less the premium at that vol (0.3 if none)."""
    euro = implied_vol(p, s, k, t, r, q, cp > 0).vol
    guess = np.where(np.isfinite(euro), euro, 0.3)
    premium = (american_price_unchecked(s, k, t, guess, r, q, cp, scheme=scheme)
               - price_unchecked(s, k, t, guess, r, q, cp))
    start = implied_vol(p - premium, s, k, t, r, q, cp > 0).vol
    return np.clip(np.where(np.isfinite(start), start, guess), 1e-3, _IV_MAX_VOL / 2)


def _secant(p: FloatArray, s: FloatArray, k: FloatArray, t: FloatArray, r: FloatArray, q: FloatArray,
            cp: FloatArray, start: FloatArray, scheme: Scheme) -> FloatArray:
    """Secant steps on vol, kept inside a bracket of the root; a step that leaves it bisects instead."""
    lo, hi = np.zeros_like(p), np.full_like(p, _IV_MAX_VOL)
    x0, f0 = np.zeros_like(p), american_price_unchecked(s, k, t, np.zeros_like(p), r, q, cp, scheme=scheme) - p
    x1 = start.copy()
    active = np.ones(p.shape, dtype=bool)
    for _ in range(_IV_ITERATIONS):
        a = np.flatnonzero(active)
        if a.size == 0:
            break
        f1 = american_price_unchecked(s[a], k[a], t[a], x1[a], r[a], q[a], cp[a], scheme=scheme) - p[a]
        above = f1 > 0
        hi[a] = np.where(above, np.minimum(hi[a], x1[a]), hi[a])
        lo[a] = np.where(above, lo[a], np.maximum(lo[a], x1[a]))
        with np.errstate(divide="ignore", invalid="ignore"):
            step = f1 * (x1[a] - x0[a]) / (f1 - f0[a])
        new = x1[a] - step
        bad = ~np.isfinite(new) | (new <= lo[a]) | (new >= hi[a])
        new = np.where(bad, 0.5 * (lo[a] + hi[a]), new)
        done = (np.abs(f1) <= _IV_PRICE_TOL * k[a]) | (hi[a] - lo[a] <= 1e-12)
        x0[a], f0[a] = x1[a], f1
        x1[a] = np.where(done, x1[a], new)
        active[a[done]] = False
    return x1
