"""Implied-vol smiles per underlying and expiry, and the split of each option's vol move into parts.

Pure numpy: integer smile codes and float arrays in, frozen results of arrays out.

**Parametrisation.** Each smile (one underlying, one expiry, one date) is a quadratic in
standardised log-moneyness, the "practitioner" implied-vol function of Dumas, Fleming and Whaley,
"Implied volatility functions: empirical tests", Journal of Finance 53 (1998), written in
``x = ln(K / F) / (vol_ref sqrt(tau_ref))`` so that its three coefficients read the same at every
expiry::

    vol(x) = level + skew x + curvature x^2          (x = 0 at the forward: level is the ATM vol)

``vol_ref`` and ``tau_ref`` are fixed per smile for both dates (the caller takes them from the
prior date), so that a parallel move of the marks moves ``level`` only and a rotation around the
money moves ``skew`` only. The fit is weighted least squares with prior weights
``1 / (1 + (x / 2)^2)`` (near-the-money marks count most, wings stay in), made robust by
iteratively reweighted least squares with Tukey's bisquare weights (Beaton and Tukey,
Technometrics 16, 1974; tuning constant 4.685, scale 1.4826 x the median absolute residual, floored
at ``scale_floor``, taken from the plain fit and again halfway through the iterations), so that one
bad mark does not drag its smile: it stays in its own residual.
All smiles are fitted at once from grouped normal equations (``np.bincount`` sums).
A smile with fewer than :data:`MIN_STRIKES` distinct strikes gets a level only (the weighted mean
vol; skew and curvature 0), and :attr:`SmileFit.quadratic` says which is which.

**Split of a vol move.** With the fits of both dates and each option's coordinate on each date
(``x0``, ``x1``: the strike is fixed, the forward moves), ``vol_d = fit_d(x_d) + own_d`` exactly,
and the move ``vol1 - vol0`` is split into parts that add up to it exactly:

* ``level``     = level1 - level0 (the expiry's at-the-money move);
* ``skew``      = skew1 x1 - skew0 x0;  ``curvature`` = curv1 x1^2 - curv0 x0^2;
* ``own``       = own1 - own0 (the change of the mark's distance from its fitted smile).

Under sticky moneyness the part of the move that the spot move implies along the prior smile,
``spot_implied = fit0(x1) - fit0(x0)``, is taken out of ``skew`` and ``curvature`` (which become
(skew1 - skew0) x1 and (curv1 - curv0) x1^2); under sticky strike (the default) it stays in them.

**P&L of the parts.** With ``T(d) = units (vega d + volga d^2 / 2)`` the vega + volga P&L of a
move d and ``rest = dvol - spot_implied``: the vol terms carry ``T(rest)`` and the smile-delta line
``T(dvol) - T(rest)``; part j of the vol terms is ``units d_j (vega + volga rest / 2)`` (vega's
part exactly, volga's cross terms shared in proportion to each part's share of the move), so the
parts add up to ``T(rest)`` exactly, whatever their signs.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from attribution.arrays import FloatArray, IntArray

MIN_STRIKES = 3            # distinct strikes needed for a quadratic; fewer: level only
BISQUARE_C = 4.685         # Tukey's bisquare tuning constant (95 % efficiency under normal errors)
MAD_TO_SIGMA = 1.4826      # median absolute deviation -> standard deviation under normal errors
SCALE_FLOOR = 0.005        # residual scale floor, vol (half a vol point): a perfect smile is not "all outliers"
ROBUST_ITERATIONS = 4
FIT_RANGE = 3.0            # |x| fitted; the night reads a smile flat beyond it (attribution.smile_night)
PARTS = ("level", "skew", "curvature", "own")


@dataclass(frozen=True, slots=True)
class SmileFit:
    """Coefficients per smile (index = smile code) and, per point, its fitted vol and residual."""

    level: FloatArray
    skew: FloatArray
    curvature: FloatArray
    quadratic: NDArray[np.bool_]   # False: level only (fewer than MIN_STRIKES distinct strikes)
    strikes: NDArray[np.int64]     # distinct strikes per smile
    fitted: FloatArray             # per point
    residual: FloatArray           # per point: vol - fitted

    def at(self, smile: IntArray, x: FloatArray) -> FloatArray:
        """The fitted vol of smile ``smile`` at coordinate ``x`` (element-wise)."""
        return self.level[smile] + self.skew[smile] * x + self.curvature[smile] * x * x


@dataclass(frozen=True, slots=True)
class VolParts:
    """Parts of each option's vol move (decimals of vol); level + skew + curvature + own + spot_implied = dvol."""

    level: FloatArray
    skew: FloatArray
    curvature: FloatArray
    own: FloatArray
    spot_implied: FloatArray       # 0 under sticky strike


