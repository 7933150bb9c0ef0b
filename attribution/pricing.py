"""Generalised Black-Scholes-Merton pricing kernel: pure numpy, arrays in and arrays out.

The model is the Black-Scholes-Merton model with a continuous dividend yield ``q``
(Garman-Kohlhagen for FX options, with the foreign rate in place of ``q``).

Units, fixed for the whole package:

* ``spot``, ``strike``: currency per unit of underlying; ``tau_years``: year fraction to expiry;
* ``vol``, ``rate``, ``div_yield``: decimals (0.25 = 25 %), rates continuously compounded;
* ``vega`` per 1.00 of volatility, ``rho`` per 1.00 of rate, ``dividend_rho`` per 1.00 of yield;
* ``theta_per_year`` = dV/dt for calendar time t, i.e. -dV/dtau, per year;
* ``vanna`` = d2V/dS dvol, ``volga`` = d2V/dvol2 (per 1.00 of volatility, squared for volga).

Limits, without NaN or warnings: at ``tau_years == 0`` the option is worth its intrinsic
value, delta is the step (one half exactly at the strike) and every other greek is zero; at
``vol == 0`` with time left it is worth the discounted forward intrinsic value.

Invalid inputs are refused here, never clamped: :func:`invalid_reasons` says why for each
element, and :func:`bsm_price` / :func:`bsm_greeks` raise :class:`InvalidPricingInput`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.special import ndtr

FloatArray = NDArray[np.float64]
_INV_SQRT_2PI = 1.0 / np.sqrt(2.0 * np.pi)


class InvalidPricingInput(ValueError):
    """Raised when a pricing input breaks a rule of the model (see :func:`invalid_reasons`)."""


@dataclass(frozen=True, slots=True)
class Greeks:
    """Price and greeks of a set of options, one array element per option (units: module doc)."""

    price: FloatArray
    delta: FloatArray
    gamma: FloatArray
    vega: FloatArray
    theta_per_year: FloatArray
    rho: FloatArray
    dividend_rho: FloatArray
    vanna: FloatArray
    volga: FloatArray


def call_put_sign(is_call: ArrayLike) -> FloatArray:
    """+1.0 for a call and -1.0 for a put."""
    return np.where(np.asarray(is_call, dtype=bool), 1.0, -1.0)


def normal_pdf(x: FloatArray) -> FloatArray:
    """Standard normal density."""
    return _INV_SQRT_2PI * np.exp(-0.5 * x * x)


def invalid_reasons(
    spot: ArrayLike,
    strike: ArrayLike,
    tau_years: ArrayLike,
    vol: ArrayLike,
    rate: ArrayLike,
    div_yield: ArrayLike,
) -> NDArray[np.object_]:
    """For each option the first rule its inputs break, or ``""`` when they are valid.

    Rules: every input finite; spot > 0; strike > 0; vol >= 0; tau_years >= 0.
    """
    arrays = np.broadcast_arrays(*(np.asarray(a, dtype=float) for a in
                                   (spot, strike, tau_years, vol, rate, div_yield)))
    s, k, t, v, _r, _q = arrays
    reasons = np.full(s.shape, "", dtype=object)
    names = ("spot", "strike", "tau_years", "vol", "rate", "div_yield")
    checks: list[tuple[NDArray[np.bool_], str]] = [
        (~np.isfinite(a), f"{name} is not a finite number") for a, name in zip(arrays, names, strict=True)
    ]
    checks += [
        (s <= 0, "spot must be > 0"),
        (k <= 0, "strike must be > 0"),
        (v < 0, "vol must be >= 0"),
        (t < 0, "tau_years must be >= 0 (the option has expired)"),
    ]
    for bad, reason in reversed(checks):  # reversed so that the first rule broken wins
        reasons[bad] = reason
    return reasons


def _require_valid(*inputs: ArrayLike) -> tuple[FloatArray, ...]:
    arrays = np.broadcast_arrays(*(np.asarray(a, dtype=float) for a in inputs))
    reasons = invalid_reasons(*arrays[:6])
    bad = reasons != ""
    if bad.any():
        first = int(np.flatnonzero(bad.ravel())[0])
        raise InvalidPricingInput(
            f"{int(bad.sum())} invalid pricing input(s); first at index {first}: {reasons.ravel()[first]}"
        )
    return tuple(np.atleast_1d(np.array(a, dtype=float)) for a in arrays)


def d1_d2(
    spot: FloatArray, strike: FloatArray, tau_years: FloatArray, vol: FloatArray,
    rate: FloatArray, div_yield: FloatArray,
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """d1, d2 and vol*sqrt(tau) for options with tau > 0 and vol > 0 (the one place they are computed)."""
    vol_sqrt_tau = vol * np.sqrt(tau_years)
    d1 = (np.log(spot / strike) + (rate - div_yield + 0.5 * vol * vol) * tau_years) / vol_sqrt_tau
    return d1, d1 - vol_sqrt_tau, vol_sqrt_tau


def bsm_price(
    spot: ArrayLike, strike: ArrayLike, tau_years: ArrayLike, vol: ArrayLike,
    rate: ArrayLike, div_yield: ArrayLike, is_call: ArrayLike,
) -> FloatArray:
    """Price per unit of underlying. Cheaper than :func:`bsm_greeks` when only the price is needed."""
    s, k, t, v, r, q, c = _require_valid(spot, strike, tau_years, vol, rate, div_yield, is_call)
    return price_unchecked(s, k, t, v, r, q, np.where(c != 0, 1.0, -1.0))


def price_unchecked(s: FloatArray, k: FloatArray, t: FloatArray, v: FloatArray, r: FloatArray,
           q: FloatArray, cp: FloatArray) -> FloatArray:
    """Price of validated, broadcast 1-d float arrays; ``cp`` is +1 call / -1 put. No checks: the hot path."""
    disc_q = np.exp(-q * t)
    disc_r = np.exp(-r * t)
    live = (t > 0) & (v > 0)
    out = np.maximum(cp * (s * disc_q - k * disc_r), 0.0)  # tau = 0: intrinsic; vol = 0: forward intrinsic
    if live.any():
        idx = np.flatnonzero(live)
        d1, d2, _ = d1_d2(s[idx], k[idx], t[idx], v[idx], r[idx], q[idx])
        sign = cp[idx]
        out[idx] = sign * (s[idx] * disc_q[idx] * ndtr(sign * d1) - k[idx] * disc_r[idx] * ndtr(sign * d2))
    return out


def bsm_greeks(
    spot: ArrayLike, strike: ArrayLike, tau_years: ArrayLike, vol: ArrayLike,
    rate: ArrayLike, div_yield: ArrayLike, is_call: ArrayLike,
) -> Greeks:
    """Price and the full greek set (units in the module docstring) for every option."""
    s, k, t, v, r, q, c = _require_valid(spot, strike, tau_years, vol, rate, div_yield, is_call)
    return greeks_unchecked(s, k, t, v, r, q, np.where(c != 0, 1.0, -1.0))


def greeks_unchecked(s: FloatArray, k: FloatArray, t: FloatArray, v: FloatArray, r: FloatArray,
            q: FloatArray, cp: FloatArray) -> Greeks:
    shape = s.shape
    disc_q = np.exp(-q * t)
    disc_r = np.exp(-r * t)
    fwd_intrinsic = cp * (s * disc_q - k * disc_r)
    zeros = np.zeros(shape)

    # Limits first (tau = 0, or vol = 0 with time left), then the live options overwrite them.
    expired = t <= 0
    itm = (fwd_intrinsic > 0).astype(float)
    at_strike = (s == k) & expired
    price = np.maximum(fwd_intrinsic, 0.0)
    delta = np.where(at_strike, 0.5 * cp, cp * disc_q * itm)
    dead = expired.astype(float)
    theta = (1.0 - dead) * itm * cp * (q * s * disc_q - r * k * disc_r)
    rho = (1.0 - dead) * itm * cp * t * k * disc_r
    dividend_rho = -(1.0 - dead) * itm * cp * t * s * disc_q
    gamma, vega, vanna, volga = zeros.copy(), zeros.copy(), zeros.copy(), zeros.copy()

    live = (t > 0) & (v > 0)
    if live.any():
        i = np.flatnonzero(live)
        si, ki, ti, vi, ri, qi, sign = s[i], k[i], t[i], v[i], r[i], q[i], cp[i]
        dq, dr = disc_q[i], disc_r[i]
        d1, d2, vol_sqrt_tau = d1_d2(si, ki, ti, vi, ri, qi)
        n_d1 = normal_pdf(d1)
        cdf_d1, cdf_d2 = ndtr(sign * d1), ndtr(sign * d2)
        spot_pdf = si * dq * n_d1
        price[i] = sign * (si * dq * cdf_d1 - ki * dr * cdf_d2)
        delta[i] = sign * dq * cdf_d1
        gamma[i] = dq * n_d1 / (si * vol_sqrt_tau)
        vega[i] = spot_pdf * np.sqrt(ti)
        theta[i] = -spot_pdf * vi / (2.0 * np.sqrt(ti)) + sign * (qi * si * dq * cdf_d1 - ri * ki * dr * cdf_d2)
        rho[i] = sign * ti * ki * dr * cdf_d2
        dividend_rho[i] = -sign * ti * si * dq * cdf_d1
        vanna[i] = -dq * n_d1 * d2 / vi
        volga[i] = vega[i] * d1 * d2 / vi
    return Greeks(price, delta, gamma, vega, theta, rho, dividend_rho, vanna, volga)
