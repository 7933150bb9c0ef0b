"""Running a range of nights in order, with one progress display and one closing line.

A night's tables depend only on the files of its two dates (and earlier folders for rolled marks),
never on the archive, so a long local backfill computes them in worker processes, one per core,
each taking a block of consecutive nights (its dates' shared work reused within the block) and
handing back each night's archive rows as Arrow (:class:`~attribution.engine.ArchiveRows`), while
this process archives, tests quality and reports every night in date order, as one process would.
The archived values are the same: every night is computed by the same code on the same files.
"""

from __future__ import annotations

import collections
import concurrent.futures as cf
import contextlib
import dataclasses
import datetime as dt
import logging
import multiprocessing as mp
import os
import sys
import warnings
from collections.abc import Callable, Iterator
from typing import Any

import pyarrow as pa
import pyarrow.parquet as pq

from attribution.config import JobConfig
from attribution.console import LOG_FORMAT, ProgressLine, summary, warning_to_log
from attribution.date_cache import DateCache
from attribution.engine import (
    EXIT_FINDINGS,
    EXIT_OK,
    ArchiveRows,
    NightOutcome,
    archive_night,
    archive_rows,
    open_archive,
    prepare_night,
)
from attribution.loading import InputFileError, available_dates
from attribution.pricing import _available_cores
from attribution.runner import cluster, run_night

BLOCK_NIGHTS = 16  # consecutive nights computed by one worker in one go (each block reads one date twice)
BLOCK_POSITIONS = 400_000  # positions of a block's nights at most (they wait in memory to be archived)
LARGEST_NIGHT = 200_000  # nights with more positions are computed one at a time by the backfill's own process


def nights_between(config: JobConfig, start: dt.date, end: dt.date) -> list[dt.date]:
    """Run dates with a data folder in [start, end] that have an earlier folder to serve as prior."""
    if end < start:
        raise InputFileError(f"--from {start} is after --to {end}")
    dates = available_dates(config.data_root)
    return [d for d in dates if start <= d <= end and d > dates[0]]


def backfill(config: JobConfig, start: dt.date, end: dt.date, reports_last: int = 1,
             echo: Callable[[str], None] = print, workers: cf.ProcessPoolExecutor | None = None) -> int:
    """Run every night of the range; stops at the first failed night. Returns the exit code.

    ``workers``: processes from :func:`started_workers`, already started while the caller did other work (the
    caller stops them); None starts them here when the plan calls for them.
    """
    nights = nights_between(config, start, end)
    if not nights:
        raise InputFileError(f"{config.data_root}: no run date between {start} and {end} with a prior folder")
    progress = ProgressLine(len(nights))
    # The archive is held for the whole range (no other run slips in between nights), and with
    # engine = "dask" one cluster serves every night. Each date's reading, row rules and market state
    # serve both nights that use it (as run date, then as the next night's prior): one cache per range.
    shared = DateCache()
    processes, block = worker_plan(config, nights)
    with open_archive(config, one_thread=processes > 1) as session, cluster(config) as client:
        prepared = _prepared_elsewhere(config, nights, processes, block, workers)
        with contextlib.closing(prepared):  # the workers are stopped however the range ends
            outcomes = _run_in_order(config, nights, reports_last, prepared, session, client, shared, progress)
    progress.close()
    last = outcomes[-1]
    echo(summary(last, config))
    findings = sum(o.exit_code == EXIT_FINDINGS for o in outcomes)
    echo(f"Backfilled {len(outcomes)} night(s) {nights[0]} .. {nights[-1]}; "
         f"{findings} with rejected rows or limit breaches.")
    return EXIT_FINDINGS if findings else EXIT_OK


def _run_in_order(config: JobConfig, nights: list[dt.date], reports_last: int, prepared: Iterator[ArchiveRows],
                  session: Any, client: Any, shared: DateCache, progress: ProgressLine) -> list[NightOutcome]:
    """Archive (and report) every night in date order; a night no worker computed is computed here."""
    outcomes: list[NightOutcome] = []
    for k, night in enumerate(nights):
        night_config = dataclasses.replace(
            config, write_reports=config.write_reports and (reports_last < 0 or k >= len(nights) - reports_last))
        ready = next(prepared, None)
        if ready is None:  # one process only, or a worker could not compute this night
            outcomes.append(run_night(night_config, night, session=session, client=client, cache=shared))
        else:
            outcomes.append(archive_night(night_config, ready, session))
        progress.step(str(night))
    return outcomes


