"""``attribution bench``: a synthetic night of a chosen size through the whole job, timed per stage.

The night runs in a child process so that its peak memory (RSS) is measured alone, without the
data generation. When QuantLib is installed (the test extra), a per-position QuantLib loop doing
the explain's pricing for one position at a time (the way a system that values one position after
another would) is timed in the same run, on positions drawn from the night's own files, once before
the night and once after it; the mean is scaled to the night's positions and set against the
night's wall time.

What the peer computes per position, and nothing more: one QuantLib option object (European or
American exercise, on one process whose quotes are reused), its greeks at the prior state and two
revaluations, at the prior and at the run-date state (the evaluation date moved to the run date).
European greeks are AnalyticEuropeanEngine's (price, delta, gamma, vega, theta, rho, dividend rho:
one calculation that also gives the prior value). American ones come from QdFpAmericanEngine's
fastScheme prices bumped in spot (central: delta, gamma), vol (central: vega), rate and yield
(forward: rho, dividend rho), with theta from the Black-Scholes-Merton equation; no vanna or volga,
and no implied-vol solve (positions whose marks carry no vol are not drawn). Delta-one hedges are
valued by their closed forms in plain Python. The job does more per position than the peer (the
Taylor terms, vanna and volga, the 32-state revaluation, the run-date theta, the smile split, the
limits, the archive and the report pages), so the ratio is in the peer's favour.
"""

from __future__ import annotations

import dataclasses
import math
import multiprocessing as mp
import platform
import queue as queue_module
import resource
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow.parquet as pq

from attribution.config import JobConfig
from attribution.engine import EXIT_OK
from attribution.valuation import FORWARD, FUTURE, KIND_CODES, OPTION, UNDERLYING

PEER_SAMPLE = 3_000      # positions the QuantLib loop prices, before and after the night
RATIO_GOAL = 2.0         # the QuantLib loop's time for the night's positions / the night's wall time
RSS_GOAL_MB = {1_000_000: 1_000.0, 3_000_000: 2_500.0}  # peak memory of the night, by its positions


def _night_in_child(config: JobConfig, as_of: object, queue: mp.Queue) -> None:
    import traceback
    import warnings

    from attribution.console import warning_to_log
    from attribution.runner import run_night
    warnings.showwarning = warning_to_log  # as in the command: library warnings go to the debug log
    try:
        outcome = run_night(config, as_of)  # type: ignore[arg-type]
    except Exception:  # noqa: BLE001 - sent to the parent, which reports it
        queue.put(("error", traceback.format_exc()))
        return
    queue.put(("ok", (outcome.stages, outcome.seconds, outcome.archived, outcome.rejected, outcome.books,
                      str(outcome.index_path))))


def _wait(child: mp.Process, queue: mp.Queue) -> tuple:
    while True:
        try:
            kind, payload = queue.get(timeout=1.0)
        except queue_module.Empty:
            if not child.is_alive():
                raise RuntimeError(f"the bench night ended without a result (exit code {child.exitcode})") from None
            continue
        if kind == "error":
            raise RuntimeError(f"the bench night failed:\n{payload}")
        return payload


@dataclasses.dataclass(frozen=True, slots=True)
class PeerSample:
    """Positions held over the night, with what the peer needs per position (plain arrays)."""

    kind: np.ndarray         # valuation kind codes
    american: np.ndarray
    is_call: np.ndarray
    strike: np.ndarray
    expiry_days: np.ndarray  # days from the prior date to expiry (0 for an underlying)
    night_days: int          # days from the prior date to the run date
    spot: tuple[np.ndarray, np.ndarray]  # prior, run
    vol: tuple[np.ndarray, np.ndarray]
    rate: tuple[np.ndarray, np.ndarray]
    div: tuple[np.ndarray, np.ndarray]

    def __len__(self) -> int:
        return len(self.kind)


def _frame(folder: Path, name: str) -> Any:
    return pq.read_table(folder / f"{name}.parquet").to_pandas()


