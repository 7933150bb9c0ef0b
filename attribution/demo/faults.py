"""Faults planted in the demo's marks: a stale, a fat-finger and a missing mark, a mark off its smile, a butterfly
in the marks (smile arbitrage), and nights of noisy marks."""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

from attribution.arrays import FloatArray
from attribution.demo.desk import DeskSpec
from attribution.demo.market import IntArray, ListedInstruments, MarketPaths
from attribution.demo.nights import Night, PlantedFault, Trades
from attribution.implied_vol import implied_vol
from attribution.pricing import bsm_price

SMILE_KINDS = ("off_smile_mark", "smile_arbitrage_mark")
OFF_SMILE_BUMP = 0.04        # added to a strike's vols: twice the job's default distance of 2 vol points


def _carried_in_book(market: MarketPaths, store: ListedInstruments, trades: Trades, nights: list[Night], d: int,
                     b: int) -> tuple[IntArray, FloatArray]:
    """Instruments book ``b`` holds on nights d - 1 and d with a week or more to expiry, and sum |qty| x price at d."""
    now, prev = nights[d].rows, nights[d - 1].rows
    mine = trades.book[now] == b
    inst_now = trades.instrument[now][mine]
    both = np.intersect1d(inst_now, trades.instrument[prev][trades.book[prev] == b])
    both = both[(store.expiry[both] - market.dates[d]).astype(int) >= 7]
    inside = np.isin(inst_now, both)
    units = np.bincount(np.searchsorted(both, inst_now[inside]), np.abs(nights[d].quantity[mine][inside]),
                        minlength=both.size)
    return both, units * nights[d].price[np.searchsorted(nights[d].live, both)]


def _fault_candidates(desk: DeskSpec, market: MarketPaths, store: ListedInstruments, trades: Trades,
                      nights: list[Night], d: int, b: int, kind: str) -> tuple[IntArray, FloatArray]:
    """Carried instruments of book ``b`` on night ``d`` and a score (> 0 where the fault may go, larger first).

    The stale and fat-finger marks stay strictly inside the night's no-arbitrage bounds, so that they reach
    the explain as marks the controls must catch; a stale mark needs its underlying to move by 0.5 % or more.
    """
    both, score = _carried_in_book(market, store, trades, nights, d, b)
    night = nights[d]
    pos = np.searchsorted(night.live, both)
    if kind == "stale_mark":
        prev = nights[d - 1]
        stale = prev.price[np.searchsorted(prev.live, both)]
        move = np.abs(np.log(market.spot[d] / market.spot[d - 1]))[store.und[both]]
        ok = (stale > night.lower[pos]) & (stale < night.upper[pos]) & (move >= 0.005)
        return both, np.where(ok, score * move, 0.0)
    if kind == "fat_finger_mark":
        return both, np.where(night.price[pos] * desk.faults.fat_finger_factor < night.upper[pos], score, 0.0)
    if kind in SMILE_KINDS:  # European names only: the planted marks are repriced with the BSM price
        european = np.array([u.exercise != "american" for u in desk.underlyings])[store.und[both]]
        return both, np.where(european & _smile_candidate(store, night, both, kind), score, 0.0)
    return both, score


def _strike_rows(store: ListedInstruments, night: Night, inst: int) -> tuple[IntArray, IntArray]:
    """Rows of ``night.live`` in the instrument's series (underlying and expiry), and those at its strike."""
    live = night.live
    series = np.flatnonzero((store.und[live] == store.und[inst]) & (store.expiry[live] == store.expiry[inst]))
    return series, series[store.strike[live[series]] == store.strike[inst]]


def _butterfly(store: ListedInstruments, night: Night, inst: int) -> tuple[float, float, float, float, float]:
    """The call at the instrument's strike and the mix of its neighbouring strikes' calls (l C(K1) + (1 - l) C(K3)),
    the vol at which that call would equal the mix, and the two neighbouring strikes."""
    series, _ = _strike_rows(store, night, inst)
    k, pos = store.strike[inst], int(np.searchsorted(night.live, inst))
    strikes = store.strike[night.live[series]]
    k1, k3 = strikes[strikes < k].max(), strikes[strikes > k].min()
    vols = night.vol[series]
    rows = [int(series[np.flatnonzero((strikes == x) & np.isfinite(vols))[0]]) for x in (k1, k3)]
    s, t, r, q = night.spot[pos], night.tau[pos], night.rate[pos], night.div[pos]
    c1, c3 = (float(bsm_price(s, x, t, night.vol[i], r, q, True)[0]) for x, i in zip((k1, k3), rows, strict=True))
    lam = (k3 - k) / (k3 - k1)
    mix = lam * c1 + (1.0 - lam) * c3
    call = float(bsm_price(s, k, t, night.vol[pos], r, q, True)[0])
    at_mix = float(implied_vol(np.array([mix]), np.array([s]), np.array([k]), np.array([t]), np.array([r]),
                               np.array([q]), np.array([True])).vol[0])
    return call, mix, at_mix, float(k1), float(k3)


