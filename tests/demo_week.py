"""The demo desk's first six business days (five nights, a weekend inside, its planted faults on the last
nights) with the job configuration of a backfill over them: shared by the backfill and date-cache tests."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

from attribution.config import JobConfig
from attribution.demo import build_demo


def demo_week(root: Path) -> tuple[JobConfig, list[dt.date]]:
    """Build the six days under ``root`` and return a report-less job on them and their dates."""
    summary = build_demo(root / "data", business_days=6)
    config = JobConfig(data_root=root / "data", archive_path=root / "archive.duckdb", reports_dir=root / "reports",
                       holidays=summary.holidays, write_reports=False)
    return config, list(summary.dates)
