"""The nightly HTML report: figures equal the archive's, pages are safe, self-contained and written atomically.

The archive is the invented night of tests/report_fixtures.py. Figures are compared with SQL sums
over ``position_pnl`` (an independent route to the same numbers): exact values through the pages'
``data-value`` attributes (rtol 1e-9, atol 1e-6, summation order only), shown text within half a
display unit (amounts are shown to whole currency units).
"""

from __future__ import annotations

import datetime as dt
import json
import math
import re
import subprocess
import sys
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pytest
from report_fixtures import AS_OF, PageParser, build_archive, shown_number

from attribution import report
from attribution.config import JobConfig
from attribution.report import charts, publish, queries

HOSTILE = ("<script>alert(1)</script>", '"><img src=x onerror=alert(1)>', "../../x", "L" * 500)
BOOKS = ("Vol Arb North", "Index Gamma", *HOSTILE)
RTOL, ATOL = 1e-9, 1e-6
CAUTION_PHRASES = ("end-of-day marks", "assumptions of the pricing model", "independent price verification",
                   "does not replace", "policies", "regulator")


@pytest.fixture(scope="module")
def night(tmp_path_factory: pytest.TempPathFactory) -> tuple[duckdb.DuckDBPyConnection, Path]:
    """The invented archive (25 positions a book, so the top-20 table truncates) rendered once."""
    root = tmp_path_factory.mktemp("report")
    con = build_archive(root / "archive.duckdb", BOOKS, per_book=25)
    index = report.render_night(con, AS_OF, root / "reports", JobConfig())
    return con, index


def _page(index: Path, book: str) -> PageParser:
    return PageParser((index.parent / report.file_name_for(book)).read_text(encoding="utf-8"))


def _sums(con: duckdb.DuckDBPyConnection, book: str, columns: tuple[str, ...]) -> dict[str, float]:
    row = con.execute(f"SELECT {', '.join(f'sum({c})' for c in columns)} FROM position_pnl "
                      "WHERE as_of = ? AND book = ?", [AS_OF, book]).fetchone()
    return dict(zip(columns, row, strict=True))


def test_render_night_writes_index_and_one_page_per_book(night) -> None:
    """The index path is returned and every book of the night has its page beside it."""
    _, index = night
    assert index.name == "index.html" and index.parent.name == AS_OF.isoformat()
    pages = sorted(p.name for p in index.parent.iterdir())
    assert pages == sorted(["index.html", "exceptions.html", *(report.file_name_for(b) for b in BOOKS),
                            report.file_name_for("(unassigned)", "desk")])


@pytest.mark.parametrize("book", BOOKS)
def test_headline_equals_sql_sums_over_positions(night, book: str) -> None:
    """Total, actual, explained, residual and its two parts equal the SQL sums of the book's positions."""
    con, index = night
    columns = ("pnl_total", "pnl_actual", "pnl_explained", "pnl_residual", "pnl_higher_order", "pnl_mark_gap")
    expected = _sums(con, book, columns)
    page = _page(index, book)
    for column in columns:
        assert page.value(f"fig-{column}") == pytest.approx(expected[column], rel=RTOL, abs=ATOL)
        assert shown_number(page.text(f"fig-{column}")) == pytest.approx(expected[column], abs=0.5)
    assert page.text("book-name") == book


def test_waterfall_steps_equal_archive_and_reach_the_total(night) -> None:
    """Each waterfall step is the archive's term, and the steps add up to the night's total P&L."""
    con, index = night
    steps = (*(f"pnl_{t}" for t in ("delta", "gamma", "vega", "volga", "vanna", "theta", "rates", "dividend")),
             "pnl_new_trade", "pnl_expiry", "pnl_amendment", "pnl_fx_translation", "pnl_residual")
    for book in BOOKS:
        expected = _sums(con, book, (*steps, "pnl_total"))
        page = _page(index, book)
        for step in steps:
            assert page.value(f"wf-{step}") == pytest.approx(expected[step], rel=RTOL, abs=ATOL)
        assert math.fsum(page.value(f"wf-{s}") for s in steps) == pytest.approx(expected["pnl_total"], rel=RTOL,
                                                                             abs=ATOL)
        assert page.value("wf-pnl_total") == pytest.approx(expected["pnl_total"], rel=RTOL, abs=ATOL)


