"""Checks of one date's marked vols against their smiles: off-smile marks, butterfly and calendar arbitrage.

Pure numpy, arrays per mark (one element per marked option of the date, ``smile`` its smile code).
Each check returns the positions (indexes into the arrays) of the marks it flags, with the figures
for the message; the caller turns them into ledger warnings.

* Off smile: ``|vol - fitted|`` above a distance on a smile with a quadratic fit (:mod:`attribution.smile`),
  and the mark's distance also that far from what its neighbours give: the line (in x) through the next
  lower and next higher strike's distances, or, at either end of a smile, each of the next two strikes
  inward. A smile the quadratic does not follow everywhere (a flat far wing) shifts neighbouring distances
  together and is not flagged mark by mark; a mark that stands out from its neighbours is.
  With exactly three strikes the fit passes through every mark.
* Butterfly: along one smile's distinct strikes K1 < K2 < K3 (neighbours), the call price at the
  marked vol must be convex in strike, C(K2) <= l C(K1) + (1 - l) C(K3) with l = (K3 - K2) / (K3 - K1)
  (a long butterfly cannot cost less than nothing; Carr and Madan, "A note on sufficient conditions
  for no arbitrage", Finance Research Letters 2, 2005). A put's vol is read as the call's at its strike
  (put-call parity); where two marks share a strike, the first in the file stands for it, and every mark
  at a flagged strike is flagged.
* Calendar: at a fixed forward log-moneyness k = ln(K / F), total implied variance vol^2 tau must not
  fall from one expiry to the next (same source). Each mark of an expiry is compared with the total
  variance of the previous expiry of its underlying at the same k, interpolated linearly between that
  expiry's two neighbouring marks; a mark outside their range is not compared.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from attribution.arrays import FloatArray, IntArray
from attribution.pricing import price_unchecked
from attribution.smile import grouped_order

PRICE_SLACK = 1e-6        # butterfly slack, share of spot: rounding of quoted vols is not arbitrage
VARIANCE_SLACK = 1e-6     # calendar slack, total variance (vol^2 x years)


@dataclass(frozen=True, slots=True)
class Findings:
    """Flagged marks (indexes into the date's mark arrays) and a figure per flag for its message."""

    index: IntArray
    observed: FloatArray
    bound: FloatArray


def _strike_pairs(smile: IntArray, strike: FloatArray) -> tuple[IntArray, IntArray]:
    """One code per (smile, strike), numbered in smile then strike order: per mark, and each code's first mark."""
    order = grouped_order(smile, strike)
    s, k = smile[order], strike[order]
    new_pair = np.ones(s.size, dtype=bool)
    new_pair[1:] = (s[1:] != s[:-1]) | (k[1:] != k[:-1])
    pair = np.empty(s.size, dtype=np.intp)
    pair[order] = np.cumsum(new_pair) - 1
    return pair, order[new_pair]


def off_smile(smile: IntArray, strike: FloatArray, x: FloatArray, vol: FloatArray, fitted: FloatArray,
              quadratic: NDArray[np.bool_], distance: float) -> Findings:
    """Marks more than ``distance`` (decimal vol) from their smile's fit and from their neighbours' line."""
    residual = vol - fitted
    pair, first_mark = _strike_pairs(smile, strike)
    n_pairs = first_mark.size
    mean = np.bincount(pair, residual, n_pairs) / np.maximum(np.bincount(pair, minlength=n_pairs), 1)
    px = x[first_mark]
    pair_smile = smile[first_mark]
    start = np.searchsorted(pair_smile, pair_smile, side="left")
    end = np.searchsorted(pair_smile, pair_smile, side="right") - 1
    j = np.arange(n_pairs)
    first, last = j == start, j == end
    top = max(n_pairs - 1, 0)
    # Inside a smile: the residual expected from the line through the next lower and next higher strike's.
    lo, hi = np.clip(j - 1, 0, top), np.clip(j + 1, 0, top)
    with np.errstate(invalid="ignore", divide="ignore"):
        share = np.where(px[hi] > px[lo], (px - px[lo]) / (px[hi] - px[lo]), 0.5)
    line = mean[lo] + share * (mean[hi] - mean[lo])
    apart = np.abs(residual - line[pair]) > distance
    # At either end: apart from both of the next two strikes inward.
    r1 = np.clip(np.where(first, j + 1, j - 1), 0, top)
    r2 = np.clip(np.where(first, j + 2, j - 2), 0, top)
    end_apart = np.minimum(np.abs(residual - mean[r1][pair]), np.abs(residual - mean[r2][pair])) > distance
    at_end = (first | last)[pair]
    apart = np.where(at_end, end_apart, apart)
    hit = np.flatnonzero(quadratic & (np.abs(residual) > distance) & apart)
    return Findings(hit, vol[hit], fitted[hit])


def butterfly(smile: IntArray, strike: FloatArray, spot: FloatArray, tau: FloatArray, vol: FloatArray,
              rate: FloatArray, div_yield: FloatArray) -> Findings:
    """Every mark at the middle strike of a neighbouring triple whose call prices are not convex in strike."""
    pair, keep = _strike_pairs(smile, strike)   # keep: one mark per distinct strike, by smile then strike
    if keep.size < 3:
        return Findings(np.zeros(0, np.intp), np.zeros(0), np.zeros(0))
    call = price_unchecked(spot[keep], strike[keep], tau[keep], vol[keep], rate[keep], div_yield[keep],
                           np.ones(keep.size))
    g, kk = smile[keep], strike[keep]
    same = (g[:-2] == g[1:-1]) & (g[1:-1] == g[2:])
    with np.errstate(invalid="ignore", divide="ignore"):  # triples across two smiles (not ``same``) may divide by 0
        lam = (kk[2:] - kk[1:-1]) / (kk[2:] - kk[:-2])
        bound = lam * call[:-2] + (1.0 - lam) * call[2:]
    bad = same & (call[1:-1] > bound + PRICE_SLACK * spot[keep[1:-1]])
    bad_pair = np.zeros(keep.size, dtype=bool)
    bad_pair[1:-1] = bad
    hit = np.flatnonzero(bad_pair[pair])
    at = pair[hit] - 1                            # index into the triples' arrays
    return Findings(hit, call[1:-1][at], bound[at])


def calendar(smile: IntArray, previous: IntArray, k: FloatArray, total_variance: FloatArray) -> Findings:
    """Marks whose total variance is below the previous expiry's at the same forward log-moneyness.

    ``previous[g]`` is the smile of the same underlying at the next earlier expiry (-1: none).
    """
    order = grouped_order(smile, k)
    gs, ks, ws = smile[order], k[order], total_variance[order]
    span = 64.0                                 # |k| < 30 in any market: smiles never overlap on the key
    key = gs * span + np.clip(ks, -30.0, 30.0)
    prev = previous[smile]
    ask = np.flatnonzero(prev >= 0)
    q = prev[ask] * span + np.clip(k[ask], -30.0, 30.0)
    right = np.searchsorted(key, q, side="left")
    left = right - 1
    inside = (right < key.size) & (left >= 0)
    inside[inside] &= (gs[np.minimum(right[inside], key.size - 1)] == prev[ask][inside]) & \
                      (gs[np.maximum(left[inside], 0)] == prev[ask][inside])
    ask, left, right = ask[inside], left[inside], right[inside]
    k_lo, k_hi = ks[left], ks[right]
    with np.errstate(invalid="ignore", divide="ignore"):
        share = np.where(k_hi > k_lo, (k[ask] - k_lo) / (k_hi - k_lo), 0.0)
    earlier = ws[left] + share * (ws[right] - ws[left])
    hit = total_variance[ask] < earlier - VARIANCE_SLACK
    return Findings(ask[hit], total_variance[ask][hit], earlier[hit])
