"""The book page's vol P&L by expiry bucket and by part, against SQL sums of the archive (shown to whole units)."""

from __future__ import annotations

from pathlib import Path

import duckdb
import pytest
from report_fixtures import AS_OF, PageParser, build_archive, shown_number

from attribution import report
from attribution.config import JobConfig

BOOKS = ("Vol Arb North", "Index Gamma")
PARTS = ("pnl_vol_level", "pnl_vol_skew", "pnl_vol_curvature", "pnl_vol_own", "pnl_smile_delta")


@pytest.fixture(scope="module")
def night(tmp_path_factory: pytest.TempPathFactory) -> tuple[duckdb.DuckDBPyConnection, Path]:
    """The invented archive, its held positions given expiries from 2 weeks to 3 years and vol parts, rendered."""
    root = tmp_path_factory.mktemp("vol-parts")
    con = build_archive(root / "archive.duckdb", BOOKS, per_book=25)
    con.execute("""
        UPDATE position_pnl SET
            tau_prior_years = 0.04 + 0.125 * (strike - 100), vol_prior = 0.20, vol_run = 0.21,
            pnl_vol_level = 0.6 * (pnl_vega + pnl_volga), pnl_vol_skew = 0.3 * (pnl_vega + pnl_volga),
            pnl_vol_curvature = 0.05 * (pnl_vega + pnl_volga),
            pnl_vol_own = (pnl_vega + pnl_volga) - 0.95 * (pnl_vega + pnl_volga), pnl_smile_delta = 0
        WHERE as_of = ? AND status IN ('carried', 'closed')""", [AS_OF])
    index = report.render_night(con, AS_OF, root / "reports", JobConfig())
    return con, index


def _table(index: Path, book: str) -> list[list[str]]:
    page = PageParser((index.parent / report.file_name_for(book)).read_text(encoding="utf-8"))
    return page.tables["vol-parts-table"]


def test_vol_parts_by_expiry_bucket_equal_the_archive(night) -> None:
    """Bucket rows (vega, vega P&L, vol P&L and parts; default buckets 1W ... 5Y+) and the total equal SQL sums."""
    con, index = night
    for book in BOOKS:
        rows = _table(index, book)[1:]
        expected = con.execute(f"""
            SELECT CASE WHEN tau_prior_years <= 7/365 THEN 'up to 1W' WHEN tau_prior_years <= 1/12 THEN '1W to 1M'
                   WHEN tau_prior_years <= 0.25 THEN '1M to 3M' WHEN tau_prior_years <= 0.5 THEN '3M to 6M'
                   WHEN tau_prior_years <= 1 THEN '6M to 1Y' WHEN tau_prior_years <= 2 THEN '1Y to 2Y'
                   WHEN tau_prior_years <= 5 THEN '2Y to 5Y' ELSE '5Y+' END,
                   count(*), sum(vega_per_vol_point), sum(pnl_vega), sum(pnl_vega + pnl_volga),
                   {", ".join(f"sum({c})" for c in PARTS)}
            FROM position_pnl WHERE as_of = ? AND book = ? AND vol_prior IS NOT NULL
            GROUP BY 1 ORDER BY min(tau_prior_years)""", [AS_OF, book]).fetchall()
        assert len(rows) == len(expected) + 1 and len(expected) >= 4
        for shown, want in zip(rows, expected, strict=False):
            assert shown[0] == want[0] and int(shown[1]) == want[1]
            for cell, value in zip(shown[2:], want[2:], strict=True):
                assert shown_number(cell) == pytest.approx(value, abs=0.5)
        total = rows[-1]
        assert total[0] == "All expiries" and int(total[1]) == sum(w[1] for w in expected)
        for column in (2, 3, 4):
            assert shown_number(total[column]) == pytest.approx(sum(w[column] for w in expected), abs=0.5)


def test_a_book_without_vols_on_both_dates_says_so(tmp_path) -> None:
    """Rows without a vol on both dates (the fixture's own) give no table, and the page says why."""
    con = build_archive(tmp_path / "archive.duckdb", BOOKS[:1], per_book=12)
    index = report.render_night(con, AS_OF, tmp_path / "reports", JobConfig())
    page = PageParser((index.parent / report.file_name_for(BOOKS[0])).read_text(encoding="utf-8"))
    assert "vol-parts-table" not in page.tables
    assert "No position held overnight with a vol on both dates" in page.text("vol-parts")
