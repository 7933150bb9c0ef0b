"""Names from the data cannot attack readers of the reports, the file system or the archive.

Every hostile name below is used as a book, a trade, an instrument and an underlying (rotated so
each plays every role), written into contract files and run through ``attribution run`` end to
end. Checks: the run completes; no page holds a script, an image or an event-handler attribute
(parsed with the standard library's html.parser), while each name is shown as text; every file
the run writes is inside the reports folder (or is the archive and its lock) and has a bounded
name; the archive stores each name verbatim and a name made of SQL drops nothing.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import os
import re
from dataclasses import dataclass
from html.parser import HTMLParser
from pathlib import Path

import duckdb
import numpy as np
import pytest

from attribution.cli import main
from attribution.schema import TABLES
from tests.contract_files import write_folder
from tests.synthetic_night import bsm_price

PRIOR, RUN = dt.date(2026, 11, 27), dt.date(2026, 11, 30)   # Friday, Monday
EXPIRY = dt.date(2027, 6, 18)
SQL_NAME = "x'; DROP TABLE position_pnl; --"
LONG_NAME = "long-" + "L" * 4995
HOSTILE = (
    "<script>alert(1)</script>",
    '"><img src=x onerror=alert(1)>',
    "../../x",
    "..",
    "/etc/passwd",
    "ctl\x01\x02\x07\x08\x0b\x0c\x1b[31m\x7f\x9f end",   # control characters, no NUL
    "it's \"quoted\" `back` 'single' &amp;",
    SQL_NAME,
    LONG_NAME,
)
PRINTABLE = tuple(n for n in HOSTILE if n.isprintable() and n != LONG_NAME)
# A position in an instrument that does not exist, so hostile text also reaches the exception ledger.
REJECTED_TRADE, MISSING_INSTRUMENT = "<svg onload=alert(2)>", '"><script>alert(3)</script>'
N = len(HOSTILE)


def role(k: int, shift: int) -> str:
    """The name playing a role for position k: underlying (0), instrument (1), trade (2), book (3)."""
    return HOSTILE[(k + shift) % N]


def write_hostile_desk(data: Path) -> None:
    """Two nights of one call per hostile underlying, held in a hostile book under a hostile trade id."""
    strike = np.full(N, 100.0)
    for as_of, spot, vol in ((PRIOR, 100.0, 0.20), (RUN, 101.0, 0.21)):
        tau = np.full(N, (EXPIRY - as_of).days / 365.0)
        price = bsm_price(np.full(N, spot), strike, tau, np.full(N, vol), 0.03, np.zeros(N), np.ones(N, bool))
        positions = [{"trade_id": role(k, 2), "book": role(k, 3), "instrument_id": role(k, 1), "quantity": 10.0,
                      "trade_date": PRIOR, "trade_price": None} for k in range(N)]
        if as_of == RUN:
            positions.append({"trade_id": REJECTED_TRADE, "book": HOSTILE[0], "instrument_id": MISSING_INSTRUMENT,
                              "quantity": 1.0, "trade_date": RUN, "trade_price": 1.0})
        write_folder(data, as_of, {
            "positions": positions,
            "instruments": [{"instrument_id": role(k, 1), "underlying": role(k, 0), "option_type": "call",
                             "exercise": "european", "strike": 100.0, "expiry": EXPIRY, "multiplier": 100.0,
                             "currency": "USD"} for k in range(N)],
            "option_marks": [{"instrument_id": role(k, 1), "price": float(price[k]), "implied_vol": vol}
                             for k in range(N)],
            "underlying_marks": [{"underlying": role(k, 0), "spot": spot, "dividend_yield": 0.0} for k in range(N)],
            "rate_curves": [{"currency": "USD", "tenor_years": 1.0, "zero_rate": 0.03}],
            "fx_rates": [{"currency": "USD", "rate": 1.0}],
        })


class PageParse(HTMLParser):
    """Tags, attribute names and text of one page."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tags: set[str] = set()
        self.attributes: set[str] = set()
        self.text: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.add(tag)
        self.attributes.update(name for name, _ in attrs)

    def handle_data(self, data: str) -> None:
        self.text.append(data)


def parse(page: str) -> PageParse:
    """The page parsed with html.parser."""
    parser = PageParse()
    parser.feed(page)
    parser.close()
    return parser


def tree(root: Path) -> dict[str, tuple[int, int]]:
    """Every file below ``root`` with its size and modification time."""
    return {str(p.relative_to(root)): (p.stat().st_size, p.stat().st_mtime_ns)
            for p in root.rglob("*") if p.is_file() or p.is_symlink()}


@dataclass(frozen=True, slots=True)
class HostileRun:
    """What the run left: its exit code, the folders, and the file trees before and after."""

    exit_code: int
    root: Path
    work: Path
    before: dict[str, tuple[int, int]]
    after: dict[str, tuple[int, int]]
    outside_before: list[str]
    outside_after: list[str]
    passwd_before: os.stat_result
    pages: dict[str, str]


