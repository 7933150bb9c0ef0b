"""Running a range of nights in order, with one progress display and one closing line."""

from __future__ import annotations

import dataclasses
import datetime as dt
from collections.abc import Callable

from attribution.config import JobConfig
from attribution.console import ProgressLine, summary
from attribution.date_cache import DateCache
from attribution.engine import EXIT_FINDINGS, EXIT_OK, NightOutcome, open_archive
from attribution.loading import InputFileError, available_dates
from attribution.runner import cluster, run_night


def nights_between(config: JobConfig, start: dt.date, end: dt.date) -> list[dt.date]:
    """Run dates with a data folder in [start, end] that have an earlier folder to serve as prior."""
    if end < start:
        raise InputFileError(f"--from {start} is after --to {end}")
    dates = available_dates(config.data_root)
    return [d for d in dates if start <= d <= end and d > dates[0]]


def backfill(config: JobConfig, start: dt.date, end: dt.date, reports_last: int = 1,
             echo: Callable[[str], None] = print) -> int:
    """Run every night of the range; stops at the first failed night. Returns the exit code."""
    nights = nights_between(config, start, end)
    if not nights:
        raise InputFileError(f"{config.data_root}: no run date between {start} and {end} with a prior folder")
    progress = ProgressLine(len(nights))
    outcomes: list[NightOutcome] = []
    # The archive is held for the whole range (no other run slips in between nights), and with
    # engine = "dask" one cluster serves every night. Each date's reading, row rules and market state
    # serve both nights that use it (as run date, then as the next night's prior): one cache per range.
    shared = DateCache()
    with open_archive(config) as session, cluster(config) as client:
        for k, night in enumerate(nights):
            with_reports = config.write_reports and (reports_last < 0 or k >= len(nights) - reports_last)
            outcomes.append(run_night(dataclasses.replace(config, write_reports=with_reports), night,
                                      session=session, client=client, cache=shared))
            progress.step(str(night))
    progress.close()
    last = outcomes[-1]
    echo(summary(last, config))
    findings = sum(o.exit_code == EXIT_FINDINGS for o in outcomes)
    echo(f"Backfilled {len(outcomes)} night(s) {nights[0]} .. {nights[-1]}; "
         f"{findings} with rejected rows or limit breaches.")
    return EXIT_FINDINGS if findings else EXIT_OK
