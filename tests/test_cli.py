"""Tests of attribution.cli: every command's help, exit codes, overrides, history and quality output."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from attribution.cli import build_parser, config_from, main, printable
from attribution.errors import EXIT_FAILED, EXIT_OK, EXIT_USAGE
from tests.mini_desk import RUN, write_mini_desk

COMMANDS = ("run", "backfill", "check", "demo", "history", "quality", "export", "bench")


@pytest.mark.parametrize("command", COMMANDS)
def test_every_command_has_help(command, capsys):
    """``attribution COMMAND --help`` prints a usage line and exits 0."""
    assert main([command, "--help"]) == EXIT_OK
    assert f"usage: attribution {command}" in capsys.readouterr().out


def test_top_level_help_lists_the_commands_and_exit_codes(capsys):
    """``attribution --help`` names every command and documents the exit codes."""
    assert main(["--help"]) == EXIT_OK
    out = " ".join(capsys.readouterr().out.split())
    assert all(c in out for c in COMMANDS) and "3 finished with rejected rows or limit breaches" in out


def test_usage_errors_exit_2(capsys):
    """A bad date or an unknown flag is a usage error (2)."""
    assert main(["run", "--as-of", "30/11/2026"]) == EXIT_USAGE
    assert main(["run", "--as-of", "2026-11-30", "--frobnicate"]) == EXIT_USAGE


def test_flags_override_the_job_file():
    """--data, --archive, --basis and --no-reports override jobs/nightly.toml."""
    jobs = Path(__file__).resolve().parent.parent / "jobs" / "nightly.toml"
    args = build_parser().parse_args(["run", "--as-of", "2026-11-30", "--job", str(jobs), "--data", "elsewhere",
                                      "--basis", "BUS/252", "--no-reports"])
    config = config_from(args)
    assert config.data_root == Path("elsewhere") and config.time_basis == "BUS/252"
    assert not config.write_reports and config.reporting_currency == "USD"


def test_missing_data_folder_fails_with_exit_1(tmp_path, capsys):
    """A run on a folder that does not exist fails (1) naming it, and creates no archive."""
    code = main(["run", "--as-of", "2026-11-30", "--data", str(tmp_path / "nowhere"),
                 "--archive", str(tmp_path / "a.duckdb")])
    assert code == EXIT_FAILED
    assert "nowhere" in capsys.readouterr().err
    assert not (tmp_path / "a.duckdb").exists()


def test_printable_escapes_control_characters():
    """Data keys with control characters reach the terminal escaped."""
    assert printable("ok\x1b[31mred\x07") == "ok\\x1b[31mred\\x07"
    assert printable("plain") == "plain"


@pytest.fixture(scope="module")
def archived(tmp_path_factory):
    root = tmp_path_factory.mktemp("cli")
    write_mini_desk(root / "data")
    assert main(["run", "--as-of", RUN.isoformat(), "--data", str(root / "data"), "--archive",
                 str(root / "a.duckdb"), "--no-reports"]) == EXIT_OK
    return root


def test_history_json_has_the_book_series(archived, capsys):
    """``history --json`` prints the book's nightly rows with every term and the state."""
    capsys.readouterr()
    assert main(["history", "--book", "Index vol", "--archive", str(archived / "a.duckdb"), "--json"]) == EXIT_OK
    rows = json.loads(capsys.readouterr().out)
    assert len(rows) == 1 and rows[0]["as_of"] == RUN.isoformat() and rows[0]["limit_state"] == "within"
    for column in ("pnl_total", "pnl_delta", "pnl_theta", "pnl_residual", "reval_spot"):
        assert isinstance(rows[0][column], float)


def test_history_of_an_unknown_book_fails(archived, capsys):
    """Asking for a book the archive does not know exits 1 with a message."""
    assert main(["history", "--book", "Nope", "--archive", str(archived / "a.duckdb")]) == EXIT_FAILED
    assert "no archived nights for book 'Nope'" in capsys.readouterr().err


def test_quality_json_agrees_with_scipy_on_the_archives_own_series(tmp_path, capsys):
    """``quality --json`` equals scipy.stats.spearmanr / ks_2samp (the reference library) on the archived
    HPL and RTPL series, with the data contract's keys."""
    archive = tmp_path / "q.duckdb"
    from attribution.archive import connect
    con = connect(archive)
    rng = np.random.default_rng(4)
    dates = np.datetime64("2025-01-01") + np.arange(40)
    hpl = rng.normal(0, 1000, 40)
    rtpl = hpl + rng.normal(0, 300, 40)
    con.execute("INSERT INTO book_pnl (as_of, book, carried, closed, pnl_actual, pnl_explained) "
                "SELECT * FROM (SELECT unnest(?::DATE[]), 'Q book', 5, 0, unnest(?::DOUBLE[]), unnest(?::DOUBLE[]))",
                [[str(d) for d in dates], hpl.tolist(), rtpl.tolist()])
    con.close()
    capsys.readouterr()
    assert main(["quality", "--as-of", str(dates[-1]), "--archive", str(archive), "--json"]) == EXIT_OK
    (row,) = json.loads(capsys.readouterr().out)
    assert {"book", "nights", "spearman", "ks", "zone", "mean_ratio", "variance_ratio"} <= set(row)
    assert row["nights"] == 40 and row["provisional"] is True
    np.testing.assert_allclose(row["spearman"], stats.spearmanr(hpl, rtpl).statistic, rtol=1e-12)
    np.testing.assert_allclose(row["ks"], stats.ks_2samp(hpl, rtpl).statistic, rtol=1e-12)


