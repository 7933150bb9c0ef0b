"""The night's smiles: both dates' marks fitted per underlying and expiry, the vol parts of each position,
and the smile checks on the run date's marks.

The edge between the instrument markets (:mod:`attribution.market`) and the pure smile core
(:mod:`attribution.smile`, :mod:`attribution.smile_checks`): string keys are factorised here, once,
into integer smile codes shared by both dates; everything after that is arrays.

A smile is one underlying and one expiry. Its points on a date are the instruments usable on that
date with time left and a positive vol, within :data:`~attribution.smile.FIT_RANGE` standardised
units of the forward (further out, a solved vol of a near-zero price says little); a mark further
out reads the smile flat from the edge of that range and is not checked. A smile's coordinate scale
(mean vol x sqrt(mean time) of its points) is taken from the prior date, or from the run date for a
smile the prior date did not have, and used on both dates (see :mod:`attribution.smile`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from attribution.arrays import FloatArray, IntArray
from attribution.exceptions_log import WARNING, ExceptionLog
from attribution.market import InstrumentMarket
from attribution.smile import (
    FIT_RANGE,
    SmileFit,
    VolParts,
    fit_smiles,
    reference_scale,
    split_vol_move,
    split_vol_pnl,
)
from attribution.smile_checks import butterfly, calendar, off_smile

STICKY_MONEYNESS = "sticky moneyness"


@dataclass(frozen=True, slots=True)
class DateSmiles:
    """One date's smiles, with every instrument of its market placed on them (arrays per instrument).

    Where an instrument is not a point of a fitted smile (no time left, not usable), its level is its
    own vol, skew, curvature and residual are 0: its whole vol move counts as level.
    """

    points: IntArray           # instruments that are points of a fit (within the fitted range)
    smile: IntArray            # per instrument: smile code (-1: none)
    x: FloatArray              # standardised log-moneyness, clipped to the fitted range (0 where not on a smile)
    level: FloatArray          # the coefficients of the instrument's smile, gathered per instrument
    skew: FloatArray
    curvature: FloatArray
    residual: FloatArray       # vol - fitted vol
    fit: SmileFit              # per smile; its per-point arrays follow ``points``


@dataclass(frozen=True, slots=True)
class NightSmiles:
    """Both dates' smiles; smile codes are shared, ``names`` gives each code's underlying and expiry."""

    prior: DateSmiles
    run: DateSmiles
    underlying: NDArray[np.object_]     # per smile code
    expiry: NDArray[np.datetime64]      # per smile code


def _codes(m0: InstrumentMarket, m1: InstrumentMarket) -> tuple[IntArray, IntArray, pd.DataFrame]:
    """Smile codes of each market's instruments, ordered by underlying then expiry."""
    u_codes, u_names = pd.factorize(np.concatenate([m0.underlying, m1.underlying]).astype(object), sort=True,
                                    use_na_sentinel=False)
    e_codes, e_names = pd.factorize(np.concatenate([m0.expiry, m1.expiry]).astype("datetime64[D]"), sort=True,
                                    use_na_sentinel=False)
    n_e = max(len(e_names), 1)
    distinct, code = np.unique(u_codes.astype(np.int64) * n_e + e_codes, return_inverse=True)
    names = pd.DataFrame({"underlying": np.asarray(u_names, dtype=object)[distinct // n_e],
                          "expiry": np.asarray(e_names, dtype="datetime64[D]")[distinct % n_e]})
    code = code.astype(np.intp)
    return code[:len(m0.ids)], code[len(m0.ids):], names


def _on_smile(m: InstrumentMarket, vol: FloatArray) -> NDArray[np.bool_]:
    with np.errstate(invalid="ignore"):
        return m.usable & (m.tau_years > 0) & np.isfinite(vol) & (vol > 0) & np.isfinite(m.spot)


def _date(m: InstrumentMarket, vol: FloatArray, code: IntArray, scale: FloatArray, n: int) -> DateSmiles:
    on = _on_smile(m, vol)
    forward = m.escrowed_spot * np.exp((m.rate - m.div_yield) * m.tau_years)  # discrete dividends out
    x = np.zeros(len(code))
    with np.errstate(all="ignore"):
        x[on] = np.log(m.strike[on] / forward[on]) / scale[code[on]]
    on &= np.isfinite(x)
    points = np.flatnonzero(on & (np.abs(x) <= FIT_RANGE))
    fit = fit_smiles(code[points], x[points], vol[points], m.strike[points], n)
    g = np.maximum(code, 0)
    on &= np.isfinite(fit.level[g])          # a smile with no mark inside the fitted range has no fit
    x = np.clip(np.where(on, x, 0.0), -FIT_RANGE, FIT_RANGE)   # flat beyond the fitted range
    level = np.where(on, fit.level[g], vol)
    skew = np.where(on, fit.skew[g], 0.0)
    curvature = np.where(on, fit.curvature[g], 0.0)
    residual = np.where(on, vol - (level + skew * x + curvature * x * x), 0.0)
    return DateSmiles(points, np.where(on, code, -1), x, level, skew, curvature, residual, fit)


def night_smiles(m0: InstrumentMarket, m1: InstrumentMarket, vol0: FloatArray, vol1: FloatArray) -> NightSmiles:
    """Fit both dates' smiles (``vol0``/``vol1``: the vols the explain uses, per instrument of each market)."""
    c0, c1, names = _codes(m0, m1)
    n = len(names)
    on0, on1 = _on_smile(m0, vol0), _on_smile(m1, vol1)
    scale = reference_scale(c0[on0], vol0[on0], m0.tau_years[on0], n)
    later = reference_scale(c1[on1], vol1[on1], m1.tau_years[on1], n)
    scale = np.where(np.isfinite(scale) & (scale > 0), scale, later)
    return NightSmiles(_date(m0, vol0, c0, scale, n), _date(m1, vol1, c1, scale, n),
                       names["underlying"].to_numpy(dtype=object), names["expiry"].to_numpy())


def position_parts(smiles: NightSmiles, i0: IntArray, i1: IntArray, dynamics: str) -> VolParts:
    """Parts of the vol move of positions held overnight (``i0``/``i1``: their instruments in each market).

    Where the instrument sits on a different smile code on each date or on none, the move is all level.
    """
    p, r = smiles.prior, smiles.run
    same = (p.smile[i0] >= 0) & (p.smile[i0] == r.smile[i1])
    x0 = np.where(same, p.x[i0], 0.0)
    x1 = np.where(same, r.x[i1], 0.0)
    vol0 = p.level[i0] + p.skew[i0] * p.x[i0] + p.curvature[i0] * p.x[i0] ** 2 + p.residual[i0]
    vol1 = r.level[i1] + r.skew[i1] * r.x[i1] + r.curvature[i1] * r.x[i1] ** 2 + r.residual[i1]

    def pick(a: FloatArray, fallback: FloatArray) -> FloatArray:
        return np.where(same, a, fallback)

    zero = np.zeros(len(i0))
    return split_vol_move(pick(p.level[i0], vol0), pick(p.skew[i0], zero), pick(p.curvature[i0], zero),
                          pick(p.residual[i0], zero), x0,
                          pick(r.level[i1], vol1), pick(r.skew[i1], zero), pick(r.curvature[i1], zero),
                          pick(r.residual[i1], zero), x1, dynamics == STICKY_MONEYNESS)


def vol_columns(smiles: NightSmiles, i0: IntArray, i1: IntArray, units: FloatArray, vega: FloatArray,
                volga: FloatArray, pnl_vega: FloatArray, pnl_volga: FloatArray, dynamics: str) -> dict[str, FloatArray]:
    """The archive's vol columns of positions held overnight: ``pnl_vega``, ``pnl_volga`` (restated under
    sticky moneyness), ``pnl_vol_level/skew/curvature/own`` and ``pnl_smile_delta``.

    ``vega``/``volga`` are per unit at the prior state and ``pnl_vega``/``pnl_volga`` the explain's terms.
    The own part is the vol terms less the other three parts, so the four add up to the vol terms to
    the last bit; it differs from ``units d_own (vega + volga rest / 2)`` by rounding only.
    """
    parts = position_parts(smiles, i0, i1, dynamics)
    pnl = split_vol_pnl(units, vega, volga, parts)
    if dynamics == STICKY_MONEYNESS:
        pnl_vega, pnl_volga, smile_delta = pnl.vega, pnl.volga, pnl.smile_delta
    else:
        smile_delta = np.zeros(len(i0))
    own = (pnl_vega + pnl_volga) - pnl.level - pnl.skew - pnl.curvature
    return {"pnl_vega": pnl_vega, "pnl_volga": pnl_volga, "pnl_vol_level": pnl.level, "pnl_vol_skew": pnl.skew,
            "pnl_vol_curvature": pnl.curvature, "pnl_vol_own": own, "pnl_smile_delta": smile_delta}


def _names(smiles: NightSmiles, code: IntArray) -> list[str]:
    """``underlying expiry`` of each smile code (for the few flagged marks only)."""
    return [f"{u} {e}" for u, e in zip(smiles.underlying[code], smiles.expiry[code].astype("datetime64[D]"),
                                         strict=True)]


class _Ids:
    """The instrument ids of the checked marks, turned into strings only for the few flagged."""

    def __init__(self, ids: pd.Index, points: IntArray) -> None:
        self._ids, self._points = ids, points

    def __getitem__(self, index: IntArray) -> NDArray[np.object_]:
        return self._ids[self._points[index]].to_numpy(dtype=object)


def check_smiles(smiles: NightSmiles, m1: InstrumentMarket, vol1: FloatArray, off_smile_vol: float,
                 marks_file: str, log: ExceptionLog) -> None:
    """Warn about the run date's marks that lie off their smile or make a butterfly or calendar arbitrage.

    ``vol1``: the run date's marked vols (basis clock) per instrument, for the arbitrage checks.
    """
    run = smiles.run
    pts = run.points
    if pts.size == 0:
        return
    g = run.smile[pts]
    ids = _Ids(m1.ids, pts)
    # Off smile on the vols the smiles were fitted to (the variance clock's, when the job weights time).
    found = off_smile(g, m1.strike[pts], run.x[pts], run.fit.fitted + run.fit.residual, run.fit.fitted,
                      run.fit.quadratic[g], off_smile_vol)
    log.add(marks_file, ids[found.index], "off smile",
            [f"implied vol {v:.4f} is {abs(v - f) * 100:.2f} vol points from its fitted smile ({f:.4f}) on {s}"
             for v, f, s in zip(found.observed, found.bound, _names(smiles, g[found.index]), strict=True)], WARNING)
    fly = butterfly(g, m1.strike[pts], m1.escrowed_spot[pts], m1.tau_years[pts], vol1[pts], m1.rate[pts],
                    m1.div_yield[pts])
    log.add(marks_file, ids[fly.index], "smile arbitrage",
            [f"butterfly: call value {c:.6g} at this strike is above {b:.6g}, the mix of its neighbouring "
             f"strikes on {s}" for c, b, s in zip(fly.observed, fly.bound, _names(smiles, g[fly.index]), strict=True)],
            WARNING)
    previous = np.full(len(smiles.underlying), -1, dtype=np.intp)
    present = np.unique(g)              # codes are ordered by underlying then expiry
    same_und = smiles.underlying[present[1:]] == smiles.underlying[present[:-1]]
    previous[present[1:][same_und]] = present[:-1][same_und]
    forward = m1.escrowed_spot[pts] * np.exp((m1.rate[pts] - m1.div_yield[pts]) * m1.tau_years[pts])
    cal = calendar(g, previous, np.log(m1.strike[pts] / forward), vol1[pts] ** 2 * m1.tau_years[pts])
    log.add(marks_file, ids[cal.index], "smile arbitrage",
            [f"calendar: total variance {w:.6g} is below {b:.6g}, the earlier expiry's at the same forward "
             f"moneyness on {s}"
             for w, b, s in zip(cal.observed, cal.bound, _names(smiles, g[cal.index]), strict=True)], WARNING)