def test_fx_exposure_per_currency_equals_the_archive(night) -> None:
    """Per currency: run-date value in the currency and converted, 1 % of it, and tonight's FX translation (SQL)."""
    con, index = night
    book = BOOKS[0]
    rows = con.execute(
        "SELECT currency, sum(coalesce(quantity_run_date * multiplier * price_run, 0)), "
        "sum(coalesce(quantity_run_date * multiplier * price_run * fx_rate, 0)), sum(pnl_fx_translation) "
        "FROM position_pnl WHERE as_of = ? AND book = ? GROUP BY currency ORDER BY currency", [AS_OF, book]).fetchall()
    table = _page(index, book).tables["fx-exposure-table"][1:]
    assert [r[0] for r in table] == [r[0] for r in rows] == ["EUR", "USD"]
    for shown, (_, local, converted, translation) in zip(table, rows, strict=True):
        assert shown_number(shown[2]) == pytest.approx(local, abs=0.5)
        assert shown_number(shown[4]) == pytest.approx(converted, abs=0.5)
        assert shown_number(shown[5]) == pytest.approx(converted / 100, abs=0.5)
        assert shown_number(shown[6]) == pytest.approx(translation, abs=0.5)
    assert shown_number(table[0][3]) == pytest.approx(1.1)
    shown_rate = report.html.make_environment().filters["fx_rate"]
    assert shown_rate(0.006667) == "0.006667" and shown_rate(None) == charts.MISSING  # a yen rate keeps its digits


def test_two_methods_side_by_side_add_up(night) -> None:
    """Taylor factors group the terms, revaluation shares equal the archive, differences add to the expansion error."""
    con, index = night
    book = BOOKS[0]
    s = _sums(con, book, ("pnl_delta", "pnl_gamma", "pnl_vega", "pnl_volga", "pnl_vanna", "pnl_theta",
                          "pnl_explained", "pnl_model", "pnl_higher_order", "reval_spot", "reval_vol", "reval_time"))
    page = _page(index, book)
    assert page.value("m-spot-taylor") == pytest.approx(s["pnl_delta"] + s["pnl_gamma"], rel=RTOL, abs=ATOL)
    assert page.value("m-vol-taylor") == pytest.approx(s["pnl_vega"] + s["pnl_volga"], rel=RTOL, abs=ATOL)
    assert page.value("m-cross-taylor") == pytest.approx(s["pnl_vanna"], rel=RTOL, abs=ATOL)
    assert page.value("m-time-reval") == pytest.approx(s["reval_time"], rel=RTOL, abs=ATOL)
    assert page.value("m-spot-reval") == pytest.approx(s["reval_spot"], rel=RTOL, abs=ATOL)
    assert page.value("m-total-reval") == pytest.approx(s["pnl_model"], rel=RTOL, abs=ATOL)
    assert page.value("m-total-taylor") == pytest.approx(s["pnl_explained"], rel=RTOL, abs=ATOL)
    keys = ("spot", "vol", "cross", "time", "rates", "dividend")
    assert math.fsum(page.value(f"m-{k}-diff") for k in keys) == pytest.approx(s["pnl_higher_order"], abs=1e-6)
    assert "in spot and vol" in page.text("m-cross-reval")


def test_exposures_equal_archive_with_units(night) -> None:
    """Exposures at the prior state equal the SQL sums; each row names its unit."""
    con, index = night
    columns = ("delta_cash", "gamma_cash_1pct", "vega_per_vol_point", "theta_per_calendar_day",
               "theta_per_business_day", "theta_next_business_day")
    expected = _sums(con, BOOKS[1], columns)
    page = _page(index, BOOKS[1])
    for column in columns:
        assert page.value(f"x-{column}") == pytest.approx(expected[column], rel=RTOL, abs=ATOL)
    units = " ".join(" ".join(row) for row in page.tables["exposure-table"])
    for unit in ("per 1\xa0% move", "per vol point", "per calendar day", "per business day", "2026-03-17"):
        assert unit in units


def test_underlying_table_equals_sql_group_sums(night) -> None:
    """Every underlying row shows the SQL sums of its positions, to the displayed unit."""
    con, index = night
    book = BOOKS[0]
    terms = report.TERM_COLUMNS
    rows = con.execute(f"SELECT underlying, count(*), {', '.join(f'sum({c})' for c in terms)} FROM position_pnl "
                       "WHERE as_of = ? AND book = ? GROUP BY underlying ORDER BY underlying", [AS_OF, book]).fetchall()
    table = _page(index, book).tables["underlying-table"][1:]
    assert [r[0] for r in table] == [r[0] for r in rows]
    for shown, (_, count, *sums) in zip(table, rows, strict=True):
        assert int(shown[1]) == count
        for text, value in zip(shown[2:], sums, strict=True):
            number = shown_number(text.split("(")[0])
            assert number == pytest.approx(value or 0.0, abs=0.5)