@pytest.fixture(scope="module")
def hostile(tmp_path_factory: pytest.TempPathFactory) -> HostileRun:
    """The hostile desk run once through ``attribution run`` (working folder ``work``, relative paths)."""
    root = tmp_path_factory.mktemp("hostile")
    write_hostile_desk(root / "data")
    work = root / "work"
    work.mkdir()
    before, outside_before = tree(root), sorted(os.listdir(root.parent))
    passwd = os.stat("/etc/passwd")
    with contextlib.chdir(work):
        code = main(["run", "--as-of", RUN.isoformat(), "--data", str(root / "data"), "--archive", "archive.duckdb",
                     "--reports", "reports"])
    pages = {str(p.relative_to(work / "reports")): p.read_text(encoding="utf-8")
             for p in (work / "reports").rglob("*.html")}
    return HostileRun(code, root, work, before, tree(root), outside_before, sorted(os.listdir(root.parent)),
                      passwd, pages)


def test_run_with_hostile_names_completes(hostile):
    """The night runs to its end (exit 3: the one position in a missing instrument is rejected)."""
    assert hostile.exit_code == 3
    assert len(hostile.pages) == N + 3  # index, exceptions, one page per book, the desk (unassigned)


def test_no_page_carries_markup_from_the_data(hostile):
    """No page has a script, image, frame or on* attribute, nor raw '<script' or '<img'; 'onerror=' only escaped."""
    for name, page in hostile.pages.items():
        lowered = page.lower()
        assert "<script" not in lowered and "<img" not in lowered and "<svg onload" not in lowered, name
        parsed = parse(page)
        assert not parsed.tags & {"script", "img", "iframe", "object", "embed", "base", "form"}, name
        assert not {a for a in parsed.attributes if a.startswith("on")}, (name, parsed.attributes)
        for hit in re.finditer("onerror=", page):  # only ever the escaped hostile name, as text
            assert page[:hit.start()].endswith("&lt;img src=x "), (name, page[hit.start() - 40:hit.end()])


def test_every_name_is_shown_as_text(hostile):
    """Each printable hostile name reaches the pages as text (escaped, not dropped); the long one at least begun."""
    text = "\n".join("".join(parse(page).text) for page in hostile.pages.values())
    for name in (*PRINTABLE, REJECTED_TRADE):
        assert name in text, name
    assert LONG_NAME[:40] in text


def test_every_written_file_stays_inside_the_reports_folder(hostile):
    """New files are the archive, its lock and the report pages; nothing lands beside or above; data unchanged."""
    new = {p for p in hostile.after if p not in hostile.before}
    outside = {p for p in new if not p.startswith("work/reports/")}
    assert outside <= {"work/archive.duckdb", "work/archive.duckdb.lock", "work/archive.duckdb.wal"}, outside
    assert {p: hostile.after[p] for p in hostile.before} == hostile.before  # the input files are untouched
    assert hostile.outside_after == hostile.outside_before
    reports = (hostile.work / "reports").resolve()
    for p in (hostile.work / "reports").rglob("*"):
        assert p.resolve().is_relative_to(reports) and not p.is_symlink(), p
    now = os.stat("/etc/passwd")
    assert (now.st_size, now.st_mtime_ns) == (hostile.passwd_before.st_size, hostile.passwd_before.st_mtime_ns)


def test_file_names_are_bounded_and_plain(hostile):
    """Every report file name is short and plain ASCII: ``book-<slug>-<hash>.html``, ``desk-<slug>-<hash>.html``,
    index or exceptions."""
    names = [Path(p).name for p in hostile.pages]
    assert all(len(n) <= 100 for n in names), max(names, key=len)
    plain = r"(index|exceptions|(book|desk)-[A-Za-z0-9_-]*-[0-9a-f]{12})\.html"
    assert all(re.fullmatch(plain, n) for n in names), names
    assert len(set(names)) == len(names)
    assert {Path(p).parent.name for p in hostile.pages} == {RUN.isoformat()}


def test_archive_stores_each_name_verbatim_and_sql_in_a_name_drops_nothing(hostile):
    """Books, trades, instruments and underlyings come back byte for byte; every table is still there."""
    con = duckdb.connect(str(hostile.work / "archive.duckdb"), read_only=True)
    try:
        tables = {r[0] for r in con.execute("SELECT table_name FROM information_schema.tables").fetchall()}
        assert set(TABLES) <= tables
        rows = con.execute("SELECT book, trade_id, instrument_id, underlying FROM position_pnl WHERE as_of = ?",
                           [RUN]).fetchall()
        ledger = con.execute("SELECT key, severity FROM input_exceptions WHERE as_of = ?", [RUN]).fetchall()
        books = {r[0] for r in con.execute("SELECT book FROM book_pnl WHERE as_of = ?", [RUN]).fetchall()}
        sql_rows = con.execute("SELECT count(*) FROM position_pnl WHERE book = ?", [SQL_NAME]).fetchone()[0]
    finally:
        con.close()
    assert sorted(rows) == sorted((role(k, 3), role(k, 2), role(k, 1), role(k, 0)) for k in range(N))
    assert (REJECTED_TRADE, "rejected") in ledger
    assert books == set(HOSTILE)
    assert sql_rows == 1