def peer_sample(data_root: Path, prior: Any, run: Any, size: int = PEER_SAMPLE, seed: int = 11) -> PeerSample:
    """``size`` positions held on both dates, drawn at random from the night's files (with vols on both)."""
    import pandas as pd

    folders = [data_root / f"as_of={d.isoformat()}" for d in (prior, run)]
    pos = [_frame(f, "positions")[["trade_id", "instrument_id"]] for f in folders]
    held = pos[0].merge(pos[1], on=["trade_id", "instrument_id"])
    states = []
    for d, folder in zip((prior, run), folders, strict=True):
        inst = _frame(folder, "instruments")
        inst["kind"] = inst.get("kind", pd.Series(index=inst.index, dtype=object)).fillna("option")
        marks = _frame(folder, "option_marks").set_index("instrument_id")["implied_vol"]
        und = _frame(folder, "underlying_marks").set_index("underlying")
        curves = _frame(folder, "rate_curves").sort_values("tenor_years")
        days = (pd.to_datetime(inst["expiry"]) - pd.Timestamp(d)).dt.days.fillna(0).to_numpy()
        rate = np.full(len(inst), np.nan)
        for code, points in curves.groupby("currency"):  # a few currencies
            mine = (inst["currency"] == code).to_numpy()
            rate[mine] = np.interp(days[mine] / 365.0, points["tenor_years"], points["zero_rate"])
        states.append(pd.DataFrame({
            "instrument_id": inst["instrument_id"], "kind": inst["kind"].map(KIND_CODES),
            "american": (inst["exercise"] == "american").to_numpy(), "is_call": (inst["option_type"] == "call"),
            "strike": inst["strike"], "days": days, "spot": inst["underlying"].map(und["spot"]).to_numpy(),
            "div": inst["underlying"].map(und["dividend_yield"]).to_numpy(), "rate": rate,
            "vol": inst["instrument_id"].map(marks).to_numpy()}))
    both = held.merge(states[0], on="instrument_id").merge(states[1], on="instrument_id", suffixes=("", "_run"))
    option = both["kind"] == OPTION
    both = both[(~option | (both["vol"].notna() & both["vol_run"].notna() & (both["days_run"] > 0)))]
    both = both.sample(n=min(size, len(both)), random_state=seed)
    return PeerSample(both["kind"].to_numpy(np.int8), both["american"].to_numpy(bool), both["is_call"].to_numpy(bool),
                      both["strike"].to_numpy(float), both["days"].to_numpy(np.int64), (run - prior).days,
                      (both["spot"].to_numpy(float), both["spot_run"].to_numpy(float)),
                      (both["vol"].to_numpy(float), both["vol_run"].to_numpy(float)),
                      (both["rate"].to_numpy(float), both["rate_run"].to_numpy(float)),
                      (both["div"].to_numpy(float), both["div_run"].to_numpy(float)))


def _delta_one(kind: int, s: float, k: float, tau: float, r: float, q: float) -> tuple[float, ...]:
    """Value and first-order sensitivities of a delta-one position by its closed form (plain Python)."""
    if kind == UNDERLYING:
        return s, 1.0, 0.0, 0.0, 0.0
    if kind == FUTURE:
        f = s * math.exp((r - q) * tau)
        return f, f / s, -(r - q) * f, tau * f, -tau * f
    if kind == FORWARD:
        sq, kr = s * math.exp(-q * tau), k * math.exp(-r * tau)
        return sq - kr, sq / s, q * sq - r * kr, tau * kr, -tau * sq
    raise ValueError(f"not a delta-one kind: {kind}")


