"""``attribution export`` (attribution.export): a night's archive rows as CSV or Parquet, identical to the archive."""

from __future__ import annotations

from pathlib import Path

import duckdb
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pa_csv
import pyarrow.parquet as pq
import pytest

from attribution.cli import main
from attribution.errors import EXIT_FAILED, EXIT_OK
from tests.contract_files import edit_row
from tests.mini_desk import PRIOR, RUN, write_mini_desk

TABLES = ("position_pnl", "book_pnl", "input_exceptions")


@pytest.fixture(scope="module")
def archived(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The mini desk's night, with a rejected row and a text key holding a comma, quotes and a new line."""
    root = tmp_path_factory.mktemp("export")
    write_mini_desk(root / "data")
    for day in (PRIOR, RUN):
        edit_row(root / "data", day, "positions", "T3", book='Euro, "single"\nnames')
    edit_row(root / "data", RUN, "option_marks", "ZEN-P120-M27", price=-1.0)
    assert main(["run", "--as-of", RUN.isoformat(), "--data", str(root / "data"), "--archive",
                 str(root / "a.duckdb"), "--no-reports"]) in (EXIT_OK, 3)
    return root


def _archive_rows(root: Path, table: str) -> pd.DataFrame:
    con = duckdb.connect(str(root / "a.duckdb"), read_only=True)
    try:
        return con.execute(f"SELECT * FROM {table} WHERE as_of = ?", [RUN]).df()
    finally:
        con.close()


def _same_rows(got: pd.DataFrame, want: pd.DataFrame) -> None:
    """Equal as sets of rows, every column, NULL matching NULL and floats bit for bit."""
    assert list(got.columns) == list(want.columns)
    key = list(want.columns)
    norm = [f.astype(object).where(f.notna(), None).astype(str).sort_values(key).reset_index(drop=True)
            for f in (got, want)]
    pd.testing.assert_frame_equal(norm[0], norm[1])


def test_parquet_export_holds_the_archives_rows_and_types(archived, capsys):
    """Each Parquet file equals the archive's rows of the night, column for column (README, Exports)."""
    out = archived / "pq"
    assert main(["export", "--as-of", RUN.isoformat(), "--format", "parquet", "--out", str(out),
                 "--archive", str(archived / "a.duckdb")]) == EXIT_OK
    for table in TABLES:
        want = _archive_rows(archived, table)
        arrow = pq.read_table(out / f"{table}.parquet")
        got = arrow.to_pandas()
        for column in want.columns:  # DATE stays date32 in the file; pandas reads the archive's as datetime64
            if pd.api.types.is_datetime64_any_dtype(want[column]):
                assert str(arrow.schema.field(column).type) in ("date32[day]", "timestamp[us]")
                got[column] = pd.to_datetime(got[column]).astype(want[column].dtype)
        assert len(want) > 0
        _same_rows(got, want)
    assert "position_pnl.parquet" in capsys.readouterr().out


def test_csv_export_round_trips_every_value(archived):
    """Each CSV file read back with the archive's column types gives its values: floats exactly, dates ISO,
    NULL as an empty field and an empty text as "" (RFC 4180 quoting, commas, quotes and new lines kept)."""
    out = archived / "csv"
    assert main(["export", "--as-of", RUN.isoformat(), "--format", "csv", "--out", str(out),
                 "--archive", str(archived / "a.duckdb")]) == EXIT_OK
    for table in TABLES:
        want = _archive_rows(archived, table)
        types = {c: pa.float64() if pd.api.types.is_float_dtype(want[c]) else
                 pa.int64() if pd.api.types.is_integer_dtype(want[c]) else
                 pa.timestamp("us") if pd.api.types.is_datetime64_any_dtype(want[c]) else
                 pa.bool_() if pd.api.types.is_bool_dtype(want[c]) else pa.string() for c in want.columns}
        got = pa_csv.read_csv(out / f"{table}.csv", convert_options=pa_csv.ConvertOptions(
            column_types=types, strings_can_be_null=True, quoted_strings_can_be_null=False)).to_pandas()
        for column in want.columns:
            if pd.api.types.is_datetime64_any_dtype(want[column]):
                got[column] = got[column].astype(want[column].dtype)
        _same_rows(got, want)
    assert 'Euro, "single"\nnames' in set(pd.read_csv(out / "book_pnl.csv")["book"])


def test_export_of_a_night_not_archived_fails_and_writes_nothing(archived, capsys):
    """A date with no archived run exits 1 naming it, and creates no file."""
    out = archived / "none"
    assert main(["export", "--as-of", "2020-01-01", "--format", "csv", "--out", str(out),
                 "--archive", str(archived / "a.duckdb")]) == EXIT_FAILED
    assert "no archived night for 2020-01-01" in capsys.readouterr().err
    assert not out.exists()