def test_check_prints_the_ledger_and_writes_nothing(tmp_path, capsys):
    """``check`` lists the rejected rows and leaves no archive behind."""
    write_mini_desk(tmp_path / "data")
    (tmp_path / "data" / f"as_of={RUN.isoformat()}" / "fx_rates.parquet").unlink()
    code = main(["check", "--as-of", RUN.isoformat(), "--data", str(tmp_path / "data"),
                 "--archive", str(tmp_path / "a.duckdb")])
    out = capsys.readouterr().out
    assert code == 3 and "no FX rate" in out and "key=T3" in out
    assert not (tmp_path / "a.duckdb").exists()


@pytest.fixture()
def two_months(tmp_path):
    """An archive with 70 nights of two books on two desks across a month and a year end (rows put in directly)."""
    from attribution.archive import connect
    archive = tmp_path / "h.duckdb"
    con = connect(archive)
    rng = np.random.default_rng(11)
    dates = [str(d) for d in np.datetime64("2025-11-20") + np.arange(70)]
    rows = []
    for book, desk in (("B1", "Rates"), ("B2", "Rates")):
        for d in dates:
            rows.append((d, book, desk, *rng.normal(0, 1000, 3).tolist(), rng.choice(["within", "breach"])))
    frame = pd.DataFrame(rows, columns=["as_of", "book", "desk", "pnl_total", "pnl_theta",
                                                          "pnl_residual", "limit_state"])
    con.execute("INSERT INTO book_pnl (as_of, book, desk, pnl_total, pnl_theta, pnl_residual, limit_state) "
                "SELECT as_of::DATE, book, desk, pnl_total, pnl_theta, pnl_residual, limit_state FROM frame")
    con.close()
    frame["as_of"] = frame["as_of"].astype("datetime64[s]")
    return archive, frame


def _expected_to_date(frame, column):
    """Running sums per calendar month and year, by pandas (independent of the SQL windows)."""
    month = frame["as_of"].dt.to_period("M")
    year = frame["as_of"].dt.year
    return frame.groupby(month)[column].cumsum(), frame.groupby(year)[column].cumsum()


def test_history_json_adds_month_and_year_to_date_of_every_term(two_months, capsys):
    """``history --json`` carries pnl_total_mtd / _ytd (contract v2) and the same for every term, summed over
    every archived night of the month and year up to the night, even when --from starts later."""
    archive, frame = two_months
    b1 = frame[frame["book"] == "B1"].reset_index(drop=True)
    capsys.readouterr()
    assert main(["history", "--book", "B1", "--archive", str(archive), "--json", "--from", "2025-12-10"]) == EXIT_OK
    rows = json.loads(capsys.readouterr().out)
    shown = b1[b1["as_of"] >= "2025-12-10"].index
    assert [r["as_of"] for r in rows] == [d.date().isoformat() for d in b1.loc[shown, "as_of"]]
    for column in ("pnl_total", "pnl_theta", "pnl_residual"):
        mtd, ytd = _expected_to_date(b1, column)
        np.testing.assert_allclose([r[f"{column}_mtd"] for r in rows], mtd[shown], rtol=1e-12)
        np.testing.assert_allclose([r[f"{column}_ytd"] for r in rows], ytd[shown], rtol=1e-12)
    breach = (b1["limit_state"] == "breach").astype(int)
    assert [r["breaches_ytd"] for r in rows] == breach.groupby(b1["as_of"].dt.year).cumsum()[shown].tolist()
    assert rows[-1]["official_break_mtd"] is None  # no official P&L archived: no break, not zero


def test_history_of_a_desk_sums_its_books(two_months, capsys):
    """``history --desk`` sums the desk's books each night and accumulates them like a book."""
    archive, frame = two_months
    desk = frame.groupby("as_of", as_index=False)[["pnl_total"]].sum()
    capsys.readouterr()
    assert main(["history", "--desk", "Rates", "--archive", str(archive), "--json"]) == EXIT_OK
    rows = json.loads(capsys.readouterr().out)
    assert rows[0]["books"] == 2 and rows[0]["desk"] == "Rates"
    np.testing.assert_allclose([r["pnl_total"] for r in rows], desk["pnl_total"], rtol=1e-12)
    np.testing.assert_allclose([r["pnl_total_ytd"] for r in rows], _expected_to_date(desk, "pnl_total")[1], rtol=1e-12)