class QuantLibPeer:
    """The per-position QuantLib loop: one process and its quotes, one option object per position."""

    def __init__(self, ql: Any, prior: Any, run: Any) -> None:
        self.ql = ql
        self.d0 = ql.Date(prior.day, prior.month, prior.year)
        self.d1 = ql.Date(run.day, run.month, run.year)
        self.settings = ql.Settings.instance()
        self.settings.evaluationDate = self.d0
        dc, calendar = ql.Actual365Fixed(), ql.NullCalendar()
        self.spot, self.rate, self.div, self.vol = (ql.SimpleQuote(0.0) for _ in range(4))
        # curves and vol anchored on the evaluation date: they move with it to the run date
        process = ql.BlackScholesMertonProcess(
            ql.QuoteHandle(self.spot),
            ql.YieldTermStructureHandle(ql.FlatForward(0, calendar, ql.QuoteHandle(self.div), dc)),
            ql.YieldTermStructureHandle(ql.FlatForward(0, calendar, ql.QuoteHandle(self.rate), dc)),
            ql.BlackVolTermStructureHandle(ql.BlackConstantVol(0, calendar, ql.QuoteHandle(self.vol), dc)))
        self.european = ql.AnalyticEuropeanEngine(process)
        self.american = ql.QdFpAmericanEngine(process, ql.QdFpAmericanEngine.fastScheme())

    def _set(self, s: float, r: float, q: float, v: float) -> None:
        self.spot.setValue(s)
        self.rate.setValue(r)
        self.div.setValue(q)
        self.vol.setValue(v)

    def _american_greeks(self, option: Any, s: float, r: float, q: float, v: float) -> tuple[float, ...]:
        """Price and greeks at (s, r, q, v) by bumped prices; theta from the pricing equation."""
        hs, hv, hr = 1e-3 * s, 1e-3, 1e-4
        self._set(s, r, q, v)
        base = option.NPV()
        self.spot.setValue(s + hs)
        up = option.NPV()
        self.spot.setValue(s - hs)
        down = option.NPV()
        self.spot.setValue(s)
        self.vol.setValue(v + hv)
        vega_up = option.NPV()
        self.vol.setValue(v - hv)
        vega = (vega_up - option.NPV()) / (2 * hv)
        self.vol.setValue(v)
        self.rate.setValue(r + hr)
        rho = (option.NPV() - base) / hr
        self.rate.setValue(r)
        self.div.setValue(q + hr)
        dividend_rho = (option.NPV() - base) / hr
        self.div.setValue(q)
        delta, gamma = (up - down) / (2 * hs), (up - 2 * base + down) / (hs * hs)
        theta = r * base - (r - q) * s * delta - 0.5 * v * v * s * s * gamma
        return base, delta, gamma, vega, theta, rho, dividend_rho

    def time_loop(self, o: PeerSample) -> float:
        """Seconds per position of the loop over the sample (greeks at the prior state, two revaluations)."""
        ql = self.ql
        call, put = ql.Option.Call, ql.Option.Put
        rows = [(int(o.kind[i]), bool(o.american[i]), bool(o.is_call[i]), float(o.strike[i]), int(o.expiry_days[i]),
                 *(float(x[d][i]) for d in (0, 1) for x in (o.spot, o.rate, o.div, o.vol))) for i in range(len(o))]
        night_years = o.night_days / 365.0
        start = time.perf_counter()
        for kind, american, is_call, strike, days, s0, r0, q0, v0, s1, r1, q1, v1 in rows:
            if kind != OPTION:
                _delta_one(kind, s0, strike, days / 365.0, r0, q0)  # greeks at the prior state (and its value)
                _delta_one(kind, s1, strike, days / 365.0 - night_years, r1, q1)  # the run-date revaluation
                continue
            self.settings.evaluationDate = self.d0
            expiry = self.d0 + days
            exercise = ql.AmericanExercise(self.d0, expiry) if american else ql.EuropeanExercise(expiry)
            option = ql.VanillaOption(ql.PlainVanillaPayoff(call if is_call else put, strike), exercise)
            if american:
                option.setPricingEngine(self.american)
                self._american_greeks(option, s0, r0, q0, v0)
            else:
                option.setPricingEngine(self.european)
                self._set(s0, r0, q0, v0)
                (option.NPV(), option.delta(), option.gamma(), option.vega(), option.theta(), option.rho(),
                 option.dividendRho())
            self.settings.evaluationDate = self.d1
            self._set(s1, r1, q1, v1)
            option.NPV()
        seconds = time.perf_counter() - start
        self.settings.evaluationDate = self.d0
        return seconds / max(len(o), 1)