def worker_plan(config: JobConfig, nights: list[dt.date]) -> tuple[int, int]:
    """(worker processes, nights per block) of a backfill of ``nights``: the job's ``backfill_processes`` (0: one per
    available core), never more than its blocks of nights. A block holds at most ``BLOCK_POSITIONS`` positions (its
    nights wait in memory to be archived); nights of more than ``LARGEST_NIGHT`` positions (the last night's file
    tells) are computed one at a time in this process, as are those of the Dask engine (it has its own workers)."""
    if config.engine != "local" or not nights:
        return 1, BLOCK_NIGHTS
    rows = _positions_rows(config, nights[-1])
    if rows is None or rows > LARGEST_NIGHT:
        return 1, BLOCK_NIGHTS
    block = max(1, min(BLOCK_NIGHTS, BLOCK_POSITIONS // max(rows, 1)))
    return max(1, min(wanted_processes(config), len(nights) // block)), block


def wanted_processes(config: JobConfig) -> int:
    """Worker processes the job asks a backfill for: ``backfill_processes``, 0 meaning one per available core;
    one (no worker) on the Dask engine, which has its own."""
    if config.engine != "local":
        return 1
    return config.backfill_processes or _available_cores()


def _positions_rows(config: JobConfig, night: dt.date) -> int | None:
    """Rows of a date's positions file from its footer (None when it cannot be read: the night says why)."""
    try:
        return int(pq.read_metadata(config.data_root / f"as_of={night.isoformat()}" / "positions.parquet").num_rows)
    except (OSError, pa.ArrowException):
        return None


_WORKER_CACHE: DateCache | None = None


@contextlib.contextmanager
def _main_not_inherited() -> Iterator[None]:
    """Workers started meanwhile do not run the caller's main script again (a fresh interpreter otherwise
    imports it, which re-runs a script without an ``if __name__ == "__main__"`` guard); they need only this
    package."""
    main = sys.modules.get("__main__")
    saved = {name: main.__dict__.pop(name) for name in ("__file__", "__spec__") if main is not None
             and name in main.__dict__}
    if main is not None:
        main.__spec__ = None  # type: ignore[assignment]
    try:
        yield
    finally:
        if main is not None:
            main.__dict__.pop("__spec__", None)
            main.__dict__.update(saved)


def _start_worker(cores: list[int], counter: Any, log_level: int) -> None:
    """Each worker keeps to one core of its own (its numpy threads too), so workers do not contend. It logs as
    the command does (stderr, the same verbosity), library warnings going to the debug log, not the terminal."""
    global _WORKER_CACHE
    _WORKER_CACHE = DateCache()
    logging.basicConfig(level=log_level, stream=sys.stderr, format=LOG_FORMAT)
    warnings.showwarning = warning_to_log
    with counter.get_lock():
        slot = counter.value
        counter.value += 1
    if hasattr(os, "sched_setaffinity") and cores:
        os.sched_setaffinity(0, {cores[slot % len(cores)]})


def _prepare_block(config: JobConfig, nights: list[dt.date]) -> list[ArchiveRows]:
    """The archive rows of consecutive ``nights``, up to the first night that fails (which this process leaves
    to the backfill's own process to run again, so its error reaches the user as in a one-process run)."""
    cache = _WORKER_CACHE if _WORKER_CACHE is not None else DateCache()
    done: list[ArchiveRows] = []
    for night in nights:
        try:
            done.append(archive_rows(prepare_night(config, night, cache=cache)))
        except Exception:  # noqa: BLE001 - re-raised by the backfill's process when it runs this night itself
            break
    return done


def night_blocks(nights: list[dt.date], block_nights: int, processes: int) -> list[list[dt.date]]:
    """Consecutive blocks of ``block_nights`` nights, the last ``processes * block_nights`` nights in blocks a quarter
    that size: the workers then finish at about the same time, and the archiving process, which takes the blocks in
    date order, has only a short block left to archive after them."""
    tail = min(len(nights), processes * block_nights) if processes > 1 else 0
    head, small = len(nights) - tail, max(1, block_nights // 4)
    return ([nights[i:min(i + block_nights, head)] for i in range(0, head, block_nights)]
            + [nights[i:i + small] for i in range(head, len(nights), small)])


@contextlib.contextmanager
def started_workers(processes: int) -> Iterator[cf.ProcessPoolExecutor | None]:
    """``processes`` worker processes for a backfill, started now: each loads the package while the caller goes
    on (the demo writes its data meanwhile), so the backfill's first block does not wait for them. None for one
    process. Stopped on leaving, however the caller ends."""
    if processes <= 1:
        yield None
        return
    context = mp.get_context("spawn")  # a clean interpreter: no inherited threads or open archive
    counter = context.Value("i", 0)
    cores = sorted(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else []
    pool = cf.ProcessPoolExecutor(max_workers=processes, mp_context=context, initializer=_start_worker,
                                  initargs=(cores, counter, logging.getLogger().getEffectiveLevel()))
    try:
        with _main_not_inherited():  # one call each starts every worker (it imports this module to run it)
            for _ in range(processes):
                pool.submit(_loaded)
        yield pool
    finally:
        pool.shutdown(wait=True, cancel_futures=True)


def _loaded() -> None:
    """A worker's first call: its start-up (imports, core) is all it does."""


def _prepared_elsewhere(config: JobConfig, nights: list[dt.date], processes: int, block_nights: int,
                        workers: cf.ProcessPoolExecutor | None = None) -> Iterator[ArchiveRows]:
    """Every night's archive rows in date order, computed by ``processes`` workers a block at a time (at most one block
    ahead of the workers is kept). Stops early at a night a worker could not compute, or if the workers are lost.
    With one process it yields nothing: every night is computed by the backfill's own process."""
    if processes <= 1:
        return
    blocks = night_blocks(nights, block_nights, processes)
    with contextlib.ExitStack() as stack:
        pool = workers if workers is not None else stack.enter_context(started_workers(processes))
        if pool is None:
            return
        yield from _in_order(config, blocks, pool, processes)


def _in_order(config: JobConfig, blocks: list[list[dt.date]], pool: cf.ProcessPoolExecutor,
              processes: int) -> Iterator[ArchiveRows]:
    """The blocks' archive rows in date order, ``processes`` blocks computed at a time and one more queued."""
    pending: collections.deque[cf.Future[list[ArchiveRows]]] = collections.deque()
    queued = 0
    with _main_not_inherited():  # workers not started yet start on these first submissions
        while queued < len(blocks) and len(pending) < processes + 1:
            pending.append(pool.submit(_prepare_block, config, blocks[queued]))
            queued += 1
    try:
        for block in blocks:
            try:
                done = pending.popleft().result()
            except cf.process.BrokenProcessPool:
                return
            if queued < len(blocks):
                pending.append(pool.submit(_prepare_block, config, blocks[queued]))
                queued += 1
            yield from done
            if len(done) < len(block):
                return
    finally:
        for future in pending:  # blocks no longer wanted (the range stopped early); workers of the caller's go on
            future.cancel()

