"""``attribution bench``: a synthetic night of a chosen size through the whole job, timed per stage.

The night runs in a child process so that its peak memory (RSS) is measured alone, without the
data generation. When QuantLib is installed (the test extra), the explain kernel is also timed
against a per-position QuantLib loop doing the same work (greeks at the prior state and two
revaluations), on a sample, in the same run.
"""

from __future__ import annotations

import dataclasses
import multiprocessing as mp
import platform
import queue as queue_module
import resource
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np

from attribution.config import JobConfig
from attribution.engine import EXIT_OK


def _night_in_child(config: JobConfig, as_of: object, queue: mp.Queue) -> None:
    import traceback

    from attribution.runner import run_night
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


def kernel_against_quantlib(n: int = 1_000_000, sample: int = 2_000, seed: int = 3) -> tuple[float, float] | None:
    """Seconds per position of the explain kernel (vectorised, n positions) and of a QuantLib loop."""
    try:
        import QuantLib as ql
    except ImportError:
        return None
    from attribution.explain import MarketState, explain_overnight, model_value
    rng = np.random.default_rng(seed)
    s0 = MarketState(rng.uniform(50, 150, n), rng.uniform(0.1, 0.6, n), rng.integers(10, 700, n) / 365.0,
                     rng.uniform(0.0, 0.05, n), rng.uniform(0.0, 0.04, n))
    s1 = MarketState(s0.spot * 1.01, s0.vol + 0.005, s0.tau_years - 1 / 365, s0.rate + 1e-4, s0.div_yield)
    strike, cp, units = rng.uniform(60, 140, n), np.where(rng.random(n) < 0.5, 1.0, -1.0), rng.uniform(1, 9, n)
    p0, p1 = model_value(strike, cp, s0), model_value(strike, cp, s1)
    t = time.perf_counter()
    explain_overnight(strike, cp, units, s0, s1, p0, p1, np.full(n, 1 / 365))
    ours = (time.perf_counter() - t) / n

    today = ql.Date(27, 11, 2026)
    ql.Settings.instance().evaluationDate = today
    dc = ql.Actual365Fixed()
    spot, rate, div, vol = (ql.SimpleQuote(0.0) for _ in range(4))
    process = ql.BlackScholesMertonProcess(
        ql.QuoteHandle(spot), ql.YieldTermStructureHandle(ql.FlatForward(today, ql.QuoteHandle(div), dc)),
        ql.YieldTermStructureHandle(ql.FlatForward(today, ql.QuoteHandle(rate), dc)),
        ql.BlackVolTermStructureHandle(ql.BlackConstantVol(today, ql.NullCalendar(), ql.QuoteHandle(vol), dc)))
    engine = ql.AnalyticEuropeanEngine(process)
    t = time.perf_counter()
    for i in range(sample):
        kind = ql.Option.Call if cp[i] > 0 else ql.Option.Put
        option = ql.VanillaOption(ql.PlainVanillaPayoff(kind, float(strike[i])),
                                  ql.EuropeanExercise(today + int(round(s0.tau_years[i] * 365))))
        option.setPricingEngine(engine)
        spot.setValue(float(s0.spot[i]))
        rate.setValue(float(s0.rate[i]))
        div.setValue(float(s0.div_yield[i]))
        vol.setValue(float(s0.vol[i]))
        _ = (option.NPV(), option.delta(), option.gamma(), option.vega(), option.theta(), option.rho(),
             option.dividendRho())
        spot.setValue(float(s1.spot[i]))
        vol.setValue(float(s1.vol[i]))
        rate.setValue(float(s1.rate[i]))
        _ = option.NPV()
    return ours, (time.perf_counter() - t) / sample


def run_bench(positions: int = 1_000_000, books: int = 1_000, instruments: int = 20_000, underlyings: int = 500,
              engine: str = "local", keep: Path | None = None, echo: Callable[[str], None] = print) -> int:
    """Build, run and time one synthetic night; print the figures."""
    from attribution.synthetic import write_synthetic_night
    with tempfile.TemporaryDirectory(prefix="attribution-bench-") as scratch:
        root = keep.resolve() if keep else Path(scratch)
        t = time.perf_counter()
        night = write_synthetic_night(root / "data", positions, books, instruments, underlyings)
        echo(f"synthetic night: {positions:,} positions, {books:,} books, {instruments:,} instruments, "
             f"{underlyings:,} underlyings, written in {time.perf_counter() - t:.1f} s")
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
        echo(f"machine: {platform.machine()}, {mp.cpu_count()} cores, Python {platform.python_version()}")
        echo(f"{'stage':<10} {'seconds':>8}")
        for name, sec in stages:
            echo(f"{name:<10} {sec:8.2f}")
        echo(f"{'total':<10} {seconds:8.2f}   (child process wall {wall:.2f} s incl. start-up)")
        echo(f"positions archived {archived:,}, rejected {rejected:,}, books {n_books:,}; "
             f"{positions / seconds:,.0f} positions/s; peak RSS {peak_mb:,.0f} MB")
        echo(f"report index: {index}")
        ratio = kernel_against_quantlib(min(positions, 1_000_000))
        if ratio is None:
            echo("QuantLib not installed (pip install -e '.[test]'): kernel comparison skipped")
        else:
            ours, theirs = ratio
            echo(f"explain kernel {ours * 1e9:,.0f} ns/position vs QuantLib loop {theirs * 1e9:,.0f} ns/position: "
                 f"{theirs / ours:,.0f}x")
    return EXIT_OK
