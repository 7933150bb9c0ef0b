"""Attribution-quality test statistics over a book's archived nights: pure numpy at the core.

The test compares, per book and over the latest (up to) ``window`` = 250 archived nights up to
and including a night, the book's hypothetical P&L and its risk-theoretical P&L:

* ``hpl``  = nightly sum of ``pnl_actual``    over positions held overnight (``carried``, ``closed``);
* ``rtpl`` = nightly sum of ``pnl_explained`` over the same positions;
* unexplained = ``hpl - rtpl``.

Statistics (Basel Framework MAR32, P&L attribution test; EU Delegated Regulation 2022/2059 Art. 9):

* ``spearman``: Spearman rank correlation of HPL and RTPL, average ranks for ties (as
  ``scipy.stats.spearmanr``);
* ``ks``: Kolmogorov-Smirnov two-sample statistic sup |F_HPL - F_RTPL| between the empirical
  distributions, ties treated exactly (as ``scipy.stats.ks_2samp(...).statistic``);
* zone: ``green`` when spearman > 0.80 and ks < 0.09; ``red`` when spearman < 0.70 or ks > 0.12;
  ``amber`` otherwise, so a value exactly on a threshold is amber.

Diagnostics (BCBS 352, 2016): ``mean_ratio`` = mean(unexplained) / sd(HPL), to lie within
+-10 %; ``variance_ratio`` = var(unexplained) / var(HPL), to stay <= 20 %. Both use the *sample*
standard deviation and variance (ddof=1). Where var(HPL) is zero both ratios are NaN.

Choices of our own, documented here:

* ``nights`` counts the nights used (at most ``window``). Fewer than ``window`` nights: the test
  is computed on what exists and flagged ``provisional``. Fewer than 2 nights: every metric is NaN.
* A NaN Spearman correlation (fewer than two distinct values in HPL or RTPL, or fewer than two
  nights) means the test cannot be passed. With at least 30 nights it is treated as failing and
  the zone is ``red``; below 30 nights the result is provisional anyway and the zone is ``amber``
  (the data contract allows only green, amber or red). :func:`zone_of` alone, which knows no
  night counts, returns ``red`` for NaN inputs; :func:`quality_test` applies the 30-night rule.
* Early warning: the same statistics over the latest ``recent`` = 60 nights give ``spearman_60``,
  ``ks_60`` and ``zone_60`` (same NaN rule with the 60-night count). ``early_warning`` is a short
  sentence when ``zone_60`` is worse than ``zone`` (green < amber < red), else ``""``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from attribution.arrays import FloatArray, ObjectArray

SPEARMAN_GREEN_ABOVE = 0.80
SPEARMAN_RED_BELOW = 0.70
KS_GREEN_BELOW = 0.09
KS_RED_ABOVE = 0.12
MIN_NIGHTS_FOR_RED_ON_NAN = 30
HELD_OVERNIGHT: tuple[str, ...] = ("carried", "closed")
_SEVERITY = {"green": 0, "amber": 1, "red": 2}


@dataclass(frozen=True, slots=True)
class QualityResult:
    """Attribution-quality test per book; every array has one element per book (row of the input)."""

    nights: NDArray[np.int64]
    provisional: NDArray[np.bool_]
    spearman: FloatArray
    ks: FloatArray
    zone: ObjectArray
    mean_ratio: FloatArray
    variance_ratio: FloatArray
    spearman_60: FloatArray
    ks_60: FloatArray
    zone_60: ObjectArray
    early_warning: ObjectArray


@dataclass(frozen=True, slots=True)
class _Metrics:
    spearman: FloatArray
    ks: FloatArray
    mean_ratio: FloatArray
    variance_ratio: FloatArray


def _as_pair(x: ArrayLike, y: ArrayLike) -> tuple[FloatArray, FloatArray]:
    a = np.asarray(x, dtype=float)
    b = np.asarray(y, dtype=float)
    if a.ndim != 2 or b.ndim != 2:
        raise ValueError(f"row statistics need 2-D arrays, got shapes {a.shape} and {b.shape}")
    if a.shape[0] != b.shape[0]:
        raise ValueError(f"row statistics need the same number of rows, got {a.shape[0]} and {b.shape[0]}")
    return a, b


def average_ranks(a: FloatArray) -> FloatArray:
    """Ranks 1..n along each row, ties given the average of their ranks (rows must hold no NaN)."""
    n = a.shape[1]
    order = np.argsort(a, axis=1, kind="stable")
    s = np.take_along_axis(a, order, axis=1)
    idx = np.arange(n)
    starts = np.ones(s.shape, dtype=bool)
    starts[:, 1:] = s[:, 1:] != s[:, :-1]
    ends = np.ones(s.shape, dtype=bool)
    ends[:, :-1] = starts[:, 1:]
    first = np.maximum.accumulate(np.where(starts, idx, 0), axis=1)
    last = np.minimum.accumulate(np.where(ends, idx, n - 1)[:, ::-1], axis=1)[:, ::-1]
    ranks = np.empty(s.shape, dtype=float)
    np.put_along_axis(ranks, order, 0.5 * (first + last) + 1.0, axis=1)
    return ranks


def spearman_rows(x: ArrayLike, y: ArrayLike) -> FloatArray:
    """Spearman rank correlation of ``x[i]`` and ``y[i]`` for every row i (same shape, average ranks).

    NaN for a row holding a NaN, with fewer than two columns, or where either row is constant.
    """
    a, b = _as_pair(x, y)
    if a.shape != b.shape:
        raise ValueError(f"spearman_rows needs x and y of the same shape, got {a.shape} and {b.shape}")
    out = np.full(a.shape[0], np.nan)
    n = a.shape[1]
    ok = ~(np.isnan(a).any(axis=1) | np.isnan(b).any(axis=1))
    if n < 2 or not ok.any():
        return out
    ra = average_ranks(a[ok]) - 0.5 * (n + 1)
    rb = average_ranks(b[ok]) - 0.5 * (n + 1)
    num = np.einsum("ij,ij->i", ra, rb)
    den = np.sqrt(np.einsum("ij,ij->i", ra, ra) * np.einsum("ij,ij->i", rb, rb))
    rho = np.divide(num, den, out=np.full(num.shape, np.nan), where=den > 0)
    out[ok] = np.clip(rho, -1.0, 1.0)
    return out


def ks_rows(x: ArrayLike, y: ArrayLike) -> FloatArray:
    """Two-sample Kolmogorov-Smirnov statistic sup |F_x - F_y| of ``x[i]`` against ``y[i]`` for every row i.

    Rows of ``x`` have n values and rows of ``y`` m values (n and m may differ). Ties, within and
    across the two samples, are treated exactly: the empirical CDFs are compared only after the
    last of equal values. NaN for a row holding a NaN or when n or m is zero.
    """
    a, b = _as_pair(x, y)
    n, m = a.shape[1], b.shape[1]
    out = np.full(a.shape[0], np.nan)
    ok = ~(np.isnan(a).any(axis=1) | np.isnan(b).any(axis=1))
    if n == 0 or m == 0 or not ok.any():
        return out
    values = np.concatenate([a[ok], b[ok]], axis=1)
    # Integer steps: +m for each x value, -n for each y value; cumsum / (n*m) = F_x - F_y exactly.
    steps = np.concatenate([np.full(n, m, dtype=np.int64), np.full(m, -n, dtype=np.int64)])
    order = np.argsort(values, axis=1, kind="stable")
    s = np.take_along_axis(values, order, axis=1)
    diff = np.cumsum(steps[order], axis=1)
    group_end = np.ones(s.shape, dtype=bool)
    group_end[:, :-1] = s[:, 1:] != s[:, :-1]
    out[ok] = np.max(np.where(group_end, np.abs(diff), 0), axis=1) / (n * m)
    return out


def zone_of(spearman: ArrayLike, ks: ArrayLike) -> ObjectArray:
    """Zone per book: green (spearman > 0.80 and ks < 0.09), red (spearman < 0.70 or ks > 0.12), else amber.

    A NaN metric cannot pass the test and gives ``red`` here (see the module doc for the
    night-count rule that :func:`quality_test` applies on top).
    """
    rho, d = np.broadcast_arrays(np.asarray(spearman, dtype=float), np.asarray(ks, dtype=float))
    green = (rho > SPEARMAN_GREEN_ABOVE) & (d < KS_GREEN_BELOW)
    red = (rho < SPEARMAN_RED_BELOW) | (d > KS_RED_ABOVE) | np.isnan(rho) | np.isnan(d)
    return np.where(green, "green", np.where(red, "red", "amber")).astype(object)


def _zone_with_nights(spearman: FloatArray, ks: FloatArray, nights: NDArray[np.int64]) -> ObjectArray:
    zone = zone_of(spearman, ks)
    undecided = (np.isnan(spearman) | np.isnan(ks)) & (nights < MIN_NIGHTS_FOR_RED_ON_NAN)
    zone[undecided] = "amber"
    return zone


def _validate_padding(h: FloatArray, r: FloatArray) -> None:
    if h.ndim != 2 or h.shape != r.shape:
        raise ValueError(f"quality_test needs hpl and rtpl as 2-D arrays of one shape, got {h.shape} and {r.shape}")
    missing = np.isnan(h)
    checks = (
        (missing != np.isnan(r), "hpl and rtpl must be NaN on the same nights"),
        (np.isinf(h) | np.isinf(r), "archived nights must hold finite hpl and rtpl"),
        (missing[:, 1:] & ~missing[:, :-1], "NaN padding only on the left (oldest nights first, no gaps)"),
    )
    for bad, rule in checks:
        if bad.any():
            row, col = np.argwhere(bad)[0]
            raise ValueError(f"quality_test input, book row {row}, night column {col}: {rule}")


def _metrics_by_length(h: FloatArray, r: FloatArray, lengths: NDArray[np.int64]) -> _Metrics:
    """Metrics of each row over its last ``lengths[i]`` columns; one vectorised pass per distinct length."""
    books = h.shape[0]
    m = _Metrics(*(np.full(books, np.nan) for _ in range(4)))
    for n in np.unique(lengths[lengths >= 2]):
        rows = np.flatnonzero(lengths == n)
        x, y = h[rows, -n:], r[rows, -n:]
        m.spearman[rows] = spearman_rows(x, y)
        m.ks[rows] = ks_rows(x, y)
        unexplained = x - y
        var_hpl = np.var(x, axis=1, ddof=1)
        sd_hpl = np.sqrt(var_hpl)
        nan = np.full(rows.size, np.nan)
        m.mean_ratio[rows] = np.divide(unexplained.mean(axis=1), sd_hpl, out=nan.copy(), where=var_hpl > 0)
        m.variance_ratio[rows] = np.divide(np.var(unexplained, axis=1, ddof=1), var_hpl, out=nan, where=var_hpl > 0)
    return m


def _fmt(value: float, digits: int) -> str:
    return "n/a" if np.isnan(value) else f"{value:.{digits}f}"


def _early_warnings(result_zone: ObjectArray, zone_60: ObjectArray, nights: NDArray[np.int64],
                    nights_60: NDArray[np.int64], spearman_60: FloatArray, ks_60: FloatArray) -> ObjectArray:
    severity = np.vectorize(_SEVERITY.__getitem__, otypes=[np.int64])
    out = np.full(nights.shape, "", dtype=object)
    if nights.size == 0:
        return out
    worse = severity(zone_60) > severity(result_zone)
    for i in np.flatnonzero(worse):  # text only for the books flagged
        out[i] = (f"latest {nights_60[i]} nights in the {zone_60[i]} zone (Spearman {_fmt(spearman_60[i], 2)}, "
                  f"KS {_fmt(ks_60[i], 3)}) while the {nights[i]}-night test is {result_zone[i]}")
    return out


def quality_test(hpl: ArrayLike, rtpl: ArrayLike, window: int = 250, recent: int = 60) -> QualityResult:
    """Attribution-quality test per book (row) over the latest ``window`` nights (columns, oldest first).

    ``hpl`` and ``rtpl`` are books x nights, NaN-padded on the left where a book has fewer
    nights; the last column is the night tested. Raises ``ValueError`` naming the row and column
    of the first bad cell (NaN pattern differing between hpl and rtpl, a gap, an infinite value).
    """
    if not 1 <= recent <= window:
        raise ValueError(f"quality_test needs 1 <= recent <= window, got recent={recent}, window={window}")
    h_all = np.asarray(hpl, dtype=float)
    r_all = np.asarray(rtpl, dtype=float)
    _validate_padding(h_all, r_all)
    h, r = h_all[:, -window:], r_all[:, -window:]
    nights = np.count_nonzero(~np.isnan(h), axis=1).astype(np.int64)
    nights_60 = np.minimum(nights, recent)
    full = _metrics_by_length(h, r, nights)
    last = _metrics_by_length(h, r, nights_60)
    zone = _zone_with_nights(full.spearman, full.ks, nights)
    zone_60 = _zone_with_nights(last.spearman, last.ks, nights_60)
    return QualityResult(
        nights=nights,
        provisional=nights < window,
        spearman=full.spearman,
        ks=full.ks,
        zone=zone,
        mean_ratio=full.mean_ratio,
        variance_ratio=full.variance_ratio,
        spearman_60=last.spearman,
        ks_60=last.ks,
        zone_60=zone_60,
        early_warning=_early_warnings(zone, zone_60, nights, nights_60, last.spearman, last.ks),
    )