def test_many_underlyings_are_cut_to_the_largest_residuals_plus_one_rest_line(night, monkeypatch, tmp_path) -> None:
    """Past TOP_UNDERLYINGS, a book lists its largest-residual underlyings and one line summing the rest."""
    con, _ = night
    book = BOOKS[0]
    monkeypatch.setattr(queries, "TOP_UNDERLYINGS", 2)
    rows = con.execute("SELECT underlying, count(*), sum(pnl_residual), sum(pnl_total) FROM position_pnl "
                       "WHERE as_of = ? AND book = ? GROUP BY underlying "
                       "ORDER BY abs(sum(pnl_residual)) DESC, abs(sum(pnl_total)) DESC, underlying",
                       [AS_OF, book]).fetchall()
    assert len(rows) > 2
    index = report.render_night(con, AS_OF, tmp_path / "reports", JobConfig())
    table = _page(index, book).tables["underlying-table"][1:]
    assert [r[0] for r in table[:2]] == sorted(r[0] for r in rows[:2])
    assert table[2][0] == f"({len(rows) - 2} other underlyings)"
    assert int(table[2][1]) == sum(r[1] for r in rows[2:])


def test_top_positions_are_the_largest_residuals(night) -> None:
    """The position table holds the 20 largest |residual| of the book, largest first, with its terms."""
    con, index = night
    book = BOOKS[2]
    expected = con.execute("SELECT trade_id, pnl_residual, pnl_delta FROM position_pnl WHERE as_of = ? AND book = ? "
                           "ORDER BY abs(pnl_residual) DESC, abs(pnl_total) DESC, trade_id LIMIT 20",
                           [AS_OF, book]).fetchall()
    table = _page(index, book).tables["position-table"][1:]
    assert len(table) == report.TOP_POSITIONS == len(expected)
    assert [r[0] for r in table] == [e[0] for e in expected]
    header = _page(index, book).tables["position-table"][0]
    residual_at, delta_at = header.index("Resi-dual"), header.index("Delta")
    for row, (_, residual, delta) in zip(table, expected, strict=True):
        assert shown_number(row[residual_at]) == pytest.approx(residual, abs=0.5)
        assert shown_number(row[delta_at]) == pytest.approx(delta, abs=0.5)


def test_unpriced_new_trade_is_never_shown_as_zero(tmp_path: Path) -> None:
    """A new trade without trade price shows "unpriced" for its day-one P&L, in every table that holds it."""
    con = build_archive(tmp_path / "a.duckdb", ("Small Book",), per_book=6, history_nights=3)
    index = report.render_night(con, AS_OF, tmp_path / "reports", JobConfig())
    page = _page(index, "Small Book")
    header = page.tables["position-table"][0]
    unpriced_rows = [r for r in page.tables["position-table"][1:] if r[3].startswith("new_unpriced")]
    assert len(unpriced_rows) == 1
    assert unpriced_rows[0][header.index("Newtrades")] == "unpriced"
    assert page.tables["unpriced-table"][1][-1] == "unpriced"
    assert "not in the total" in page.text("unpriced-note")
    assert any("(1 unpriced)" in " ".join(row) for row in page.tables["underlying-table"])


def test_index_lists_books_needing_attention_first(night) -> None:
    """Breach first, then watch, then red and amber zones, then |residual| descending, with the archive's figures."""
    con, index = night
    page = PageParser(index.read_text(encoding="utf-8"))
    rows = [r for r in page.tables["book-table"][1:] if r[0] in BOOKS]  # the desk's own line heads its books
    assert len(rows) == len(BOOKS)
    limits = dict(con.execute("SELECT book, limit_state FROM book_pnl WHERE as_of = ?", [AS_OF]).fetchall())
    zones = dict(con.execute("SELECT book, zone FROM book_quality WHERE as_of = ?", [AS_OF]).fetchall())
    residual = dict(con.execute("SELECT book, pnl_residual FROM book_pnl WHERE as_of = ?", [AS_OF]).fetchall())
    order = sorted(BOOKS, key=lambda b: ({"breach": 0, "watch": 1}.get(limits[b], 2),
                                         {"red": 0, "amber": 1}.get(zones.get(b), 2), -abs(residual[b])))
    assert [r[0] for r in rows] == list(order)
    assert limits[order[0]] == "breach" and rows[0][9] == "breach"
    for row in rows:
        assert shown_number(row[4]) == pytest.approx(residual[row[0]], abs=0.5)


def test_exceptions_counted_on_index_and_matched_to_books(night) -> None:
    """The index counts every exception; a book page lists those keyed by its trades (prior date too),
    instruments or underlyings, and no other."""
    con, index = night
    total = con.execute("SELECT count(*) FROM input_exceptions WHERE as_of = ?", [AS_OF]).fetchone()[0]
    page = PageParser(index.read_text(encoding="utf-8"))
    assert int(page.text("night-exceptions")) == total
    full = PageParser((index.parent / "exceptions.html").read_text(encoding="utf-8"))
    assert len(full.tables["exception-table"]) - 1 == total
    first = _page(index, BOOKS[0])
    keys = {row[2] for row in first.tables["book-exception-table"][1:]}
    assert "TREJ-0001" in keys            # a rejected trade known only from the prior date
    assert "XAU" not in keys              # touches no book
    index_row = next(r for r in page.tables["book-table"][1:] if r[0] == BOOKS[0])
    assert int(index_row[-1]) == len(keys)


