"""The demo end to end on a short slice: ``attribution demo`` builds, backfills, reports, and the
controls catch the planted faults (a stale mark, a fat-finger mark, a missing mark)."""

from __future__ import annotations

from pathlib import Path

import duckdb
import pytest

from attribution.cli import main
from attribution.demo import build_demo
from attribution.errors import EXIT_OK


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, str]:
    into = tmp_path_factory.mktemp("demo")
    import contextlib
    import io
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        assert main(["demo", "--into", str(into), "--days", "8"]) == EXIT_OK
    return into, out.getvalue()


def test_demo_prints_where_the_index_is_and_writes_it(demo):
    """The demo's last line names the index page, which exists with a page per book."""
    into, out = demo
    index = into / "reports" / "2025-11-12" / "index.html"
    assert f"Open the report: {index}" in out
    assert index.exists()
    assert len(list(index.parent.glob("book-*.html"))) == 7


def test_demo_archives_every_night_and_conserves_positions(demo):
    """Seven nights archived; each night's positions in = archived + rejected (runs table)."""
    into, _ = demo
    con = duckdb.connect(str(into / "archive.duckdb"), read_only=True)
    runs = con.execute("SELECT as_of, positions_in, positions_archived, positions_rejected FROM runs "
                       "ORDER BY as_of").fetchall()
    con.close()
    assert len(runs) == 7
    assert all(n_in == archived + rejected for _, n_in, archived, rejected in runs)


def test_planted_faults_are_caught(demo, tmp_path):
    """Stale mark -> warning; fat-finger mark -> a mark gap on that instrument; missing mark -> rolled and warned;
    off-smile mark -> `off smile` only; butterfly in the marks -> `smile arbitrage`."""
    into, _ = demo
    faults = build_demo(tmp_path / "again", business_days=8).faults  # same seed: the same faults
    con = duckdb.connect(str(into / "archive.duckdb"), read_only=True)
    for fault in faults:
        day = fault.as_of
        if fault.kind == "stale_mark":
            rules = {r for (r,) in con.execute("SELECT rule FROM input_exceptions WHERE as_of = ? AND key = ?",
                                               [day, fault.instrument_or_trade]).fetchall()}
            assert "stale mark" in rules
        elif fault.kind == "fat_finger_mark":
            gap = con.execute("SELECT max(abs(pnl_mark_gap)) FROM position_pnl WHERE as_of = ? AND instrument_id = ?",
                              [day, fault.instrument_or_trade]).fetchone()[0]
            assert gap > 1_000.0
        elif fault.kind in ("off_smile_mark", "smile_arbitrage_mark"):
            rules = {r for (r,) in con.execute("SELECT rule FROM input_exceptions WHERE as_of = ? AND key = ? "
                                               "AND severity = 'warning'", [day, fault.instrument_or_trade]).fetchall()}
            assert ("off smile" if fault.kind == "off_smile_mark" else "smile arbitrage") in rules
            if fault.kind == "off_smile_mark":
                assert "smile arbitrage" not in rules
        elif fault.kind == "booking_error":  # a trade on an unlisted instrument: rejected by its trade_id, not lost
            rejected = con.execute("SELECT count(*) FROM input_exceptions WHERE as_of = ? AND key = ? "
                                   "AND severity = 'rejected'", [day, fault.instrument_or_trade]).fetchone()[0]
            assert rejected >= 1
            assert con.execute("SELECT count(*) FROM position_pnl WHERE as_of = ? AND trade_id = ?",
                               [day, fault.instrument_or_trade]).fetchone()[0] == 0
        elif fault.kind == "missing_mark":  # rolled forward from the prior date's mark, flagged and warned
            warned = con.execute("SELECT count(*) FROM input_exceptions WHERE as_of = ? AND severity = 'warning' "
                                 "AND rule = 'mark rolled forward' AND key = ?",
                                 [day, fault.instrument_or_trade]).fetchone()[0]
            flagged = con.execute("SELECT count(*) FROM position_pnl WHERE as_of = ? AND instrument_id = ? "
                                  "AND flags LIKE '%mark_rolled%'", [day, fault.instrument_or_trade]).fetchone()[0]
            assert warned == 1 and flagged >= 1
    con.close()
    assert {f.kind for f in faults} >= {"stale_mark", "fat_finger_mark", "missing_mark", "off_smile_mark",
                                        "smile_arbitrage_mark"}


def test_official_pnl_reconciles_except_the_planted_breaks(demo, tmp_path):
    """The desk's own P&L (official_pnl.parquet, from its books of record) meets the job's total within the demo's
    official_break limit on every book and night but the planted breaks: the late-booked trade's night and the next
    (opposite signs) and the fat-finger night of its book. The early exercise's night reconciles: the exercised option
    is handed over for the shares with no cash, so its intrinsic value is counted once (README, "Statuses")."""
    from attribution.demo.build import OFFICIAL_BREAK_LIMIT

    into, _ = demo
    summary = build_demo(tmp_path / "again", business_days=8)  # same seed: the same planted events
    expected: set[tuple[object, str]] = set()
    for fault in summary.faults:
        if fault.kind == "late_booking":
            after = summary.dates[summary.dates.index(fault.as_of) + 1]
            expected |= {(fault.as_of, fault.book), (after, fault.book)}
        elif fault.kind == "official_break":
            expected.add((fault.as_of, fault.book))
    con = duckdb.connect(str(into / "archive.duckdb"), read_only=True)
    rows = con.execute("SELECT as_of, book, official_pnl, official_break FROM book_pnl ORDER BY as_of, book").fetchall()
    con.close()
    assert len(rows) == 7 * 7 and all(official is not None for _, _, official, _ in rows)
    over = {(as_of, book): brk for as_of, book, _, brk in rows if abs(brk) > OFFICIAL_BREAK_LIMIT}
    assert set(over) == expected, over
    late = [f for f in summary.faults if f.kind == "late_booking"]
    if late:
        after = summary.dates[summary.dates.index(late[0].as_of) + 1]
        first, second = over[(late[0].as_of, late[0].book)], over[(after, late[0].book)]
        assert first * second < 0  # the break reverses when the trade reaches the files


def test_exercise_is_archived_as_exercised_and_fx_books_hold_forwards(demo, tmp_path):
    """The early exercise's trade is archived with status `exercised`, its delivered shares as a new trade; the FX
    options book's hedges are FX forwards (kind forward)."""
    into, _ = demo
    summary = build_demo(tmp_path / "again", business_days=8)
    (exercise,) = [f for f in summary.faults if f.kind == "early_exercise"]
    con = duckdb.connect(str(into / "archive.duckdb"), read_only=True)
    status = con.execute("SELECT status, exercise FROM position_pnl WHERE as_of = ? AND trade_id = ?",
                         [exercise.as_of, exercise.instrument_or_trade]).fetchall()
    delivered = con.execute("SELECT status, kind FROM position_pnl WHERE as_of = ? AND trade_id LIKE '%EX-%'",
                            [exercise.as_of]).fetchall()
    kinds = {k for (k,) in con.execute("SELECT DISTINCT kind FROM position_pnl WHERE book = 'fx-options' "
                                       "AND strategy = 'delta hedge'").fetchall()}
    con.close()
    assert status == [("exercised", "american")]
    assert delivered == [("new", "underlying")]
    assert kinds == {"forward"}