def _smile_candidate(store: ListedInstruments, night: Night, both: IntArray, kind: str) -> NDArray[np.bool_]:
    """Near the money, two weeks or more to expiry, a vol on every mark of its strike, and at least two listed
    strikes on either side in its series (the nearest with a vol in the file): a smile the job fits, with neighbours
    to compare with. An off-smile
    mark also needs room to move up by OFF_SMILE_BUMP without its call passing its neighbours' mix."""
    ok = np.zeros(both.size, dtype=bool)
    for j, inst in enumerate(both):
        pos = int(np.searchsorted(night.live, inst))
        series, at = _strike_rows(store, night, int(inst))
        strikes = store.strike[night.live[series]]
        k = store.strike[inst]
        z = np.log(k / night.spot[pos]) / (night.vol[pos] * np.sqrt(max(night.tau[pos], 1e-9)))
        marked = strikes[np.isfinite(night.vol[series])]   # strikes with a vol in the file
        ok[j] = (night.tau[pos] >= 14 / 365 and bool(np.isfinite(night.vol[at]).all()) and abs(z) < 0.75
                 and np.unique(strikes[strikes < k]).size >= 2 and np.unique(strikes[strikes > k]).size >= 2
                 and marked[marked < k].max(initial=-np.inf) == strikes[strikes < k].max()
                 and marked[marked > k].min(initial=np.inf) == strikes[strikes > k].min())
        if ok[j] and kind == "off_smile_mark":
            ok[j] = _butterfly(store, night, int(inst))[2] > night.vol[pos] + 1.5 * OFF_SMILE_BUMP
    return ok


def _set_strike_vol(store: ListedInstruments, night: Night, at: IntArray, vol: float) -> None:
    """Mark every option of one strike at ``vol``, its prices repriced so that mark and vol agree."""
    live = night.live[at]
    night.vol[at] = vol
    night.price[at] = bsm_price(night.spot[at], store.strike[live], night.tau[at], np.full(at.size, vol),
                                night.rate[at], night.div[at], store.is_call[live])


def _plant_smile_fault(store: ListedInstruments, night: Night, inst: int, kind: str) -> str:
    """Lift one strike's marks off the smile: by OFF_SMILE_BUMP (no arbitrage), or, for a smile arbitrage, to where
    its call is dearer than the mix of its neighbouring strikes' calls (a butterfly with a negative price)."""
    _, at = _strike_rows(store, night, inst)
    k, pos = store.strike[inst], int(np.searchsorted(night.live, inst))
    before = float(night.vol[pos])
    if kind == "off_smile_mark":
        _set_strike_vol(store, night, at, before + OFF_SMILE_BUMP)
        return f"implied vol {before + OFF_SMILE_BUMP:.4f} instead of {before:.4f} on every mark of strike {k:g}"
    call, mix, at_mix, k1, k3 = _butterfly(store, night, inst)
    vol = at_mix + 0.5 * (at_mix - before)      # past the neighbours' mix by half the way there
    _set_strike_vol(store, night, at, vol)
    return (f"implied vol {vol:.4f} instead of {before:.4f} on every mark of strike {k:g}: its call is above "
            f"{mix:.6g}, the mix of strikes {k1:g} and {k3:g} (a butterfly priced below zero)")


