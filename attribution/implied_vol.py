"""Implied volatility from price, vectorised: safeguarded Newton on a normalised Black price.

Method. A price is first reduced to its out-of-the-money part (the price minus its lower
no-arbitrage bound, which by put-call parity is the price of the out-of-the-money option),
then normalised by ``discount * sqrt(F * K)``. In the normalised form, with
``x = -|ln(F/K)|`` and total volatility ``s = vol * sqrt(tau)``, the price is

    b(s) = exp(x/2) N(x/s + s/2) - exp(-x/2) N(x/s - s/2),   0 < b < exp(x/2),

increasing in ``s``, convex below the inflection point ``s_c = sqrt(2|x|)`` and concave above
it. Newton's method started at ``s_c`` therefore converges monotonically on either side; below
``s_c`` it runs on ``ln b`` (which is concave there) so that far out-of-the-money prices converge
in a few steps. A bracket kept from every evaluation turns any step that leaves it into a
bisection step, so the iteration cannot diverge.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.special import ndtr

from attribution.arrays import FloatArray
from attribution.pricing import invalid_reasons, no_arbitrage_bounds, normal_pdf

MAX_ITERATIONS = 100
_REL_TOL = 4e-16


@dataclass(frozen=True, slots=True)
class ImpliedVolResult:
    """Implied vol (decimal) per option, NaN where none exists, with the reason (``""`` when solved)."""

    vol: FloatArray
    reason: NDArray[np.object_]


def _normalised_black(x: FloatArray, s: FloatArray) -> tuple[FloatArray, FloatArray]:
    """b(s) and db/ds for x <= 0 (an out-of-the-money call in normalised units)."""
    d1 = x / s + 0.5 * s
    b = np.exp(0.5 * x) * ndtr(d1) - np.exp(-0.5 * x) * ndtr(d1 - s)
    return np.maximum(b, 0.0), np.exp(0.5 * x) * normal_pdf(d1)


def _solve_total_vol(x: FloatArray, beta: FloatArray) -> FloatArray:
    """Total volatility s with b(s) = beta, for x <= 0 and 0 < beta < exp(x/2)."""
    s = np.sqrt(2.0 * np.abs(x))
    s = np.where(s > 0, s, np.maximum(np.sqrt(2.0 * np.pi) * beta, 1e-8))  # at the money: Brenner-Subrahmanyam
    b_c, _ = _normalised_black(x, s)
    low_region = beta < b_c
    lo = np.zeros_like(s)
    hi = np.full_like(s, np.inf)
    active = np.ones(s.shape, dtype=bool)
    for _ in range(MAX_ITERATIONS):
        i = np.flatnonzero(active)
        if i.size == 0:
            break
        si, xi, bi = s[i], x[i], beta[i]
        b, vega = _normalised_black(xi, si)
        above = b > bi
        hi[i] = np.where(above, np.minimum(hi[i], si), hi[i])
        lo[i] = np.where(above, lo[i], np.maximum(lo[i], si))
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            step_log = (np.log(bi) - np.log(b)) * b / vega
            step_lin = (bi - b) / vega
        step = np.where(low_region[i], step_log, step_lin)
        new = si + step
        collapsed = np.isfinite(hi[i]) & (hi[i] - lo[i] <= _REL_TOL * hi[i])
        converged = (np.abs(step) <= _REL_TOL * si) | (b == bi) | collapsed
        outside = ~converged & (~np.isfinite(new) | (new <= lo[i]) | (new >= hi[i]))
        bisect = np.where(np.isfinite(hi[i]), 0.5 * (lo[i] + hi[i]), 2.0 * si)
        s[i] = np.where(converged, si, np.where(outside, bisect, new))
        active[i[converged]] = False
    return s


def implied_vol(
    price: ArrayLike, spot: ArrayLike, strike: ArrayLike, tau_years: ArrayLike,
    rate: ArrayLike, div_yield: ArrayLike, is_call: ArrayLike,
) -> ImpliedVolResult:
    """Solve the BSM vol that reprices each option; NaN with a reason where no vol exists.

    Solved for every price strictly inside the no-arbitrage bounds
    ``max(cp*(S e^-qT - K e^-rT), 0) < price < (S e^-qT for a call, K e^-rT for a put)``.
    """
    p, s, k, t, r, q, c = (np.atleast_1d(np.array(a, dtype=float)) for a in
                           np.broadcast_arrays(price, spot, strike, tau_years, rate, div_yield, is_call))
    cp = np.where(c != 0, 1.0, -1.0)
    reason = invalid_reasons(s, k, t, np.zeros_like(s), r, q)  # the model's own input rules (no vol given here)
    lower, upper = no_arbitrage_bounds(s, k, t, r, q, cp)
    with np.errstate(all="ignore"):
        disc_r = np.exp(-r * t)
        forward = s * np.exp(-q * t) / disc_r
    checks = [
        (~np.isfinite(p), "price is not a finite number"),
        (t == 0, "no time to expiry: implied vol is undefined"),
        (p < lower, "price below the no-arbitrage lower bound (intrinsic value)"),
        (p == lower, "price at the lower bound: implied vol is zero or undetermined"),
        (p >= upper, "price at or above the no-arbitrage upper bound"),
    ]
    for bad, text in checks:
        reason[bad & (reason == "")] = text
    vol = np.full(p.shape, np.nan)
    solve = reason == ""
    if solve.any():
        i = np.flatnonzero(solve)
        x = -np.abs(np.log(forward[i] / k[i]))
        beta = (p[i] - lower[i]) / (disc_r[i] * np.sqrt(forward[i] * k[i]))
        beta = np.minimum(beta, np.exp(0.5 * x) * (1.0 - 1e-16))
        vol[i] = _solve_total_vol(x, beta) / np.sqrt(t[i])
    return ImpliedVolResult(vol, reason)