def test_quality_figures_and_missing_row(night) -> None:
    """The quality zone shows with its word and figures; a book with no row says "not yet computed"."""
    con, index = night
    spearman = con.execute("SELECT spearman FROM book_quality WHERE as_of = ? AND book = ?",
                           [AS_OF, BOOKS[0]]).fetchone()[0]
    page = _page(index, BOOKS[0])
    assert "green zone" in page.text("q-zone")
    assert page.value("q-spearman") == pytest.approx(spearman, rel=RTOL)
    assert "Provisional" in page.text("quality-table") or "Provisional" in (
        index.parent / report.file_name_for(BOOKS[0])).read_text(encoding="utf-8")
    assert "not yet computed" in _page(index, BOOKS[-1]).text("q-zone").lower()


def test_history_shows_sixty_nights(night) -> None:
    """The history section covers the configured 60 nights ending on the run date."""
    _, index = night
    text = (index.parent / report.file_name_for(BOOKS[1])).read_text(encoding="utf-8")
    assert "Last 60 nights from the archive" in text
    assert AS_OF.isoformat() in PageParser(text).text("history")


@pytest.mark.parametrize("name", HOSTILE)
def test_hostile_book_names_are_escaped_on_every_page(night, name: str) -> None:
    """No page carries a hostile name as markup: no script or img element, no on* attribute, name shown as text."""
    _, index = night
    for path in index.parent.iterdir():
        text = path.read_text(encoding="utf-8")
        parsed = PageParser(text)
        assert not [t for t, _ in parsed.tags if t in ("script", "img", "iframe", "object", "embed")], path.name
        assert not [a for _, attrs in parsed.tags for a in attrs if a.startswith("on")], path.name
        assert "<script>alert(1)</script>" not in text and "<img src=x" not in text
    assert _page(index, name).text("book-name") == name
    index_text = index.read_text(encoding="utf-8")
    assert f'href="{report.file_name_for(name)}"' in index_text


def test_file_names_are_safe_unique_and_bounded() -> None:
    """Book file names keep to [A-Za-z0-9_-], never a separator or '..', stay short and stay distinct."""
    names = (*HOSTILE, "a/b", "a\\b", "a b", "a?b", "..", ".", "", "Ünïcode ∂ book", "CON", "a" * 10_000)
    files = [report.file_name_for(n) for n in names]
    for file in files:
        assert re.fullmatch(r"book-[A-Za-z0-9_-]{1,48}-[0-9a-f]{12}\.html", file), file
        assert ".." not in file and "/" not in file and "\\" not in file and len(file) <= 80
    assert len(set(files)) == len(names)


def test_pages_never_leave_the_reports_folder(night) -> None:
    """Every file written is a direct child of the date folder; nothing else appears in the reports folder."""
    _, index = night
    reports = index.parent.parent
    assert sorted(p.name for p in reports.iterdir()) == [AS_OF.isoformat()]
    for path in index.parent.iterdir():
        assert path.resolve().parent == index.parent.resolve() and path.is_file()


def test_write_replaces_an_older_folder_and_leaves_no_temp(tmp_path: Path, night) -> None:
    """A rerun replaces the older folder of the date as a whole and leaves no temporary folder."""
    con, _ = night
    reports = tmp_path / "reports"
    old = reports / AS_OF.isoformat()
    old.mkdir(parents=True)
    (old / "stale.html").write_text("old", encoding="utf-8")
    index = report.render_night(con, AS_OF, reports, JobConfig())
    assert not (index.parent / "stale.html").exists() and index.exists()
    assert sorted(p.name for p in reports.iterdir()) == [AS_OF.isoformat()]


def test_leftovers_of_an_interrupted_render_are_removed(tmp_path: Path, night) -> None:
    """Staging and set-aside folders of the date left by a killed render go; another date's are not touched."""
    con, _ = night
    reports = tmp_path / "reports"
    for name in (f".{AS_OF.isoformat()}.tmp-1a2b", f".{AS_OF.isoformat()}.old-3c4d", ".2026-03-13.tmp-5e6f"):
        (reports / name).mkdir(parents=True)
        (reports / name / "index.html").write_text("half", encoding="utf-8")
    report.render_night(con, AS_OF, reports, JobConfig())
    assert sorted(p.name for p in reports.iterdir()) == [".2026-03-13.tmp-5e6f", AS_OF.isoformat()]