def test_history_table_ends_with_the_night_month_and_year_to_date(two_months, capsys):
    """The text output closes with the last night's terms beside their month- and year-to-date sums."""
    archive, frame = two_months
    capsys.readouterr()
    assert main(["history", "--book", "B2", "--archive", str(archive)]) == EXIT_OK
    out = capsys.readouterr().out
    b2 = frame[frame["book"] == "B2"].reset_index(drop=True)
    mtd, ytd = _expected_to_date(b2, "pnl_total")
    line = next(x for x in out.splitlines() if x.startswith("pnl_total "))
    assert line.split()[1:] == [f"{b2['pnl_total'].iloc[-1]:,.0f}", f"{mtd.iloc[-1]:,.0f}", f"{ytd.iloc[-1]:,.0f}"]
    assert "month to date" in out and "limit breaches" in out


def _validate(command: str, capsys, document: object) -> None:
    """``document`` is valid under the schema ``attribution COMMAND --schema`` prints (jsonschema, draft 2020-12)."""
    from jsonschema import Draft202012Validator
    capsys.readouterr()
    assert main([command, "--schema"]) == EXIT_OK
    schema = json.loads(capsys.readouterr().out)
    Draft202012Validator.check_schema(schema)
    errors = [e.message for e in Draft202012Validator(schema).iter_errors(document)]
    assert errors == []


def test_history_json_of_a_real_night_follows_its_documented_schema(archived, capsys):
    """Every key and type of ``history --json`` on an archived night is in its JSON Schema (README, Machine-readable
    output); the schema forbids undocumented keys, so a new archive column must be documented to pass."""
    capsys.readouterr()
    assert main(["history", "--book", "Index vol", "--archive", str(archived / "a.duckdb"), "--json"]) == EXIT_OK
    book_rows = json.loads(capsys.readouterr().out)
    assert main(["history", "--desk", "(unassigned)", "--archive", str(archived / "a.duckdb"), "--json"]) == EXIT_OK
    desk_rows = json.loads(capsys.readouterr().out)
    _validate("history", capsys, book_rows)
    _validate("history", capsys, desk_rows)


def test_history_schema_rejects_what_the_output_never_holds(capsys):
    """The history schema is not vacuous: an unknown key, a text amount or a missing month-to-date fail it."""
    from jsonschema import Draft202012Validator
    assert main(["history", "--schema"]) == EXIT_OK
    validator = Draft202012Validator(json.loads(capsys.readouterr().out))
    good = {"as_of": "2026-01-02", "prior_as_of": "2026-01-01", "book": "B", "limit_state": "within", "zone": None,
            "pnl_total": 1.0, "pnl_total_mtd": 1.0, "pnl_total_ytd": 1.0, "pnl_residual": 0.0,
            "pnl_residual_mtd": 0.0, "pnl_residual_ytd": 0.0, "breaches_mtd": 0, "breaches_ytd": 0}
    assert validator.is_valid([good])
    assert not validator.is_valid([{**good, "surprise": 1}])
    assert not validator.is_valid([{**good, "pnl_total": "1.0"}])
    assert not validator.is_valid([{k: v for k, v in good.items() if k != "pnl_total_mtd"}])


def test_quality_json_follows_its_documented_schema(archived, capsys):
    """``quality --json`` on an archived night is valid under the schema ``quality --schema`` prints."""
    capsys.readouterr()
    assert main(["quality", "--as-of", RUN.isoformat(), "--archive", str(archived / "a.duckdb"), "--json"]) == EXIT_OK
    rows = json.loads(capsys.readouterr().out)
    assert rows
    _validate("quality", capsys, rows)


def test_history_without_a_book_or_desk_is_a_usage_error(capsys):
    """``history`` needs --book or --desk (exit 2), unless it prints the schema."""
    assert main(["history"]) == EXIT_USAGE
    assert "--book" in capsys.readouterr().err


def test_numeric_warnings_never_reach_the_terminal(tmp_path):
    """An overflowing multiplier is rejected by rule; no RuntimeWarning or source path reaches stderr."""
    import subprocess
    import sys

    from tests.contract_files import edit_row
    from tests.mini_desk import PRIOR
    write_mini_desk(tmp_path / "data")
    for day in (PRIOR, RUN):
        edit_row(tmp_path / "data", day, "instruments", "ZEN-C100-J27", multiplier=1e308)
    done = subprocess.run([sys.executable, "-m", "attribution.cli", "run", "--as-of", RUN.isoformat(),
                           "--data", str(tmp_path / "data"), "--archive", str(tmp_path / "a.duckdb"), "--no-reports"],
                          capture_output=True, text=True, timeout=300)
    assert done.returncode == 3, done.stderr
    assert "Warning" not in done.stderr and ".py:" not in done.stderr, done.stderr
