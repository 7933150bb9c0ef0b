"""Tests of attribution.cli: every command's help, exit codes, overrides, history and quality output."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from attribution.cli import build_parser, config_from, main, printable
from attribution.errors import EXIT_FAILED, EXIT_OK, EXIT_USAGE
from tests.mini_desk import RUN, write_mini_desk

COMMANDS = ("run", "backfill", "check", "demo", "history", "quality", "bench")


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