def test_failed_write_keeps_the_older_folder_and_cleans_up(tmp_path: Path) -> None:
    """A failure while writing leaves the older folder as it was and removes the temporary folder."""
    target = tmp_path / AS_OF.isoformat()
    target.mkdir()
    (target / "index.html").write_text("previous night", encoding="utf-8")
    with pytest.raises(report.ReportError, match="would leave the report folder"):
        publish.write_atomically(target, {"index.html": "new", "../escape.html": "x"})
    assert (target / "index.html").read_text(encoding="utf-8") == "previous night"
    assert sorted(p.name for p in tmp_path.iterdir()) == [AS_OF.isoformat()]


def test_cautions_and_conventions_on_every_page(night) -> None:
    """Every page carries the cautions and the conventions (model, time basis, greek units)."""
    _, index = night
    for path in index.parent.iterdir():
        page = PageParser(path.read_text(encoding="utf-8"))
        cautions = page.text("cautions")
        for phrase in CAUTION_PHRASES:
            assert phrase in cautions, (path.name, phrase)
        conventions = page.text("conventions")
        for phrase in ("Black-Scholes-Merton", "Garman-Kohlhagen", "ACT/365F", "per vol point", "per calendar day",
                       "per business day", "per 1.00 of the zero rate"):
            assert phrase in conventions, (path.name, phrase)


def test_pages_are_self_contained(night) -> None:
    """No http(s) reference, no script, no external stylesheet, font or image in any page."""
    _, index = night
    for path in index.parent.iterdir():
        text = path.read_text(encoding="utf-8")
        assert not re.search(r"https?:", text, re.IGNORECASE), path.name
        assert "@import" not in text and "url(" not in text and "@font-face" not in text
        parsed = PageParser(text)
        assert not [t for t, _ in parsed.tags if t == "script"]
        assert not [a for t, a in parsed.tags if t == "link" and a.get("rel") != "icon"]
        assert not [a for _, a in parsed.tags if (a.get("src") or "").strip()]
        assert "@page" in text and "landscape" in text and "@media print" in text


def test_time_basis_comes_from_the_run_record(tmp_path: Path) -> None:
    """The run's own time basis is shown: Friday to Monday is 1/252 of a year under BUS/252 (common practice)."""
    con = build_archive(tmp_path / "a.duckdb", ("Rates Carry",), per_book=6, history_nights=3, time_basis="BUS/252")
    index = report.render_night(con, AS_OF, tmp_path / "reports", JobConfig())
    page = PageParser(index.read_text(encoding="utf-8"))
    assert page.text("time-basis") == "BUS/252"
    assert f"{1 / 252:.6f}" in page.text("conventions")


def test_past_night_shows_the_settings_its_run_record_archived(tmp_path: Path) -> None:
    """Currency, watch fraction and holidays come from the night's run record, not from today's job."""
    con = build_archive(tmp_path / "a.duckdb", ("Skew Desk",), per_book=6, history_nights=3, time_basis="BUS/252")
    settings = {"time_basis": "BUS/252", "reporting_currency": "EUR", "holidays": [AS_OF.isoformat()],
                "limits": {"watch_fraction": 0.5}, "book_limits": [["Skew Desk", {"watch_fraction": 0.6}]]}
    con.execute("UPDATE runs SET job_settings = ? WHERE as_of = ?", [json.dumps(settings), AS_OF])
    con.execute("UPDATE book_pnl SET limit_state = 'watch' WHERE as_of = ?", [AS_OF])
    today = JobConfig(reporting_currency="USD", time_basis="ACT/365F")  # the job file changed since that night
    index = report.render_night(con, AS_OF, tmp_path / "reports", today)
    page = _page(index, "Skew Desk")
    assert "has passed 60%" in page.text("limit-text")  # the book's archived override, not today's 80 %
    assert "Total P&amp;L (EUR)" in (index.parent / report.file_name_for("Skew Desk")).read_text(encoding="utf-8")
    conventions = PageParser(index.read_text(encoding="utf-8")).text("conventions")
    assert "EUR" in conventions and "USD" not in conventions
    assert page.text("time-basis") == "BUS/252"
    assert report.night_settings(con.execute("SELECT * FROM runs WHERE as_of = ?", [AS_OF]).df(),
                                 today).holidays == (AS_OF,)


def test_night_settings_fall_back_to_the_job_where_the_record_is_silent() -> None:
    """A record without a setting (an older archive) or no record at all takes the job's current value."""
    job = JobConfig(reporting_currency="CHF", time_basis="BUS/252")
    assert report.night_settings(pd.DataFrame({"job_settings": ['{"time_basis": "ACT/365F"}']}), job) == \
        report.NightSettings("ACT/365F", (), "CHF", True, 0.8, {})
    assert report.night_settings(pd.DataFrame({"job_settings": []}), job).time_basis == "BUS/252"
    assert report.night_settings(pd.DataFrame({"job_settings": ["not json"]}), job).reporting_currency == "CHF"


