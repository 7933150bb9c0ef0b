"""Tests of attribution.config: the job file, its defaults, overrides and refusals."""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path

import pytest

from attribution.cli import main
from attribution.config import ConfigError, JobConfig, LimitSettings, load_job
from attribution.errors import EXIT_FINDINGS, EXIT_OK, EXIT_USAGE
from tests.mini_desk import RUN, write_mini_desk

JOBS = Path(__file__).resolve().parent.parent / "jobs"


def test_the_demo_job_file_loads_with_paths_relative_to_it():
    """jobs/nightly.toml loads; its paths are resolved from the jobs folder; overrides keep the defaults."""
    config = load_job(JOBS / "nightly.toml")
    assert config.data_root == (JOBS / "../demo/data").resolve()
    assert config.archive_path == (JOBS / "../demo/archive.duckdb").resolve()
    assert config.time_basis == "ACT/365F" and config.reporting_currency == "USD"
    assert dt.date(2025, 12, 25) in config.holidays
    short_vol = config.limits_for("short-vol")
    assert short_vol.residual_abs == 40_000.0
    assert short_vol.position_abs == config.limits.position_abs  # not overridden: the default
    assert config.limits_for("index-vol") == config.limits


def test_defaults_without_a_job_file():
    """Without a job file: ./data, ./archive.duckdb, ./reports, USD, ACT/365F, revaluation on."""
    config = JobConfig()
    assert (config.data_root, config.archive_path, config.reports_dir) == (
        Path("data"), Path("archive.duckdb"), Path("reports"))
    assert config.revaluation and config.write_reports and config.limits == LimitSettings()


@pytest.mark.parametrize(("text", "message"), [
    ("[time]\nbasis = 'ACT/360'\n", "time basis 'ACT/360'"),
    ("[job]\nengine = 'spark'\n", "engine 'spark'"),
    ("[job]\nreporting_currency = 'dollars'\n", "ISO 4217"),
    ("[limits]\nresidual_abs = -5\n", "residual_abs must be a finite number >= 0"),
    ("[limits]\nresidual_abs = nan\n", "residual_abs must be a finite number >= 0"),
    ("[limits]\nresidual_rel = inf\n", "residual_rel must be a finite number >= 0"),
    ("[limits]\nresidual_abs = true\n", "residual_abs must be a number"),
    ("[limits.books.x]\nposition_abs = -inf\n", "position_abs must be a finite number >= 0"),
    ("[checks]\nmax_vol = nan\n", "max_vol must be a finite number >= 0"),
    ("[job]\nhistory_nights = 'sixty'\n", "history_nights must be a whole number"),
    ("[job]\nhistory_nights = 0\n", "history_nights must be a whole number >= 1"),
    ("[job]\nwrite_reports = 'no'\n", "write_reports must be true or false"),
    ("[job]\nrevaluation = 1\n", "revaluation must be true or false"),
    ("[job]\ndata_roots = 'x'\n", "unknown key(s) data_roots"),
    ("[job]\ndata_root = 5\n", "data_root must be a string"),
    ("[job]\nscheduler = 8786\n", "scheduler must be a string"),
    ("[time]\nbasis = 365\n", "basis must be a string"),
    ("[time]\nholiday = [2026-12-25]\n", "unknown key(s) holiday"),
    ("[jobs]\nengine = 'local'\n", "unknown section(s) or top-level key(s) jobs"),
    ("history_nights = 60\n", "unknown section(s) or top-level key(s) history_nights"),
    ("[limits]\nresidual_abz = 5\n", "unknown key(s) residual_abz"),
    ("[time]\nholidays = ['2026-12-25']\n", "TOML date"),
    ("[job\n", "not valid TOML"),
    ("[job]\namerican_precision = 'high'\n", "american_precision 'high' is not one of standard, precise, fast"),
    ("[report]\nexpiry_buckets = ['1M', '1W']\n", "expiry_buckets must increase"),
    ("[report]\nexpiry_buckets = ['3 months']\n", "'3 months' is not a tenor"),
    ("[report]\nbuckets = ['1M']\n", "unknown key(s) buckets"),
])
def test_bad_job_files_are_refused_naming_the_file_and_key(tmp_path, text, message):
    """Every refusal names the job file and the key or rule."""
    path = tmp_path / "job.toml"
    path.write_text(text)
    with pytest.raises(ConfigError) as caught:
        load_job(path)
    assert str(path) in str(caught.value) and message in str(caught.value)