@dataclass(frozen=True, slots=True)
class VolPnl:
    """The vega + volga P&L of each option split into parts (amounts, already scaled by units)."""

    vega: FloatArray               # units vega rest
    volga: FloatArray              # units volga rest^2 / 2
    level: FloatArray
    skew: FloatArray
    curvature: FloatArray
    own: FloatArray
    smile_delta: FloatArray        # T(dvol) - T(rest); 0 under sticky strike


def standardised_moneyness(strike: FloatArray, forward: FloatArray, scale: FloatArray) -> FloatArray:
    """``ln(K / F) / scale`` with ``scale = vol_ref sqrt(tau_ref)`` (> 0)."""
    return np.log(strike / forward) / scale


def reference_scale(smile: IntArray, vol: FloatArray, tau_years: FloatArray, n_smiles: int) -> FloatArray:
    """Per smile: mean vol x sqrt(mean tau) of its points; NaN for a smile without points."""
    count = np.bincount(smile, minlength=n_smiles).astype(float)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_vol = np.bincount(smile, weights=vol, minlength=n_smiles) / count
        mean_tau = np.bincount(smile, weights=tau_years, minlength=n_smiles) / count
    return mean_vol * np.sqrt(mean_tau)


def grouped_order(smile: IntArray, values: FloatArray) -> IntArray:
    """Indexes sorting by smile, then by ``values`` within a smile: one float argsort of ``smile + scaled value``
    (several times faster than a two-key lexsort; the scaled value lies in [0, 0.5], resolved to ~1e-11)."""
    lo, hi = (float(values.min()), float(values.max())) if values.size else (0.0, 0.0)
    span = hi - lo if hi > lo else 1.0
    return np.argsort(smile + 0.5 * (values - lo) / span, kind="stable")


def distinct_strikes(smile: IntArray, strike: FloatArray, n_smiles: int) -> NDArray[np.int64]:
    """How many distinct strikes each smile has."""
    if smile.size == 0:
        return np.zeros(n_smiles, dtype=np.int64)
    order = grouped_order(smile, strike)
    s, k = smile[order], strike[order]
    first = np.ones(s.size, dtype=bool)
    first[1:] = (s[1:] != s[:-1]) | (k[1:] != k[:-1])
    return np.bincount(s[first], minlength=n_smiles)


def _solve(smile: IntArray, x: FloatArray, vol: FloatArray, w: FloatArray, n: int,
           quadratic: NDArray[np.bool_], previous: FloatArray | None) -> FloatArray:
    """Weighted least squares per smile from grouped normal equations; (n, 3) coefficients."""
    wx = w * x
    wx2 = wx * x
    s = [np.bincount(smile, weights=v, minlength=n) for v in (w, wx, wx2, wx2 * x, wx2 * x * x)]
    t = [np.bincount(smile, weights=v * vol, minlength=n) for v in (w, wx, wx2)]
    coef = np.zeros((n, 3))
    with np.errstate(invalid="ignore", divide="ignore"):
        coef[:, 0] = t[0] / s[0]
    normal = np.stack([np.stack([s[0], s[1], s[2]], -1), np.stack([s[1], s[2], s[3]], -1),
                       np.stack([s[2], s[3], s[4]], -1)], -2)
    rhs = np.stack(t, -1)
    q = np.flatnonzero(quadratic)
    if q.size:
        m = normal[q]
        # Relative determinant: near zero when the weights left fewer than three distinct strikes.
        det = np.linalg.det(m)
        norm = np.maximum(m[:, 0, 0] * m[:, 1, 1] * m[:, 2, 2], 1e-300)
        ok = np.abs(det) > 1e-10 * norm
        good = q[ok]
        coef[good] = np.linalg.solve(m[ok], rhs[q[ok]][..., None])[..., 0]
        bad = q[~ok]
        coef[bad] = previous[bad] if previous is not None else coef[bad]
    return coef