def test_revaluation_switched_off_is_shown_as_not_computed(tmp_path: Path) -> None:
    """With NULL revaluation shares the methods table says "not computed" and shows no difference."""
    con = build_archive(tmp_path / "a.duckdb", ("Skew Desk",), per_book=6, history_nights=3)
    con.execute("UPDATE book_pnl SET reval_spot = NULL, reval_vol = NULL, reval_time = NULL, reval_rates = NULL, "
                "reval_dividend = NULL")
    index = report.render_night(con, AS_OF, tmp_path / "reports", JobConfig(revaluation=False))
    page = _page(index, "Skew Desk")
    assert "not computed" in page.text("m-spot-reval") and "not computed" in page.text("m-total-reval")
    assert page.text("m-spot-diff") == charts.MISSING
    assert "switched off" in page.text("conventions")


def test_date_with_nothing_archived_is_refused(night, tmp_path: Path) -> None:
    """A date with no run, no book and no exception raises a clear error and writes nothing."""
    con, _ = night
    with pytest.raises(report.ReportError, match="nothing archived for 2025-06-02"):
        report.render_night(con, dt.date(2025, 6, 2), tmp_path, JobConfig())
    assert not list(tmp_path.iterdir())


def test_missing_table_is_named(tmp_path: Path) -> None:
    """An archive without one of the five tables is refused with the table's name."""
    con = duckdb.connect(str(tmp_path / "empty.duckdb"))
    with pytest.raises(report.ReportError, match="book_quality"):
        report.render_night(con, AS_OF, tmp_path / "reports", JobConfig())


def test_reading_the_figures_leaves_the_rendering_modules_unimported(tmp_path: Path) -> None:
    """A run reads its figures inside the open transaction before its commit starts; the rendering's modules (Jinja2,
    views, charts) are imported by ``publish_report``, beside the commit, not before the reads (README, "Speed")."""
    archive = tmp_path / "archive.duckdb"
    build_archive(archive, BOOKS[:2], per_book=3).close()
    code = (
        "import datetime as dt, sys, duckdb\n"
        "from attribution import report\n"
        "from attribution.config import JobConfig\n"
        f"con = duckdb.connect({str(archive)!r}, read_only=True)\n"
        f"frames = report.load_report(con, dt.date.fromisoformat({AS_OF.isoformat()!r}), JobConfig())\n"
        "assert len(frames.books), 'no book read'\n"
        "loaded = sorted(m for m in ('jinja2', 'attribution.report.html', 'attribution.report.view',\n"
        "                            'attribution.report.charts', 'attribution.report.pages') if m in sys.modules)\n"
        "assert not loaded, loaded\n"
        "assert report.file_name_for('x').endswith('.html') and report.EXCEPTIONS_SHOWN > 0\n"
        "assert 'attribution.report.html' in sys.modules\n"
        "try:\n"
        "    report.no_such_name\n"
        "except AttributeError as exc:\n"
        "    assert 'no_such_name' in str(exc)\n"
        "else:\n"
        "    raise AssertionError('an unknown name was found')\n"
    )
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr


def test_amounts_are_formatted_with_separators_and_minus() -> None:
    """Thousands separators, a minus sign for negatives, no negative zero, a dash for NULL."""
    assert charts.format_amount(1234567.4) == "1,234,567"
    assert charts.format_amount(-1234.6) == "-1,235"
    assert charts.format_amount(-0.3) == "0"
    assert charts.format_amount(-0.004, 2) == "0.00"
    assert charts.format_amount(None) == charts.format_amount(float("nan")) == charts.MISSING
    assert charts.format_percent(-0.1234) == "-12.3 %"
    sample = [1234567.4, -1234.6, -0.3, 0.0, None, float("nan"), 1e12, -999.5]
    assert charts.format_amounts(sample) == [charts.format_amount(v) for v in sample]
    assert charts.format_compact(-1_250_000) == "-1.25m" and charts.format_compact(250_000) == "250k"


def test_vectorised_amount_cells_equal_the_scalar_format() -> None:
    """amount_cell_rows writes, for every value at once, the text format_amount (Python's format(v, ",.0f")
    rounding, no negative zero) gives one value at a time: edge cases and a million random magnitudes."""
    edges = [0.0, -0.0, 0.5, 1.5, -0.5, -2.5, 999.5, -999.4999, 1000.0, 999_999.5, -1_234_567.5, 1e15 - 0.5,
             -(1e15 - 1.0), 1e15, 1e20, -1e300, float("nan"), float("inf"), float("-inf"), 2.0 ** 52 + 1, 7e-320]
    rng = np.random.default_rng(7)
    values = np.concatenate([edges, rng.standard_normal(1_000_000) * 10.0 ** rng.uniform(-3, 16, 1_000_000)])
    expected = [charts.format_amount(v) for v in values.tolist()]
    assert charts.format_amount_cells(values) == expected
    assert charts.format_amount_cells(values[:5], "<td>", "</td>") == [f"<td>{t}</td>" for t in expected[:5]]
    rows = values[:999_999].reshape(-1, 3)
    assert charts.amount_cell_rows(rows, "<td>", "</td>")[:50_000] == [
        "".join(f"<td>{charts.format_amount(v)}</td>" for v in row) for row in rows[:50_000].tolist()]
    assert charts.amount_cell_rows(np.full((2, 3), np.nan)) == [charts.MISSING * 3] * 2
    assert charts.amount_cell_rows(np.empty((0, 4))) == []


