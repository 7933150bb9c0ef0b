"""Tests of attribution.config: the job file, its defaults, overrides and refusals."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import pytest

from attribution.config import ConfigError, JobConfig, LimitSettings, load_job

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
    ("[limits]\nresidual_abs = -5\n", "residual_abs must be a number >= 0"),
    ("[limits]\nresidual_abz = 5\n", "unknown key(s) residual_abz"),
    ("[time]\nholidays = ['2026-12-25']\n", "TOML date"),
    ("[job\n", "not valid TOML"),
    ("[job]\namerican_precision = 'high'\n", "american_precision 'high' is not one of standard, precise"),
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
