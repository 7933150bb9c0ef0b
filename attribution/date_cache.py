"""One date's read, row rules and market state, shared by the two nights of a backfill that use it.

A backfill runs night N (prior date D0, run date D1) and then night N + 1 (prior D1, run D2): date D1
is read, checked and priced twice, once in each role. :class:`DateCache` keeps the last dates' work
and hands it back when it is provably the same computation:

* the files: the same date under the same data root, with the same (file, size, modification time,
  inode) of every contract file (:func:`attribution.loading.folder_stamp`), else the date is read again;
* the row rules of the holdings and market files (:func:`attribution.contract.clean_holdings`): the
  same frames read, the same check settings and reporting currency. The run date's event files
  (trade activity, cash flows, official P&L) are checked apart, on the run date only, as before;
* the market state (:func:`attribution.market.build_market` then the mark roll) of the date's own
  instruments: the same clean tables (the very objects: a prior date restated for a split tonight is a
  new table, priced again), the same settings, and the same files on the earlier dates a missing mark
  may be rolled from. A night's market also holds the other date's instruments that this one no longer
  lists (they differ between the date's two nights when the listing changed): those are priced on
  their own and appended when that is provably the market a whole build gives (see
  :meth:`DateCache.market`), and the whole market is built again otherwise.

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
    market: InstrumentMarket | None = None  # the date's own instruments' market (see DateCache.market)
    market_key: Hashable = None
    market_inputs: tuple[object, ...] = ()
    market_parts: Parts = ()
    market_none: Parts | None = None  # the ledger rows of a build over no instrument (see DateCache.market)


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
               build: Callable[[pd.DataFrame, ExceptionLog], InstrumentMarket]) -> InstrumentMarket:
        """``build(terms, log)`` (the date's market, marks rolled, its exception rows added to ``log``), or the
        same market made from the date's own instruments' market, built once per date.

        ``terms`` are the date's own instruments (``clean.instruments``), then those of the other date that
        this one no longer lists (:func:`attribution.market.instrument_terms`): they differ between the date's
        two nights when an instrument is listed or dropped. The own instruments' market is kept; the other
        rows are priced on their own and appended. That is the market a build over ``terms`` gives, ledger
        included, when pricing the other rows alone finds no more than a build over no instrument at all (the
        rows of the date's files that no instrument matches, such as a future mark of no future): each
        instrument's state depends on its own row alone, the other rows then add no ledger row of their own
        and match no file row that the own instruments leave unmatched, so the build's ledger rows are those
        of the own instruments, in their order. Otherwise (or when ``terms`` do not start with the date's own
        instruments) ``terms`` are built whole, as a single run does.

        ``key`` holds every setting the build reads and the stamps of the earlier dates it may roll
        marks from; ``clean`` is compared here.
        """
        known = self._entry(clean.raw)
        extra = _extra_terms(terms, clean.instruments)
        if known is None or extra is None:
            return build(terms, log)
        inputs = _market_inputs(clean)
        if (known.market is not None and known.market_key == key
                and all(a is b for a, b in zip(inputs, known.market_inputs, strict=True))):
            self.reused["market"] += 1
        else:
            own_log = ExceptionLog(log.as_of)
            known.market = _frozen(build(clean.instruments, own_log))
            known.market_key, known.market_inputs, known.market_parts = key, inputs, own_log.since(0)
            known.market_none = None
        if not len(extra):
            log.extend(known.market_parts)
            return known.market
        extra_log = ExceptionLog(log.as_of)
        appended = _appended(known.market, build(extra, extra_log), terms.index)
        if known.market_none is None:  # what a build of no instrument finds: rows of the date's files alone
            none_log = ExceptionLog(log.as_of)
            build(extra.iloc[:0], none_log)
            known.market_none = none_log.since(0)
        if appended is None or not _same_rows(extra_log.since(0), known.market_none):
            return build(terms, log)  # the other rows found something of their own: the whole build, in its order
        log.extend(known.market_parts)
        return appended


def _same_rows(a: Parts, b: Parts) -> bool:
    """Whether two runs of ledger rows are the same rows in the same order."""
    return len(a) == len(b) and all(
        (x.file, x.rule, x.severity) == (y.file, y.rule, y.severity) and np.array_equal(x.key, y.key)
        and np.array_equal(x.detail, y.detail) and np.array_equal(x.keyless, y.keyless)
        for x, y in zip(a, b, strict=True))


def _extra_terms(terms: pd.DataFrame, own: pd.DataFrame) -> pd.DataFrame | None:
    """The rows of ``terms`` after the date's own instruments ``own`` (none when ``terms`` is ``own``); None when
    ``terms`` do not start with exactly ``own``'s rows (same labels, columns, types and values)."""
    if terms is own:
        return terms.iloc[:0]
    n = len(own)
    if len(terms) <= n or not terms.iloc[:n].equals(own) or not terms.index[:n].equals(own.index):
        return None
    return terms.iloc[n:]


def _appended(own: InstrumentMarket, other: InstrumentMarket, ids: pd.Index) -> InstrumentMarket | None:
    """``own``'s instruments followed by ``other``'s, labelled ``ids``: each array joined end to end (a rolled-mark
    flag that one side lacks is False there, as a build over both rows gives). None when the two differ in a
    setting or one lacks another array."""
    values: dict[str, object] = {"ids": ids}
    for f in dataclasses.fields(InstrumentMarket):
        a, b = getattr(own, f.name), getattr(other, f.name)
        if f.name == "ids":
            continue
        if f.name == "mark_rolled" and (a is None) != (b is None):
            a = np.zeros(len(own.ids), dtype=bool) if a is None else a
            b = np.zeros(len(other.ids), dtype=bool) if b is None else b
        if isinstance(a, np.ndarray) and isinstance(b, np.ndarray):
            values[f.name] = np.concatenate([a, b])
        elif a is None and b is None or not isinstance(a, np.ndarray) and not isinstance(b, np.ndarray) and a == b:
            values[f.name] = a
        else:
            return None
    return InstrumentMarket(**values)  # type: ignore[arg-type]