def test_waterfall_layout_runs_from_zero_to_total() -> None:
    """Bars chain end to start, and the total bar spans zero to the sum of the steps."""
    steps = [("a", "A", 100.0, ""), ("b", "B", -40.0, ""), ("c", "C", None, ""), ("d", "D", 15.0, "")]
    w = charts.waterfall(steps, ("t", "Total", 75.0), width=600.0)
    per_unit = (w.steps[0].width) / 100.0
    assert w.steps[0].x == pytest.approx(w.zero_x, abs=0.11)
    assert w.steps[1].x == pytest.approx(w.zero_x + 60.0 * per_unit, abs=0.2)     # 100 - 40 = 60
    assert w.steps[2].width == 0.0                                                  # missing: no bar
    assert w.steps[-1].x == pytest.approx(w.zero_x, abs=0.11)
    assert w.steps[-1].width == pytest.approx(75.0 * per_unit, abs=0.2)
    assert w.steps[1].style == "bar-fall" and w.steps[0].style == "bar-rise" and w.steps[-1].style == "bar-total"


def test_line_chart_and_ticks_cover_the_values() -> None:
    """Ticks cover the data range with round steps; each line has one point per night."""
    ticks = charts.nice_ticks(-3_200.0, 48_000.0)
    assert ticks[0] <= 0.0 and ticks[-1] >= 40_000.0 and len(set(round(b - a, 6) for a, b in
                                                                  zip(ticks, ticks[1:], strict=False))) == 1
    dates = [dt.date(2026, 1, 1) + dt.timedelta(days=i) for i in range(5)]
    chart = charts.line_chart(dates, [("x", "line-actual", [1.0, -2.0, 3.0, float("nan"), 5.0])], bars=[1, 2, 3, 4, 5])
    assert len(chart.series[0].points.split()) == 4                                 # NaN night left out
    assert chart.bars_path.count("M") == 5 and chart.first_date == "2026-01-01"
    assert chart.series[0].last_y < chart.zero_y                                    # 5 is above the zero line


def test_batched_line_charts_equal_one_chart_at_a_time() -> None:
    """Charts laid out together for many groups equal each group's chart laid out alone, scale per group."""
    dates = [dt.date(2026, 1, 1) + dt.timedelta(days=i) for i in range(7)]
    actual = [1.0, 5.0, -3.0, 100.0, 250.0, -40.0, 7.0]
    bars = [0.5, -1.0, 2.0, 10.0, -20.0, 5.0, 0.0]
    together = charts.line_charts(dates, [0, 3, 6], [("a", "line-actual", actual)], bars=bars)
    for chart, (s, e) in zip(together, [(0, 3), (3, 6), (6, 7)], strict=True):
        alone = charts.line_chart(dates[s:e], [("a", "line-actual", actual[s:e])], bars=bars[s:e])
        assert chart == alone


def test_pair_bars_share_one_scale() -> None:
    """Rows of the methods table are drawn on one scale: the largest value fills half the width."""
    bars = charts.pair_bars([(100.0, -50.0), (None, 25.0)], width=104.0)
    assert bars[0].first_width == pytest.approx(50.0, abs=0.05)
    assert bars[0].second_width == pytest.approx(25.0, abs=0.05) and bars[0].second_x < bars[0].zero_x
    assert bars[1].first_missing and not bars[1].second_missing