def _plant_mark_fault(desk: DeskSpec, market: MarketPaths, store: ListedInstruments, nights: list[Night], d: int,
                      inst: int, kind: str) -> str:
    """Plant one fault in night ``d``'s mark of instrument ``inst``; returns its description."""
    night, name = nights[d], desk.underlyings[store.und[inst]].name
    pos = int(np.searchsorted(night.live, inst))
    if kind == "stale_mark":
        prev = nights[d - 1]
        p_prev = int(np.searchsorted(prev.live, inst))
        night.price[pos], night.vol[pos] = prev.price[p_prev], prev.vol[p_prev]
        move = np.log(market.spot[d, store.und[inst]] / market.spot[d - 1, store.und[inst]])
        return (f"price {night.price[pos]:.6g} and implied vol {night.vol[pos]:.4f} repeated from "
                f"{market.dates[d - 1]} while {name} moved {move:+.2%}")
    if kind in SMILE_KINDS:
        return _plant_smile_fault(store, night, inst, kind)
    if kind == "fat_finger_mark":
        factor = desk.faults.fat_finger_factor
        night.price[pos] *= factor
        return f"price {night.price[pos]:.6g} written instead of {night.price[pos] / factor:.6g}"
    night.keep[pos] = False
    return "no option_marks row although the instrument is held"


def mark_faults(desk: DeskSpec, market: MarketPaths, store: ListedInstruments, trades: Trades, nights: list[Night],
                 ids: NDArray[np.str_], b: int) -> list[PlantedFault]:
    """One stale, one fat-finger and one missing mark, one mark off its smile and one butterfly in the marks,
    in positions book ``b`` carries: the fat-finger and the missing mark (another instrument) on the last night, so
    that the demo's report shows a breach and rejected positions; the others on distinct nights of their own."""
    n = len(nights)
    used: set[int] = set()
    fat_finger: set[int] = set()
    out = []
    for kind, frac in (("fat_finger_mark", 1.0), ("missing_mark", 1.0), ("stale_mark", 0.35),
                       ("off_smile_mark", 0.45), ("smile_arbitrage_mark", 0.7)):
        order = sorted(range(1, n), key=lambda d, f=frac: abs(d - f * (n - 1)))
        for d in (d for d in order if d not in used or (kind == "missing_mark" and d == n - 1)):
            both, score = _fault_candidates(desk, market, store, trades, nights, d, b, kind)
            score = np.where(np.isin(both, list(fat_finger)), 0.0, score) if kind == "missing_mark" else score
            if both.size and score.max() > 0:
                inst = int(both[np.argmax(score)])
                detail = _plant_mark_fault(desk, market, store, nights, d, inst, kind)
                out.append(PlantedFault(market.dates[d].item(), desk.books[b].name, str(ids[inst]), kind, detail))
                used.add(d)
                if kind == "fat_finger_mark":
                    fat_finger.add(inst)
                break
        else:
            raise RuntimeError(f"book {desk.books[b].name}: no carried position to plant a {kind} in")
    return out


def noisy_marks(desk: DeskSpec, market: MarketPaths, store: ListedInstruments, nights: list[Night], b: int,
                 rng: np.random.Generator) -> list[PlantedFault]:
    """Random errors of the time value of every live option of book ``b``'s underlyings on every night of one spell
    (a bad price feed: ``noisy_spell_nights`` from ``noisy_spell_start`` of the year, at least one night)."""
    spec, book, names = desk.faults, desk.books[b], [u.name for u in desk.underlyings]
    first = min(max(1, round(spec.noisy_spell_start * (len(nights) - 1))), len(nights) - 1)
    noisy = np.zeros(len(nights), dtype=bool)
    noisy[first: first + max(1, spec.noisy_spell_nights)] = True
    out = []
    for d in np.flatnonzero(noisy):
        night = nights[d]
        common = rng.normal(0.0, spec.noisy_common_sd)  # one bad feed: the book's underlyings err together
        for name in book.underlyings:
            sel = (store.und[night.live] == names.index(name)) & (night.tau > 0)
            error = np.clip(common + rng.normal(0.0, spec.noisy_idio_sd, int(sel.sum())), -0.9, 1.5)
            lower, upper = night.lower[sel], night.upper[sel]
            night.price[sel] = np.minimum(lower + (night.price[sel] - lower) * (1.0 + error),
                                          lower + 0.99 * (upper - lower))
            out.append(PlantedFault(market.dates[d].item(), book.name, name, "noisy_marks",
                                    f"time value of {int(sel.sum())} option marks off by {common:+.1%} in common "
                                    f"and {spec.noisy_idio_sd:.0%} (sd) each"))
    return out
