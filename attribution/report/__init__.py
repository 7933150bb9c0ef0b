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
import importlib
from collections.abc import Callable
from pathlib import Path

import duckdb

from attribution.config import JobConfig
from attribution.report.publish import write_atomically
from attribution.report.queries import TERM_COLUMNS, TOP_POSITIONS, NightFrames, ReportError, load_night
from attribution.report.settings import NightSettings, night_settings

__all__ = ["TERM_COLUMNS", "TOP_POSITIONS", "NightSettings", "ReportError", "load_night", "load_report",
           "night_settings", "publish_report", "render_night"]

# The package's page-making names, imported when first asked for (module ``__getattr__``): a night's run imports this
# package to read its figures inside the open transaction, and the rendering's modules (Jinja2, the views and
# charts: 25-37 ms) are imported by :func:`publish_report`, while the night's commit runs beside it, not before the
# reads.
_RENDERING = {"EXCEPTIONS_SHOWN": "html", "book_pages": "view", "file_name_for": "pages"}


def __getattr__(name: str) -> object:
    module = _RENDERING.get(name)
    if module is None:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    return getattr(importlib.import_module(f"{__name__}.{module}"), name)


def render_night(con: duckdb.DuckDBPyConnection, as_of: dt.date, reports_dir: Path, config: JobConfig) -> Path:
    """Write ``<reports_dir>/<as_of>/index.html``, ``exceptions.html`` and one page per book; return the index."""
    return publish_report(load_report(con, as_of, config), as_of, reports_dir, config)


def load_report(con: duckdb.DuckDBPyConnection, as_of: dt.date, config: JobConfig) -> NightFrames:
    """Everything the night's pages show, read from the archive (all of it: the pages need no query after)."""
    frames = load_night(con, as_of, config.history_nights, config.expiry_buckets)
    if not len(frames.books) and not len(frames.exceptions) and not len(frames.run):
        raise ReportError(f"archive: nothing archived for {as_of.isoformat()} (no run, no book, no exception)")
    return frames


def publish_report(frames: NightFrames, as_of: dt.date, reports_dir: Path, config: JobConfig,
                   before_moving: Callable[[], object] | None = None) -> Path:
    """Render the pages of ``frames`` (:func:`load_report`) and put them in place; return the index.

    ``before_moving`` is called once the files are written to their temporary folder, before it is moved into
    place: the engine waits there for the night's commit, so no page is published for a night not archived
    (if it raises, nothing is published and its error is raised).
    """
    from attribution.report.html import render_files
    from attribution.report.view import book_pages, conventions, night_view

    settings = night_settings(frames.run, config)  # the night's own settings, as its run record holds them
    pages = book_pages(frames, settings)
    night = night_view(frames, pages, as_of, conventions(frames, as_of, settings))
    target = Path(reports_dir) / as_of.isoformat()
    write_atomically(target, render_files(night, pages), before_moving)
    return target / "index.html"
