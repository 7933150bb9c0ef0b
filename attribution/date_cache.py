"""One date's read, row rules and market state, shared by the two nights of a backfill that use it.

A backfill runs night N (prior date D0, run date D1) and then night N + 1 (prior D1, run D2): date D1
is read, checked and priced twice, once in each role. :class:`DateCache` keeps the last dates' work
and hands it back when it is provably the same computation:

* the files: the same date under the same data root, with the same (file, size, modification time,
  inode) of every contract file (:func:`attribution.loading.folder_stamp`), else the date is read again;
* the row rules of the holdings and market files (:func:`attribution.contract.clean_holdings`): the
  same frames read, the same check settings and reporting currency. The run date's event files
  (trade activity, cash flows, official P&L) are checked apart, on the run date only, as before;
* the market state (:func:`attribution.market.build_market` then the mark roll): the same clean
  tables (the very objects: a prior date restated for a split tonight is a new table, priced again),
  the same instrument terms (a date's own instruments plus the other date's that it no longer lists,
  so a night where the listing changed prices again), the same settings, and the same files on the
  earlier dates a missing mark may be rolled from.

Each piece of work keeps the exception rows it added to the ledger, and a reuse adds the same rows at
the same place, so each night's ``input_exceptions`` are what a fresh night writes. The rules that
depend on the role (the run date's events, stale marks against the day before, trade-date warnings,
the missing business days) are not cached. The arrays of a cached market are made read-only, so a
step that wrote into one would fail loudly instead of changing the next night.

The cache is an explicit object: a backfill makes one and passes it to each night; a single run
has none (no state outlives a night otherwise).
"""

from __future__ import annotations

import dataclasses
import datetime as dt
from collections.abc import Callable, Hashable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from attribution.config import CheckSettings
from attribution.contract import CleanNight, clean_holdings
from attribution.exceptions_log import ExceptionLog, LedgerRows
from attribution.loading import RawNight, available_dates, folder_stamp, read_night
from attribution.market import InstrumentMarket

Parts = tuple[LedgerRows, ...]


@dataclass(slots=True)
class _Date:
    """What was computed for one date, with what it was computed from."""

    data_root: Path
    stamp: tuple[tuple[str, int, int, int], ...]
    raw: RawNight
    held: CleanNight | None = None
    held_key: Hashable = None
    held_parts: Parts = ()
    market: InstrumentMarket | None = None
    market_key: Hashable = None
    market_inputs: tuple[object, ...] = ()
    market_terms: pd.DataFrame | None = None
    market_parts: Parts = ()


def _market_inputs(clean: CleanNight) -> tuple[object, ...]:
    """The parts of a clean date that :func:`attribution.market.build_market` reads."""
    return (clean.raw, clean.instruments, clean.marks, clean.underlyings, clean.curves, clean.dividends,
            clean.broken_schedules, clean.future_marks)


def _frozen(market: InstrumentMarket) -> InstrumentMarket:
    """The market with every array read-only (a shared market must not be written into)."""
    for f in dataclasses.fields(market):
        value = getattr(market, f.name)
        if isinstance(value, np.ndarray):
            value.flags.writeable = False
    return market


@dataclass(slots=True)
class DateCache:
    """The work on the last ``keep`` dates of a backfill; ``reused`` counts the stages handed back."""

    keep: int = 2
    reused: dict[str, int] = field(default_factory=lambda: {"read": 0, "validate": 0, "market": 0})
    _dates: dict[dt.date, _Date] = field(default_factory=dict)
    _listing: tuple[Path, tuple[int, int, int], list[dt.date]] | None = None

    def available_dates(self, data_root: Path) -> list[dt.date]:
        """:func:`attribution.loading.available_dates`, listed again only when the data folder changed
        (a folder added, removed or renamed changes its modification time and, added or removed, its
        link count)."""
        try:
            st = data_root.stat()
            changed = (st.st_mtime_ns, st.st_nlink, st.st_ino)  # a sub-folder added or removed changes the count
        except OSError:
            return available_dates(data_root)  # raises the usual message
        if self._listing is None or self._listing[:2] != (data_root, changed):
            self._listing = (data_root, changed, available_dates(data_root))
        return list(self._listing[2])

    def read(self, data_root: Path, as_of: dt.date) -> RawNight:
        """The date's files (:func:`attribution.loading.read_night`), read again when any of them changed."""
        stamp = folder_stamp(data_root, as_of)
        known = self._dates.get(as_of)
        if known is not None and known.data_root == data_root and known.stamp == stamp:
            self.reused["read"] += 1
            return known.raw
        raw = read_night(data_root, as_of)
        self._dates[as_of] = _Date(data_root, stamp, raw)
        for old in sorted(self._dates)[:-self.keep]:
            del self._dates[old]
        return raw

    def _entry(self, raw: RawNight) -> _Date | None:
        known = self._dates.get(raw.as_of)
        return known if known is not None and known.raw is raw else None

    def holdings(self, raw: RawNight, log: ExceptionLog, checks: CheckSettings,
                 reporting_currency: str) -> CleanNight:
        """:func:`attribution.contract.clean_holdings` of ``raw``, its exception rows added to ``log``."""
        known = self._entry(raw)
        key = (checks, reporting_currency)
        if known is not None and known.held is not None and known.held_key == key:
            self.reused["validate"] += 1
            log.extend(known.held_parts)
            return known.held
        mark = log.mark()
        held = clean_holdings(raw, log, checks, reporting_currency)
        if known is not None:
            known.held, known.held_key, known.held_parts = held, key, log.since(mark)
        return held

    def market(self, clean: CleanNight, terms: pd.DataFrame, key: Hashable, log: ExceptionLog,
               build: Callable[[], InstrumentMarket]) -> InstrumentMarket:
        """``build()`` (the date's market, marks rolled), or the market it gave for the same inputs.

        ``key`` holds every setting the build reads and the stamps of the earlier dates it may roll
        marks from; ``clean`` and ``terms`` are compared here.
        """
        known = self._entry(clean.raw)
        inputs = _market_inputs(clean)
        if (known is not None and known.market is not None and known.market_key == key
                and all(a is b for a, b in zip(inputs, known.market_inputs, strict=True))
                and known.market_terms is not None
                and (known.market_terms is terms or known.market_terms.equals(terms))):
            self.reused["market"] += 1
            log.extend(known.market_parts)
            return known.market
        mark = log.mark()
        market = build()
        if known is not None:
            known.market, known.market_key, known.market_inputs = _frozen(market), key, inputs
            known.market_terms, known.market_parts = terms, log.since(mark)
        return market