def test_missing_job_file_is_refused(tmp_path):
    """A job file that does not exist is a usage error naming it."""
    with pytest.raises(ConfigError, match="job file not found"):
        load_job(tmp_path / "absent.toml")


def test_american_precision_is_a_job_option(tmp_path):
    """[job] american_precision = "precise" selects the precise American scheme (README, American exercise)."""
    path = tmp_path / "job.toml"
    path.write_text('[job]\namerican_precision = "precise"\n')
    assert load_job(path).american_precision == "precise"
    assert JobConfig().american_precision == "standard"


def test_a_job_file_without_path_keys_takes_the_default_paths(tmp_path):
    """Defaults come from an instance, not a slotted class's attributes: paths are Paths and the record is JSON."""
    path = tmp_path / "job.toml"
    path.write_text("[limits]\nresidual_abs = 30000\n")
    config = load_job(path)
    assert (config.data_root, config.archive_path, config.reports_dir) == (
        Path("data"), Path("archive.duckdb"), Path("reports"))
    assert json.loads(json.dumps(config.as_record()))["archive_path"] == "archive.duckdb"


@pytest.mark.parametrize(("text", "key"), [
    ("[job]\nhistory_nigths = 60\n", "history_nigths"),
    ("[job]\nhistory_nights = 'sixty'\n", "history_nights"),
    ("[job]\nwrite_reports = 'no'\n", "write_reports"),
    ("[limits]\nresidual_abs = nan\n", "residual_abs"),
])
def test_the_command_line_refuses_a_bad_key_with_exit_2(tmp_path, capsys, text, key):
    """``attribution run --job`` with a bad key exits 2 (usage) naming the file and the key, no traceback."""
    path = tmp_path / "job.toml"
    path.write_text(text)
    assert main(["run", "--as-of", "2026-11-30", "--job", str(path)]) == EXIT_USAGE
    err = capsys.readouterr().err
    assert str(path) in err and key in err and "Traceback" not in err


def test_a_run_with_a_job_file_without_path_keys_succeeds(tmp_path, monkeypatch, capsys):
    """The run that crashed on the job file's defaults (not JSON serializable) archives the night."""
    write_mini_desk(tmp_path / "data")
    (tmp_path / "job.toml").write_text("[job]\nwrite_reports = false\n")
    monkeypatch.chdir(tmp_path)
    code = main(["run", "--as-of", RUN.isoformat(), "--job", "job.toml"])
    assert code in (EXIT_OK, EXIT_FINDINGS), capsys.readouterr().err
    assert (tmp_path / "archive.duckdb").exists()


def test_the_demo_applies_the_limits_its_job_file_documents(tmp_path):
    """jobs/nightly.toml (the demo desk's job file) and the demo's own run use the same limits, book by book."""
    from attribution.demo.run import demo_config
    documented = load_job(JOBS / "nightly.toml")
    applied = demo_config(tmp_path, documented.holidays)
    assert applied.limits == documented.limits
    assert applied.book_limits == documented.book_limits


def test_expiry_buckets_default_and_from_the_job_file(tmp_path):
    """Without a [report] table the buckets end at 1W, 1M, 3M, 6M, 1Y, 2Y, 5Y; a job file can name others."""
    assert JobConfig().expiry_buckets == ("1W", "1M", "3M", "6M", "1Y", "2Y", "5Y")
    path = tmp_path / "job.toml"
    path.write_text("[report]\nexpiry_buckets = ['2W', '3M', '10Y']\n")
    assert load_job(path).expiry_buckets == ("2W", "3M", "10Y")