def _group_median(smile: IntArray, values: FloatArray, n: int) -> FloatArray:
    """Lower median of ``values`` per smile (NaN for an empty smile)."""
    order = grouped_order(smile, values)
    counts = np.bincount(smile, minlength=n)
    starts = np.concatenate([[0], np.cumsum(counts)[:-1]])
    out = np.full(n, np.nan)
    has = counts > 0
    out[has] = values[order[starts[has] + (counts[has] - 1) // 2]]
    return out


def fit_smiles(smile: IntArray, x: FloatArray, vol: FloatArray, strike: FloatArray, n_smiles: int,
               scale_floor: float = SCALE_FLOOR, iterations: int = ROBUST_ITERATIONS) -> SmileFit:
    """Fit every smile at once (robust weighted least squares, see the module doc)."""
    strikes = distinct_strikes(smile, strike, n_smiles)
    quadratic = strikes >= MIN_STRIKES
    prior_w = 1.0 / (1.0 + 0.25 * x * x)
    w = prior_w
    coef = _solve(smile, x, vol, w, n_smiles, quadratic, None)
    spread = np.full(n_smiles, scale_floor)
    for i in range(iterations):
        residual = vol - (coef[smile, 0] + coef[smile, 1] * x + coef[smile, 2] * x * x)
        if i % 2 == 0:  # the residual scale, from the plain fit and again halfway (a median is the costly step)
            spread = np.maximum(MAD_TO_SIGMA * _group_median(smile, np.abs(residual), n_smiles), scale_floor)
        u = residual / (BISQUARE_C * spread[smile])
        w = prior_w * np.where(np.abs(u) < 1.0, (1.0 - u * u) ** 2, 0.0)
        # A level-only smile keeps plain weights: with one or two strikes there is no outlier to tell.
        w = np.where(quadratic[smile], w, prior_w)
        coef = _solve(smile, x, vol, w, n_smiles, quadratic, coef)
    fitted = coef[smile, 0] + coef[smile, 1] * x + coef[smile, 2] * x * x
    return SmileFit(coef[:, 0], coef[:, 1], coef[:, 2], quadratic, strikes, fitted, vol - fitted)


def split_vol_move(level0: FloatArray, skew0: FloatArray, curv0: FloatArray, own0: FloatArray, x0: FloatArray,
                   level1: FloatArray, skew1: FloatArray, curv1: FloatArray, own1: FloatArray, x1: FloatArray,
                   sticky_moneyness: bool) -> VolParts:
    """Parts of each option's vol move from its smile's coefficients and its residual on each date.

    Arrays are per option (coefficients already gathered from its smile). The parts add up to
    ``fit1(x1) + own1 - fit0(x0) - own0``, which is ``vol1 - vol0`` when the residuals are the fits'.
    """
    level = level1 - level0
    own = own1 - own0
    roll = skew0 * (x1 - x0), curv0 * (x1 * x1 - x0 * x0)   # the prior smile read at the moved moneyness
    skew = (skew1 - skew0) * x1
    curvature = (curv1 - curv0) * x1 * x1
    if sticky_moneyness:
        return VolParts(level, skew, curvature, own, roll[0] + roll[1])
    return VolParts(level, skew + roll[0], curvature + roll[1], own, np.zeros_like(level))


def split_vol_pnl(units: FloatArray, vega: FloatArray, volga: FloatArray, parts: VolParts) -> VolPnl:
    """The vega + volga P&L of each option, split into the parts of its vol move (module doc)."""
    rest = parts.level + parts.skew + parts.curvature + parts.own
    dvol = rest + parts.spot_implied
    pnl_vega = units * vega * rest
    pnl_volga = units * 0.5 * volga * rest * rest
    per_vol = units * (vega + 0.5 * volga * rest)
    smile_delta = units * (vega * parts.spot_implied + 0.5 * volga * (dvol * dvol - rest * rest))
    return VolPnl(pnl_vega, pnl_volga, per_vol * parts.level, per_vol * parts.skew, per_vol * parts.curvature,
                  per_vol * parts.own, smile_delta)
