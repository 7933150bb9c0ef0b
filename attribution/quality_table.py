"""The attribution-quality test as a table: archived nights in, one ``book_quality`` row per book out.

The statistics are :mod:`attribution.quality` (pure numpy); this module is their edge to frames:
:func:`nightly_series` sums the archived positions into HPL and RTPL per book and night, and
:func:`quality_frame` lays a book's latest nights side by side and returns the archive's columns.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass

import numpy as np
import pandas as pd

from attribution.quality import HELD_OVERNIGHT, quality_test
from attribution.schema import BOOK_QUALITY


def _checked_series(series: pd.DataFrame) -> pd.DataFrame:
    """The series' four columns with ``as_of`` as datetimes; raises naming the first bad row and its rule."""
    missing = [c for c in ("as_of", "book", "hpl", "rtpl") if c not in series.columns]
    if missing:
        raise ValueError(f"quality series: missing column(s) {missing} (rule: columns as_of, book, hpl, rtpl)")
    frame = series[["as_of", "book", "hpl", "rtpl"]].copy()
    try:
        frame["as_of"] = pd.to_datetime(frame["as_of"])
    except (ValueError, TypeError) as exc:
        raise ValueError(f"quality series: as_of not readable as a date ({exc})") from exc
    rules = (
        (frame["as_of"].isna() | frame["book"].isna(), "as_of and book are required"),
        (~np.isfinite(frame["hpl"].to_numpy(float)) | ~np.isfinite(frame["rtpl"].to_numpy(float)),
         "hpl and rtpl must be finite"),
        (frame.duplicated(["book", "as_of"], keep=False).to_numpy(), "one row per book and night"),
    )
    for bad, rule in rules:
        if np.asarray(bad).any():
            row = frame[np.asarray(bad)].iloc[0]
            raise ValueError(f"quality series, book {row['book']!r}, as_of {row['as_of']}: rule: {rule}")
    return frame


@dataclass(frozen=True, slots=True)
class SeriesArrays:
    """A quality series as its columns: ``as_of`` (datetime64), ``book`` (objects), ``hpl`` and ``rtpl`` (float64);
    the archive's session hands its history over so (a frame of them costs more than the test itself)."""

    as_of: np.ndarray
    book: np.ndarray
    hpl: np.ndarray
    rtpl: np.ndarray

    def frame(self) -> pd.DataFrame:
        """The series as a frame (the books as objects, as given)."""
        return pd.DataFrame({"as_of": self.as_of, "book": pd.Series(self.book, dtype=object), "hpl": self.hpl,
                             "rtpl": self.rtpl})


def _series_arrays(series: pd.DataFrame | SeriesArrays) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """``as_of`` (datetime64), ``book`` (objects), ``hpl`` and ``rtpl`` of a series that keeps every rule of
    :func:`_checked_series`; a series that breaks one is handed to it, so the error names the same row and rule.

    The checks are numpy over whole columns: the engine calls this every night on the whole history.
    """
    if isinstance(series, SeriesArrays):
        checked = (series.as_of, series.book, series.hpl, series.rtpl)
        if (np.isnat(series.as_of) | pd.isna(series.book) | ~np.isfinite(series.hpl) | ~np.isfinite(series.rtpl)).any():
            _checked_series(series.frame())
        return checked
    if any(c not in series.columns for c in ("as_of", "book", "hpl", "rtpl")):
        _checked_series(series)
    as_of = series["as_of"]
    dates = as_of.to_numpy() if as_of.dtype.kind == "M" and getattr(as_of.dtype, "tz", None) is None else None
    if dates is None:
        dates = _checked_series(series)["as_of"].to_numpy()
    books = series["book"].to_numpy(dtype=object)
    hpl, rtpl = series["hpl"].to_numpy(dtype=float), series["rtpl"].to_numpy(dtype=float)
    bad = np.isnat(dates) | pd.isna(books) | ~np.isfinite(hpl) | ~np.isfinite(rtpl)
    if bad.any():
        _checked_series(series)
    return dates, books, hpl, rtpl


def quality_frame(series: pd.DataFrame, as_of_date: dt.date | str | pd.Timestamp,
                  window: int = 250, recent: int = 60) -> pd.DataFrame:
    """The quality test as a table with the columns of ``schema.BOOK_QUALITY``, one row per book.

    ``series`` has one row per book and archived night (columns ``as_of, book, hpl, rtpl``, see
    :func:`nightly_series`). Only nights <= ``as_of_date`` count, the latest ``window`` per book;
    a book with no night up to that date has no row. ``as_of`` of every row is ``as_of_date``.
    """
    return pd.DataFrame(quality_columns(series, as_of_date, window, recent))


