"""What the pages show: frozen view types, built by :mod:`attribution.report.view`, read by the templates."""

from __future__ import annotations

import datetime as dt
import hashlib
import re
from collections.abc import Mapping
from dataclasses import dataclass

import markupsafe

from attribution.report import charts

_MAX_SLUG = 48


@dataclass(frozen=True, slots=True)
class State:
    """A state shown as a coloured mark and always with its word: ``tone`` is ok/watch/alert/none."""

    code: str
    tone: str
    word: str


@dataclass(frozen=True, slots=True)
class BookSummary:
    """One row of the index."""

    name: str
    file_name: str
    total: float
    actual: float
    explained: float
    residual: float
    residual_share: float | None
    limit: State
    zone: State
    exceptions: int
    position_breaches: int
    official_break: float | None = None  # official P&L - total (official_pnl.parquet); None without a row
    desk: str = ""
    desk_file: str = ""
    total_mtd: float | None = None
    total_ytd: float | None = None
    residual_mtd: float | None = None
    residual_ytd: float | None = None


@dataclass(frozen=True, slots=True)
class DeskSummary:
    """A desk on the index and its own page: the sums of its books (every column books have) and its books."""

    name: str
    file_name: str
    books: tuple[BookSummary, ...]
    total: float
    actual: float
    explained: float
    residual: float
    residual_share: float | None
    limit: State             # the worst limit state of its books
    zone: State              # the worst quality zone of its books
    breaches: int            # books in breach
    watches: int             # books on watch
    exceptions: int
    position_breaches: int
    total_mtd: float | None
    total_ytd: float | None
    residual_mtd: float | None
    residual_ytd: float | None
    official_break: float | None
    to_date: tuple[FigureRow, ...] = ()   # the night, month and year to date per term


@dataclass(frozen=True, slots=True)
class Rows:
    """Table rows already in HTML (text escaped, numbers formatted; built by :mod:`~attribution.report.tables`)
    and how many there are: a template places them whole, tests its truth and length."""

    html: markupsafe.Markup
    count: int

    def __len__(self) -> int:
        return self.count

    def __html__(self) -> markupsafe.Markup:
        return self.html


NO_ROWS = Rows(markupsafe.Markup(""), 0)


@dataclass(frozen=True, slots=True)
class FigureRow:
    """A labelled row of amounts in a fixed column order, plus small text cells."""

    label: str
    cells: tuple[str, ...]
    values: tuple[float | None, ...]


@dataclass(frozen=True, slots=True)
class MethodRow:
    """One factor of the two methods side by side."""

    key: str
    label: str
    taylor_terms: str
    taylor: float | None
    revaluation: float | None
    difference: float | None
    bar: charts.PairBar


@dataclass(frozen=True, slots=True)
class Quality:
    """The attribution-quality figures of a book on the night (None when not yet computed)."""

    zone: State
    nights: int
    provisional: bool
    spearman: float | None
    ks: float | None
    mean_ratio: float | None
    variance_ratio: float | None
    zone_60: State
    spearman_60: float | None
    ks_60: float | None
    early_warning: str


@dataclass(frozen=True, slots=True)
class ExceptionRow:
    """An input exception, with the books it touches (index page) or empty (book page)."""

    file: str
    key: str
    rule: str
    detail: str
    severity: str
    books: tuple[str, ...]


@dataclass(frozen=True, slots=True)
class Conventions:
    """What the figures assume, in words for the page footer."""

    time_basis: str
    time_basis_words: str
    reporting_currency: str
    prior_as_of: dt.date | None
    calendar_days: int | None
    year_fraction: float | None
    next_business_day: dt.date
    revaluation_on: bool


@dataclass(frozen=True, slots=True)
class BookPage:
    """Everything one book page shows."""

    summary: BookSummary
    figures: Mapping[str, float | None]
    counts: Mapping[str, int]
    limit_text: str
    waterfall: charts.Waterfall
    methods: tuple[MethodRow, ...]
    method_total: MethodRow
    underlyings: Rows        # by underlying: positions, TERM_COLUMNS (the unpriced count beside new trades)
    exposures: Rows          # by underlying: EXPOSURE_COLUMNS
    positions: Rows          # the top positions by absolute residual
    unpriced: tuple[FigureRow, ...]
    history_lines: charts.LineChart | None
    history_residual: charts.LineChart | None
    quality: Quality | None
    exceptions: tuple[ExceptionRow, ...]
    exception_rules: tuple[tuple[str, str, int], ...]
    vol_parts: Rows = NO_ROWS   # by expiry bucket: label, positions, VOL_PART_COLUMNS; then the total row
    dividend_schedule: tuple[FigureRow, ...] = ()  # underlying; (currency, next ex-date, count, last ex-date);
    #                                                (next amount, its present value, present value of all)
    ex_dates: tuple[FigureRow, ...] = ()           # underlying; (currency, positions); (amount, delta, dividend
    #                                                term, cash dividends, residual, total)
    hedging: Rows = NO_ROWS        # per underlying: options, hedges, book (queries.HEDGING_VALUES)
    hedge_waterfall: charts.Waterfall | None = None  # options, hedges and cash to the total
    currencies: Rows = NO_ROWS  # FX exposure: run-date value per premium currency (CURRENCY_VALUES)
    to_date: Rows = NO_ROWS     # per term: night, month to date, year to date
    breaches_to_date: tuple[int, int] = (0, 0)   # nights in breach this month, this year
    strategies: Rows = NO_ROWS  # label, positions, STRATEGY_COLUMNS
    exposure_changes: Rows = NO_ROWS  # underlying, EXPOSURE_CHANGE_COLUMNS
    previous_as_of: dt.date | None = None   # the archived night the exposures are compared with



@dataclass(frozen=True, slots=True)
class NightView:
    """Everything the index and the exceptions page show."""

    as_of: dt.date
    conventions: Conventions
    books: tuple[BookSummary, ...]
    totals: Mapping[str, float]
    run: Mapping[str, str]
    exceptions: tuple[ExceptionRow, ...]
    severity_counts: tuple[tuple[str, int], ...]
    rule_counts: tuple[tuple[str, str, int], ...]
    desks: tuple[DeskSummary, ...] = ()


def file_name_for(book: str, kind: str = "book") -> str:
    """A safe, unique, bounded file name for a book (or desk) page: ``book-<slug>-<hash>.html``.

    The slug keeps ASCII letters, digits, ``-`` and ``_`` (anything else becomes ``-``), so no
    path separator or ``..`` survives; the hash of the full name keeps distinct names distinct.
    """
    slug = re.sub(r"[^A-Za-z0-9_-]+", "-", book).strip("-_")[:_MAX_SLUG] or kind
    digest = hashlib.sha256(book.encode("utf-8")).hexdigest()[:12]
    return f"{kind}-{slug}-{digest}.html"