def test_book_page_caps_its_exception_list_and_counts_them_all(tmp_path: Path) -> None:
    """Past EXCEPTIONS_SHOWN rows a book page lists rejected rows first, counts every row by rule and links the rest."""
    con = build_archive(tmp_path / "a.duckdb", ("Busy Book",), per_book=6, history_nights=3)
    extra = report.EXCEPTIONS_SHOWN + 10
    con.executemany("INSERT INTO input_exceptions VALUES (?, ?, ?, ?, ?, ?, ?)",
                    [[AS_OF, "/data/as_of=2026-03-16/underlying_marks.parquet", "KRLX", "mark unchanged",
                      f"night {i}", "warning", None] for i in range(extra)])
    index = report.render_night(con, AS_OF, tmp_path / "reports", JobConfig())
    page = _page(index, "Busy Book")
    matched = con.execute("SELECT count(*) FROM input_exceptions WHERE as_of = ? AND key IN ('KRLX', 'TAPR', "
                          "'TREJ-0001') OR key LIKE 'KRLX-%' OR key LIKE 'VOMB-%' OR key LIKE 'TAPR-%' OR "
                          "key LIKE 'EURXAU-%'", [AS_OF]).fetchone()[0]
    rows = page.tables["book-exception-table"][1:]
    assert len(rows) == report.EXCEPTIONS_SHOWN
    assert rows[0][0] == "rejected" and rows[0][1] == "positions.parquet"
    assert sum(int(r[2]) for r in page.tables["book-exception-rules"][1:]) == matched
    assert f"the other {matched - report.EXCEPTIONS_SHOWN}" in page.text("book-exceptions-more")


def test_book_page_shows_hedges_beside_options_and_the_official_break(tmp_path) -> None:
    """The hedged desk's page: per underlying the options', hedges' and book's delta and P&L equal SQL sums over
    position_pnl; the options/hedges/cash waterfall ends on the book total; the index shows the official break."""
    from attribution.cli import main
    from tests.hedged_desk import write_whole_book
    from tests.mini_desk import RUN

    write_whole_book(tmp_path / "data")
    main(["run", "--as-of", RUN.isoformat(), "--data", str(tmp_path / "data"), "--archive",
          str(tmp_path / "a.duckdb"), "--reports", str(tmp_path / "reports")])
    folder = tmp_path / "reports" / RUN.isoformat()
    page = next(folder.glob("book-Index-vol-*.html")).read_text(encoding="utf-8")
    table = page[page.index('id="hedging-table"'):]
    table = table[: table.index("</table>")]
    rows = {m.group(1): [float(v) if v else math.nan for v in re.findall(r'data-value="([^"]*)"', m.group(2))]
            for m in re.finditer(r'<tr><td class="t">([^<]+)</td>(.*?)</tr>', table)}
    with duckdb.connect(str(tmp_path / "a.duckdb"), read_only=True) as con:
        sums = con.execute("""
            SELECT sum(delta_units) FILTER (WHERE kind = 'option'), sum(delta_units) FILTER (WHERE kind <> 'option'),
                   sum(pnl_total - pnl_cash) FILTER (WHERE kind = 'option'),
                   sum(pnl_total - pnl_cash) FILTER (WHERE kind <> 'option'), sum(pnl_cash)
            FROM position_pnl WHERE book = 'Index vol' AND underlying = 'ZEN'""").fetchone()
        total = con.execute("SELECT pnl_total, official_break FROM book_pnl WHERE book = 'Index vol'").fetchone()
    zen = rows["ZEN"]
    assert zen[0] == pytest.approx(sums[0], rel=1e-12) and zen[1] == pytest.approx(sums[1], rel=1e-12)
    assert zen[2] == pytest.approx(sums[0] + sums[1], rel=1e-12)
    assert zen[6:9] == pytest.approx(list(sums[2:5]), rel=1e-12)
    assert rows["(cash)"][8] == -250.0  # the book's financing charge on its cash row
    waterfall = page[page.index('id="hedging"'):page.index('id="hedging-table"')]
    assert shown_number(f"{total[0]:,.0f}") == pytest.approx(round(total[0]))
    assert f"{total[0]:,.0f}".replace("-", "\u2212") in waterfall or f"{total[0]:,.0f}" in waterfall
    index = (folder / "index.html").read_text(encoding="utf-8")
    assert f"{total[1]:,.0f}".replace("-", "\u2212") in index or f"{total[1]:,.0f}" in index
    assert 'id="fig-official_break"' in page


def test_the_dividend_line_says_it_is_the_foreign_rate_for_fx(night) -> None:
    """The dividend term of an FX option is the foreign rate: the waterfall, methods and tables say so."""
    _, index = night
    page = _page(index, BOOKS[0])
    header = " ".join(page.tables["underlying-table"][0])
    assert "foreign rate" in header and "foreign rate" in " ".join(" ".join(r) for r in page.tables["method-table"])


def test_a_green_zone_with_ratios_outside_their_guides_says_so() -> None:
    """Green by Spearman and KS (MAR32), variance ratio 35 % (BCBS 352 guide: at most 20 %): one line says both."""
    from attribution.report.view import _zone
    base = {"zone": "green", "mean_ratio": 0.02, "variance_ratio": 0.35}
    state = _zone(base)
    assert state.code == "green" and state.tone == "watch"
    assert "green zone" in state.word and "variance ratio 35 % (guide at most 20 %)".replace(" %", "%") in state.word
    assert _zone({**base, "variance_ratio": 0.1}).tone == "ok"
    assert "outside" not in _zone({**base, "zone": "amber"}).word
