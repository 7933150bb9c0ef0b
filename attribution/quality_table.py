"""The attribution-quality test as a table: archived nights in, one ``book_quality`` row per book out.

The statistics are :mod:`attribution.quality` (pure numpy); this module is their edge to frames:
:func:`nightly_series` sums the archived positions into HPL and RTPL per book and night, and
:func:`quality_frame` lays a book's latest nights side by side and returns the archive's columns.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd

from attribution.quality import HELD_OVERNIGHT, quality_test
from attribution.schema import BOOK_QUALITY


def _checked_series(series: pd.DataFrame) -> pd.DataFrame:
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


def quality_frame(series: pd.DataFrame, as_of_date: dt.date | str | pd.Timestamp,
                  window: int = 250, recent: int = 60) -> pd.DataFrame:
    """The quality test as a table with the columns of ``schema.BOOK_QUALITY``, one row per book.

    ``series`` has one row per book and archived night (columns ``as_of, book, hpl, rtpl``, see
    :func:`nightly_series`). Only nights <= ``as_of_date`` count, the latest ``window`` per book;
    a book with no night up to that date has no row. ``as_of`` of every row is ``as_of_date``.
    """
    frame = _checked_series(series)
    as_of = pd.Timestamp(as_of_date)
    used = frame[frame["as_of"] <= as_of].sort_values(["book", "as_of"], kind="stable")
    from_end = used.groupby("book", sort=False).cumcount(ascending=False).to_numpy()
    used, from_end = used[from_end < window], from_end[from_end < window]
    codes, books = pd.factorize(used["book"], sort=True)
    hpl = np.full((len(books), window), np.nan)
    rtpl = np.full((len(books), window), np.nan)
    hpl[codes, window - 1 - from_end] = used["hpl"].to_numpy(float)
    rtpl[codes, window - 1 - from_end] = used["rtpl"].to_numpy(float)
    res = quality_test(hpl, rtpl, window=window, recent=recent)
    columns = {
        "as_of": [as_of.date()] * len(books), "book": np.asarray(books, dtype=object),
        "nights": res.nights, "provisional": res.provisional, "spearman": res.spearman, "ks": res.ks,
        "zone": res.zone, "mean_ratio": res.mean_ratio, "variance_ratio": res.variance_ratio,
        "spearman_60": res.spearman_60, "ks_60": res.ks_60, "zone_60": res.zone_60,
        "early_warning": res.early_warning,
    }
    return pd.DataFrame({name: columns[name] for name, _ in BOOK_QUALITY})


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
