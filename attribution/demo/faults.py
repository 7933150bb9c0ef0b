"""Faults planted in the demo's marks: a stale, a fat-finger and a missing mark, and nights of noisy marks."""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

from attribution.arrays import FloatArray
from attribution.demo.desk import DeskSpec
from attribution.demo.market import IntArray, ListedInstruments, MarketPaths
from attribution.demo.nights import Night, PlantedFault, Trades


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
    return both, score


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
    if kind == "fat_finger_mark":
        factor = desk.faults.fat_finger_factor
        night.price[pos] *= factor
        return f"price {night.price[pos]:.6g} written instead of {night.price[pos] / factor:.6g}"
    night.keep[pos] = False
    return "no option_marks row although the instrument is held"


def mark_faults(desk: DeskSpec, market: MarketPaths, store: ListedInstruments, trades: Trades, nights: list[Night],
                 ids: NDArray[np.str_], b: int) -> list[PlantedFault]:
    """One stale, one fat-finger and one missing mark, on distinct nights, in positions book ``b`` carries."""
    n = len(nights)
    used: set[int] = set()
    out = []
    for kind, frac in (("stale_mark", 0.35), ("fat_finger_mark", 0.6), ("missing_mark", 0.8)):
        order = sorted(range(1, n), key=lambda d, f=frac: abs(d - f * (n - 1)))
        for d in (d for d in order if d not in used):
            both, score = _fault_candidates(desk, market, store, trades, nights, d, b, kind)
            if both.size and score.max() > 0:
                inst = int(both[np.argmax(score)])
                detail = _plant_mark_fault(desk, market, store, nights, d, inst, kind)
                out.append(PlantedFault(market.dates[d].item(), desk.books[b].name, str(ids[inst]), kind, detail))
                used.add(d)
                break
        else:
            raise RuntimeError(f"book {desk.books[b].name}: no carried position to plant a {kind} in")
    return out


def noisy_marks(desk: DeskSpec, market: MarketPaths, store: ListedInstruments, nights: list[Night], b: int,
                 rng: np.random.Generator) -> list[PlantedFault]:
    """Random errors of the time value of every live option of book ``b``'s underlyings on some nights."""
    spec, book, names = desk.faults, desk.books[b], [u.name for u in desk.underlyings]
    noisy = rng.random(len(nights)) < spec.noisy_night_share
    noisy[0] = False
    if not noisy.any():
        noisy[rng.integers(1, len(nights))] = True
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
