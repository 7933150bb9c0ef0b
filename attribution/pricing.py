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

Speed: the kernels work on cache-sized chunks of :data:`CHUNK_OPTIONS` options, so that every
intermediate array stays in the CPU cache, and spread the chunks of a large call over ``threads``
threads (numpy and scipy release the GIL inside their loops). Every option is computed by the same
operations whatever the chunking or the number of threads, so results do not depend on either.
"""

from __future__ import annotations

import os
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.special import ndtr

from attribution.arrays import FloatArray

_INV_SQRT_2PI = 1.0 / np.sqrt(2.0 * np.pi)
CHUNK_OPTIONS = 4096  # options computed together: keeps a chunk's intermediate arrays in the CPU cache
MIN_OPTIONS_PER_THREAD = 16 * CHUNK_OPTIONS  # below this, a thread costs more than it saves


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
    sign: FloatArray = np.where(np.asarray(is_call, dtype=bool), 1.0, -1.0)
    return sign


def normal_pdf(x: FloatArray) -> FloatArray:
    """Standard normal density."""
    density: FloatArray = _INV_SQRT_2PI * np.exp(-0.5 * x * x)
    return density


def _broken_rules(s: FloatArray, k: FloatArray, t: FloatArray, v: FloatArray, r: FloatArray,
                  q: FloatArray) -> list[tuple[NDArray[np.bool_], str]]:
    """The model's input rules, in order, each as (mask of the options breaking it, the rule in words).

    The one place the rules are written: :func:`invalid_reasons`, :func:`valid_inputs` and the
    fast path :func:`_all_valid` (the same rules on the arrays' minima and maxima) use them.
    """
    names = ("spot", "strike", "tau_years", "vol", "rate", "div_yield")
    rules: list[tuple[NDArray[np.bool_], str]] = [
        (~np.isfinite(a), f"{name} is not a finite number") for a, name in zip((s, k, t, v, r, q), names, strict=True)
    ]
    rules += [
        (s <= 0, "spot must be > 0"),
        (k <= 0, "strike must be > 0"),
        (v < 0, "vol must be >= 0"),
        (t < 0, "tau_years must be >= 0 (the option has expired)"),
    ]
    return rules


def _broadcast_inputs(*inputs: ArrayLike) -> tuple[FloatArray, ...]:
    return tuple(np.broadcast_arrays(*(np.asarray(a, dtype=float) for a in inputs)))


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
    arrays = _broadcast_inputs(spot, strike, tau_years, vol, rate, div_yield)
    reasons = np.full(arrays[0].shape, "", dtype=object)
    for bad, reason in reversed(_broken_rules(*arrays)):  # reversed so that the first rule broken wins
        reasons[bad] = reason
    return reasons


def valid_inputs(spot: ArrayLike, strike: ArrayLike, tau_years: ArrayLike, vol: ArrayLike, rate: ArrayLike,
                 div_yield: ArrayLike) -> NDArray[np.bool_]:
    """True for each option whose inputs break none of the rules of :func:`invalid_reasons`."""
    arrays = _broadcast_inputs(spot, strike, tau_years, vol, rate, div_yield)
    ok = np.ones(arrays[0].shape, dtype=bool)
    for bad, _ in _broken_rules(*arrays):
        ok &= ~bad
    return ok


def no_arbitrage_bounds(spot: FloatArray, strike: FloatArray, tau_years: FloatArray, rate: FloatArray,
                        div_yield: FloatArray, cp: FloatArray,
                        american: NDArray[np.bool_] | None = None) -> tuple[FloatArray, FloatArray]:
    """Model-free bounds of an option's price (``cp`` = +1 call, -1 put; no warnings on bad inputs).

    European: ``max(cp (S e^-qT - K e^-rT), 0)`` and ``S e^-qT`` for a call, ``K e^-rT`` for a put.
    Where ``american`` is true, exercise now is worth having: the lower bound is at least the
    intrinsic value ``cp (S - K)`` and the upper bound is ``S`` for a call, ``K`` for a put.
    """
    with np.errstate(all="ignore"):
        disc_q, disc_r = np.exp(-div_yield * tau_years), np.exp(-rate * tau_years)
        lower = np.maximum(cp * (spot * disc_q - strike * disc_r), 0.0)
        upper = np.where(cp > 0, spot * disc_q, strike * disc_r)
        if american is not None:
            lower = np.where(american, np.maximum(lower, cp * (spot - strike)), lower)
            upper = np.where(american, np.where(cp > 0, spot, strike), upper)
    return lower, upper


def _all_valid(s: FloatArray, k: FloatArray, t: FloatArray, v: FloatArray, r: FloatArray, q: FloatArray) -> bool:
    """True when every input is valid (the rules of :func:`_broken_rules`, checked on minima and maxima).

    Exact, since min and max propagate NaN and see any infinity; no per-option array is allocated.
    """
    if s.size == 0:
        return True
    low = np.array([s.min(), k.min(), t.min(), v.min(), r.min(), q.min()])
    high = np.array([s.max(), k.max(), t.max(), v.max(), r.max(), q.max()])
    finite = bool(np.isfinite(low).all() and np.isfinite(high).all())
    return finite and low[0] > 0 and low[1] > 0 and low[2] >= 0 and low[3] >= 0


def _flatten(*inputs: ArrayLike) -> tuple[tuple[int, ...], tuple[FloatArray, ...]]:
    """Broadcast shape (at least 1-d) and the inputs broadcast to it as flat float arrays (views when possible)."""
    arrays = np.broadcast_arrays(*(np.asarray(a, dtype=float) for a in inputs))
    return np.atleast_1d(arrays[0]).shape, tuple(a.reshape(-1) for a in arrays)


def _require_valid(*inputs: ArrayLike) -> tuple[tuple[int, ...], tuple[FloatArray, ...]]:
    """Broadcast shape (at least 1-d) and the inputs as flat float arrays; raises on the first invalid option."""
    shape, flat = _flatten(*inputs)
    if not _all_valid(*flat[:6]):
        reasons = invalid_reasons(*flat[:6])
        bad = reasons != ""
        first = int(np.flatnonzero(bad)[0])
        raise InvalidPricingInput(
            f"{int(bad.sum())} invalid pricing input(s); first at index {first}: {reasons[first]}"
        )
    return shape, flat


def _available_cores() -> int:
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # platforms without CPU affinity
        return os.cpu_count() or 1


def _for_each_chunk(n: int, block: Callable[[slice], None], threads: int | None) -> None:
    """Call ``block`` on consecutive chunks of ``range(n)``; large calls split into contiguous runs over threads."""
    if threads is not None and threads < 1:
        raise ValueError(f"threads must be >= 1 or None (all available cores), got {threads}")
    chunks = [slice(lo, min(lo + CHUNK_OPTIONS, n)) for lo in range(0, n, CHUNK_OPTIONS)]
    workers = min(threads or _available_cores(), n // MIN_OPTIONS_PER_THREAD)
    if workers <= 1:
        for chunk in chunks:
            block(chunk)
        return
    per_worker = -(-len(chunks) // workers)
    runs = [chunks[i:i + per_worker] for i in range(0, len(chunks), per_worker)]
    with ThreadPoolExecutor(max_workers=workers) as pool:
        for done in [pool.submit(_run_blocks, block, run) for run in runs]:
            done.result()


def _run_blocks(block: Callable[[slice], None], run: list[slice]) -> None:
    for chunk in run:
        block(chunk)


def d1_d2(
    spot: FloatArray, strike: FloatArray, tau_years: FloatArray, vol: FloatArray,
    rate: FloatArray, div_yield: FloatArray,
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """d1, d2 and vol*sqrt(tau) for options with tau > 0 and vol > 0 (the one place they are computed)."""
    vol_sqrt_tau = vol * np.sqrt(tau_years)
    d1 = (np.log(spot / strike) + (rate - div_yield + 0.5 * vol * vol) * tau_years) / vol_sqrt_tau
    return d1, d1 - vol_sqrt_tau, vol_sqrt_tau


def _limits(s: FloatArray, k: FloatArray, t: FloatArray, r: FloatArray, q: FloatArray,
            cp: FloatArray) -> tuple[FloatArray, ...]:
    """Price and greeks (Greeks field order) at tau = 0 or vol = 0, where the option is its (forward) intrinsic."""
    disc_q = np.exp(-q * t)
    disc_r = np.exp(-r * t)
    forward_intrinsic = cp * (s * disc_q - k * disc_r)
    itm = (forward_intrinsic > 0).astype(float)
    expired = t <= 0
    carried = np.where(expired, 0.0, itm)  # vol = 0 with time left: the discounted forward's sensitivities
    delta = np.where((s == k) & expired, 0.5 * cp, cp * disc_q * itm)
    theta = carried * cp * (q * s * disc_q - r * k * disc_r)
    rho = carried * cp * t * k * disc_r
    dividend_rho = -carried * cp * t * s * disc_q
    zeros = np.zeros_like(s)
    return np.maximum(forward_intrinsic, 0.0), delta, zeros, zeros, theta, rho, dividend_rho, zeros, zeros


def _live_inputs(t: FloatArray, v: FloatArray) -> tuple[NDArray[np.intp] | None, FloatArray, FloatArray]:
    """Indices of the options at a limit (None when there are none) and tau, vol with 1.0 in their place."""
    if t.min() > 0 and v.min() > 0:
        return None, t, v
    live = (t > 0) & (v > 0)
    return np.flatnonzero(~live), np.where(live, t, 1.0), np.where(live, v, 1.0)


def bsm_price(
    spot: ArrayLike, strike: ArrayLike, tau_years: ArrayLike, vol: ArrayLike,
    rate: ArrayLike, div_yield: ArrayLike, is_call: ArrayLike, *, threads: int | None = None,
) -> FloatArray:
    """Price per unit of underlying. Cheaper than :func:`bsm_greeks` when only the price is needed.

    ``threads``: at most this many threads for a large call (None: every available core).
    """
    shape, (s, k, t, v, r, q, c) = _require_valid(spot, strike, tau_years, vol, rate, div_yield, is_call)
    return price_unchecked(s, k, t, v, r, q, np.where(c != 0, 1.0, -1.0), threads=threads).reshape(shape)


def price_unchecked(s: FloatArray, k: FloatArray, t: FloatArray, v: FloatArray, r: FloatArray,
                    q: FloatArray, cp: FloatArray, *, threads: int | None = None) -> FloatArray:
    """Price of validated float arrays of one shape; ``cp`` is +1 call / -1 put. No checks: the hot path."""
    shape, (s, k, t, v, r, q, cp) = _flatten(s, k, t, v, r, q, cp)
    out = np.empty(s.size)

    def block(c: slice) -> None:
        dead, tc, vc = _live_inputs(t[c], v[c])
        minus_t = -tc
        disc_q = np.exp(q[c] * minus_t)
        disc_r = np.exp(r[c] * minus_t)
        d1, d2, _ = d1_d2(s[c], k[c], tc, vc, r[c], q[c])
        sign = cp[c]
        out[c] = sign * (s[c] * disc_q * ndtr(sign * d1) - k[c] * disc_r * ndtr(sign * d2))
        if dead is not None:  # tau = 0: intrinsic; vol = 0: discounted forward intrinsic
            lo = c.start
            out[lo + dead] = _limits(*(a[c][dead] for a in (s, k, t, r, q, cp)))[0]

    _for_each_chunk(s.size, block, threads)
    return out.reshape(shape)


def bsm_greeks(
    spot: ArrayLike, strike: ArrayLike, tau_years: ArrayLike, vol: ArrayLike,
    rate: ArrayLike, div_yield: ArrayLike, is_call: ArrayLike, *, threads: int | None = None,
) -> Greeks:
    """Price and the full greek set (units in the module docstring) for every option.

    ``threads``: at most this many threads for a large call (None: every available core).
    """
    shape, (s, k, t, v, r, q, c) = _require_valid(spot, strike, tau_years, vol, rate, div_yield, is_call)
    g = greeks_unchecked(s, k, t, v, r, q, np.where(c != 0, 1.0, -1.0), threads=threads)
    return Greeks(*(a.reshape(shape) for a in (getattr(g, name) for name in Greeks.__slots__)))


def greeks_unchecked(s: FloatArray, k: FloatArray, t: FloatArray, v: FloatArray, r: FloatArray,
                     q: FloatArray, cp: FloatArray, *, threads: int | None = None) -> Greeks:
    """Price and greeks of validated float arrays of one shape; ``cp`` is +1 call / -1 put. No checks."""
    shape, (s, k, t, v, r, q, cp) = _flatten(s, k, t, v, r, q, cp)
    out = tuple(np.empty(s.size) for _ in Greeks.__slots__)
    _for_each_chunk(s.size, lambda c: _greeks_block(s[c], k[c], t[c], v[c], r[c], q[c], cp[c],
                                                    tuple(a[c] for a in out)), threads)
    return Greeks(*(a.reshape(shape) for a in out))


def _greeks_block(s: FloatArray, k: FloatArray, t: FloatArray, v: FloatArray, r: FloatArray, q: FloatArray,
                  cp: FloatArray, out: tuple[FloatArray, ...]) -> None:
    """Fill ``out`` (Greeks field order) for one chunk; live formulas first, then the limits overwrite."""
    price, delta, gamma, vega, theta, rho, dividend_rho, vanna, volga = out
    dead, tc, vc = _live_inputs(t, v)
    minus_t = -tc
    disc_q = np.exp(q * minus_t)
    disc_r = np.exp(r * minus_t)
    d1, d2, vol_sqrt_tau = d1_d2(s, k, tc, vc, r, q)
    sqrt_t = np.sqrt(tc)
    cdf_d1 = ndtr(cp * d1)
    s_cdf = s * disc_q * cdf_d1  # S e^-qT N(cp d1)
    k_cdf = k * disc_r * ndtr(cp * d2)  # K e^-rT N(cp d2)
    np.subtract(s_cdf, k_cdf, out=price)
    price *= cp
    np.multiply(cp * disc_q, cdf_d1, out=delta)
    dq_pdf = disc_q * normal_pdf(d1)
    np.divide(dq_pdf, s * vol_sqrt_tau, out=gamma)
    spot_pdf = s * dq_pdf
    np.multiply(spot_pdf, sqrt_t, out=vega)
    np.multiply(q, s_cdf, out=theta)
    theta -= r * k_cdf
    theta *= cp
    theta -= spot_pdf * vc / (2.0 * sqrt_t)
    cp_t = cp * tc
    np.multiply(cp_t, k_cdf, out=rho)
    np.multiply(-cp_t, s_cdf, out=dividend_rho)
    np.multiply(dq_pdf, d2, out=vanna)
    vanna /= -vc
    np.multiply(vega, d1, out=volga)
    volga *= d2
    volga /= vc
    if dead is not None:
        for target, value in zip(out, _limits(s[dead], k[dead], t[dead], r[dead], q[dead], cp[dead]), strict=True):
            target[dead] = value