def _quantlib() -> Any | None:
    try:
        import QuantLib as ql
    except ImportError:
        return None
    return ql


def run_bench(positions: int = 1_000_000, books: int = 1_000, instruments: int = 20_000, underlyings: int = 500,
              engine: str = "local", keep: Path | None = None, echo: Callable[[str], None] = print,
              peer_size: int = PEER_SAMPLE) -> int:
    """Build, run and time one synthetic night; print the figures."""
    from attribution.synthetic import AMERICAN_SHARE, HEDGE_SHARE, write_synthetic_night
    with tempfile.TemporaryDirectory(prefix="attribution-bench-") as scratch:
        root = keep.resolve() if keep else Path(scratch)
        t = time.perf_counter()
        night = write_synthetic_night(root / "data", positions, books, instruments, underlyings)
        echo(f"synthetic night: {positions:,} positions ({HEDGE_SHARE:.0%} delta-one hedges, {AMERICAN_SHARE:.0%} "
             f"American options), {books:,} books, {instruments:,} instruments, {underlyings:,} underlyings, "
             f"written in {time.perf_counter() - t:.1f} s")
        ql = _quantlib()
        peer = sample = None
        peer_times: list[float] = []
        if ql is not None:
            sample = peer_sample(night.data_root, night.prior, night.run, peer_size)
            peer = QuantLibPeer(ql, night.prior, night.run)
            peer_times.append(peer.time_loop(sample))
        config = dataclasses.replace(JobConfig(), data_root=root / "data", archive_path=root / "archive.duckdb",
                                     reports_dir=root / "reports", engine=engine)
        ctx = mp.get_context("spawn")
        queue: mp.Queue = ctx.Queue()
        child = ctx.Process(target=_night_in_child, args=(config, night.run, queue))
        t = time.perf_counter()
        child.start()
        stages, seconds, archived, rejected, n_books, index = _wait(child, queue)
        child.join()
        wall = time.perf_counter() - t
        peak_mb = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
        if peer is not None and sample is not None:
            peer_times.append(peer.time_loop(sample))
        echo(f"machine: {platform.machine()}, {mp.cpu_count()} cores, Python {platform.python_version()}")
        echo(f"{'stage':<10} {'seconds':>8}")
        for name, sec in stages:
            echo(f"{name:<10} {sec:8.2f}")
        echo(f"{'total':<10} {seconds:8.2f}   (night's wall time {wall:.2f} s, child process start-up included)")
        echo(f"positions archived {archived:,}, rejected {rejected:,}, books {n_books:,}; "
             f"{positions / seconds:,.0f} positions/s; peak RSS {peak_mb:,.0f} MB{_rss_goal(positions)}")
        echo(f"report index: {index}")
        _echo_peer(echo, peer_times, len(sample) if sample is not None else 0, positions, wall)
    return EXIT_OK


def _rss_goal(positions: int) -> str:
    """The memory goal of a night of this size, where one is set (1M and 3M positions)."""
    goal = RSS_GOAL_MB.get(positions)
    return "" if goal is None else f" (goal <= {goal:,.0f} MB)"


def _echo_peer(echo: Callable[[str], None], peer_times: list[float], sample: int, positions: int,
               wall: float) -> None:
    if not peer_times:
        echo("QuantLib not installed (pip install -e '.[test]'): the per-position QuantLib loop is skipped")
        return
    mean = sum(peer_times) / len(peer_times)
    echo(f"per-position QuantLib loop (greeks at the prior state and two revaluations, prior and run-date state; "
         f"one option object per position) on {sample:,} positions of this night: "
         f"{peer_times[0] * 1e6:,.1f} us/position before the night, {peer_times[-1] * 1e6:,.1f} after, "
         f"mean {mean * 1e6:,.1f}")
    echo(f"QuantLib loop for the night's {positions:,} positions {mean * positions:,.1f} s / our whole night "
         f"{wall:,.1f} s = ratio {mean * positions / wall:,.2f}x (goal >= {RATIO_GOAL:.1f}x)")
