"""The settings a night ran with, read from its run record: a past night's page shows what was archived for it.

The run record (``runs.job_settings``) holds the job's settings of that night as JSON
(:meth:`attribution.config.JobConfig.as_record`). The report reads the time basis, holidays,
reporting currency and residual limits from there, so a page rendered later, under a job file
changed since, still shows the night as it ran. A record without a setting (an archive written
before the setting existed) falls back to the job's current value.
"""

from __future__ import annotations

import datetime as dt
import json
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import pandas as pd

from attribution.config import JobConfig


@dataclass(frozen=True, slots=True)
class NightSettings:
    """What the pages need of the night's settings."""

    time_basis: str
    holidays: tuple[dt.date, ...]
    reporting_currency: str
    revaluation: bool
    watch_fraction: float
    book_watch_fractions: Mapping[str, float]

    def watch_fraction_for(self, book: str) -> float:
        """The watch fraction of ``book``'s residual limit (its override, else the default)."""
        return self.book_watch_fractions.get(book, self.watch_fraction)


def _record(run: pd.DataFrame) -> dict[str, Any]:
    if not len(run):
        return {}
    text = run.iloc[0]["job_settings"]
    try:
        record = json.loads(text) if isinstance(text, str) and text else {}
    except json.JSONDecodeError:
        return {}
    return record if isinstance(record, dict) else {}


def _holidays(values: object, default: tuple[dt.date, ...]) -> tuple[dt.date, ...]:
    try:
        return tuple(dt.date.fromisoformat(str(v)) for v in values) if isinstance(values, list) else default
    except ValueError:
        return default


def _book_fractions(values: object, default: float) -> dict[str, float]:
    """``book_limits`` as archived: a list of [book, {limit settings}]."""
    out: dict[str, float] = {}
    for entry in values if isinstance(values, list) else []:
        if isinstance(entry, list) and len(entry) == 2 and isinstance(entry[1], dict):
            out[str(entry[0])] = float(entry[1].get("watch_fraction", default))
    return out


def night_settings(run: pd.DataFrame, config: JobConfig) -> NightSettings:
    """The night's settings from its run record (``run``: the night's ``runs`` row, or none), else the job's."""
    record = _record(run)
    limits = record.get("limits") if isinstance(record.get("limits"), dict) else {}
    watch = float(limits.get("watch_fraction", config.limits.watch_fraction))
    current = {book: x.watch_fraction for book, x in config.book_limits}
    return NightSettings(
        time_basis=str(record.get("time_basis") or config.time_basis),
        holidays=_holidays(record.get("holidays"), config.holidays),
        reporting_currency=str(record.get("reporting_currency") or config.reporting_currency),
        revaluation=bool(record.get("revaluation", config.revaluation)),
        watch_fraction=watch,
        book_watch_fractions=_book_fractions(record["book_limits"], watch) if "book_limits" in record else current,
    )
