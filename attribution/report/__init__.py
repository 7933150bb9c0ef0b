"""The nightly HTML explanation report: an index and one page per book, read from the archive.

The flow is one way, one module per step: :mod:`~attribution.report.queries` loads the night's
figures with a handful of set-based queries (every value passed as a parameter);
:mod:`~attribution.report.view` groups them by book in pandas and lays out the charts
(:mod:`~attribution.report.charts`) into the frozen view types of :mod:`~attribution.report.pages`;
:mod:`~attribution.report.html` renders the Jinja2 templates of ``attribution/report/templates``
with autoescaping on; :mod:`~attribution.report.publish` writes the files. Pages are
self-contained (inline CSS and SVG, no script, nothing fetched) and printable. All files of a night
are written to a temporary folder beside the target and moved into place at the end, so a reader
never sees a half-written night.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import duckdb

from attribution.config import JobConfig
from attribution.report.html import EXCEPTIONS_SHOWN, render_files
from attribution.report.pages import file_name_for
from attribution.report.publish import write_atomically
from attribution.report.queries import TERM_COLUMNS, TOP_POSITIONS, ReportError, load_night
from attribution.report.settings import NightSettings, night_settings
from attribution.report.view import book_pages, conventions, night_view

__all__ = ["EXCEPTIONS_SHOWN", "TERM_COLUMNS", "TOP_POSITIONS", "NightSettings", "ReportError", "book_pages",
           "file_name_for", "load_night", "night_settings", "render_night"]


def render_night(con: duckdb.DuckDBPyConnection, as_of: dt.date, reports_dir: Path, config: JobConfig) -> Path:
    """Write ``<reports_dir>/<as_of>/index.html``, ``exceptions.html`` and one page per book; return the index."""
    frames = load_night(con, as_of, config.history_nights, config.expiry_buckets)
    if not len(frames.books) and not len(frames.exceptions) and not len(frames.run):
        raise ReportError(f"archive: nothing archived for {as_of.isoformat()} (no run, no book, no exception)")
    settings = night_settings(frames.run, config)  # the night's own settings, as its run record holds them
    pages = book_pages(frames, settings)
    night = night_view(frames, pages, as_of, conventions(frames, as_of, settings))
    target = Path(reports_dir) / as_of.isoformat()
    write_atomically(target, render_files(night, pages))
    return target / "index.html"