def quality_columns(series: pd.DataFrame | SeriesArrays, as_of_date: dt.date | str | pd.Timestamp,
                    window: int = 250, recent: int = 60) -> dict[str, np.ndarray]:
    """The columns of :func:`quality_frame` as arrays, by name in the order of ``schema.BOOK_QUALITY`` (the
    archive takes them as they are: no frame between)."""
    dates, books_all, hpl_all, rtpl_all = _series_arrays(series)
    # Books in sorted order (as pandas' sorted factorize), each book's nights oldest first.
    names, codes_all = np.unique(books_all, return_inverse=True) if len(books_all) else (
        np.empty(0, dtype=object), np.empty(0, dtype=np.int64))
    order = np.lexsort((dates, codes_all))
    sorted_codes, sorted_dates = codes_all[order], dates[order]
    if ((sorted_codes[1:] == sorted_codes[:-1]) & (sorted_dates[1:] == sorted_dates[:-1])).any():
        _checked_series(series.frame() if isinstance(series, SeriesArrays) else series)  # raises: two rows of a night
    as_of = pd.Timestamp(as_of_date)
    used = order[sorted_dates <= as_of.to_datetime64()]
    codes = codes_all[used]
    counts = np.bincount(codes, minlength=len(names))
    first = np.concatenate(([0], np.cumsum(counts)[:-1]))
    from_end = counts[codes] - 1 - (np.arange(len(used)) - first[codes])  # 0 = the book's latest night
    keep = from_end < window
    used, codes, from_end = used[keep], codes[keep], from_end[keep]
    present = np.flatnonzero(counts)           # books with at least one night up to the date
    rows = np.searchsorted(present, codes)
    books = names[present]
    hpl = np.full((len(books), window), np.nan)
    rtpl = np.full((len(books), window), np.nan)
    hpl[rows, window - 1 - from_end] = hpl_all[used]
    rtpl[rows, window - 1 - from_end] = rtpl_all[used]
    res = quality_test(hpl, rtpl, window=window, recent=recent)
    columns = {
        "as_of": np.array([as_of.date()] * len(books), dtype=object), "book": np.asarray(books, dtype=object),
        "nights": res.nights, "provisional": res.provisional, "spearman": res.spearman, "ks": res.ks,
        "zone": res.zone, "mean_ratio": res.mean_ratio, "variance_ratio": res.variance_ratio,
        "spearman_60": res.spearman_60, "ks_60": res.ks_60, "zone_60": res.zone_60,
        "early_warning": res.early_warning,
    }
    return {name: columns[name] for name, _ in BOOK_QUALITY}


def nightly_series(position_pnl: pd.DataFrame) -> pd.DataFrame:
    """HPL and RTPL per book and night from archived ``position_pnl`` rows (columns ``as_of, book, hpl, rtpl``).

    Sums ``pnl_actual`` (HPL) and ``pnl_explained`` (RTPL) over rows whose status is ``carried``
    or ``closed``. A book has a night only when it held at least one position over it. Same as
    ``SELECT as_of, book, sum(pnl_actual) AS hpl, sum(pnl_explained) AS rtpl FROM position_pnl
    WHERE status IN ('carried', 'closed') GROUP BY as_of, book``.
    """
    needed = ["as_of", "book", "status", "pnl_actual", "pnl_explained"]
    missing = [c for c in needed if c not in position_pnl.columns]
    if missing:
        raise ValueError(f"position_pnl: missing column(s) {missing} for the quality series")
    held = position_pnl.loc[position_pnl["status"].isin(HELD_OVERNIGHT).to_numpy(), needed]
    bad = ~(np.isfinite(held["pnl_actual"].to_numpy(float)) & np.isfinite(held["pnl_explained"].to_numpy(float)))
    if bad.any():
        row = position_pnl.loc[held.index[bad][0]]
        key = row["trade_id"] if "trade_id" in position_pnl.columns else held.index[bad][0]
        raise ValueError(f"position_pnl, as_of {row['as_of']}, book {row['book']!r}, key {key!r}: "
                         "rule: pnl_actual and pnl_explained must be finite for positions held overnight")
    sums = held.groupby(["as_of", "book"], sort=True)[["pnl_actual", "pnl_explained"]].sum().reset_index()
    return sums.rename(columns={"pnl_actual": "hpl", "pnl_explained": "rtpl"})
