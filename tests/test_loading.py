"""Reading one date's files: folders, required and optional files, columns and their types (attribution.loading).

Inputs are written from the data contract (tests/contract_files.py, tests/mini_desk.py); the expected
types and rules are the contract's (README.md, "Input files").
"""

from __future__ import annotations

import datetime as dt
import hashlib
from decimal import Decimal
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from attribution.loading import (
    FILE_COLUMNS,
    OPTIONAL_COLUMNS,
    OPTIONAL_FILES,
    InputFileError,
    available_dates,
    folder_for,
    prior_date,
    read_file,
    read_night,
)
from tests.contract_files import table
from tests.mini_desk import PRIOR, RUN, write_mini_desk

POSITION_COLUMNS = [c for c, _ in FILE_COLUMNS["positions.parquet"] + OPTIONAL_COLUMNS["positions.parquet"]]
REQUIRED = ("positions", "instruments", "option_marks", "underlying_marks", "rate_curves")


@pytest.fixture()
def desk(tmp_path: Path) -> Path:
    """The two-night mini desk under tmp_path/data."""
    return write_mini_desk(tmp_path / "data")


def _file(root: Path, day: dt.date, kind: str) -> Path:
    return folder_for(root, day) / f"{kind}.parquet"


def _replace_column(root: Path, kind: str, column: str, values: pa.Array) -> None:
    """Rewrite the run date's ``kind`` file with ``column`` replaced by ``values`` (any Arrow type)."""
    path = _file(root, RUN, kind)
    t = pq.read_table(path)
    pq.write_table(t.set_column(t.schema.get_field_index(column), column, values), path)


def test_missing_data_root_is_fatal(tmp_path: Path) -> None:
    """A data root that does not exist stops the run with a message naming it."""
    with pytest.raises(InputFileError, match="data folder not found") as err:
        available_dates(tmp_path / "nowhere")
    assert str(tmp_path / "nowhere") in str(err.value)


def test_missing_date_folder_is_fatal(desk: Path) -> None:
    """A run date without its as_of= folder stops the run naming the folder."""
    with pytest.raises(InputFileError, match=r"as_of=2026-12-01: folder for 2026-12-01 not found"):
        read_night(desk, dt.date(2026, 12, 1))


@pytest.mark.parametrize("kind", REQUIRED)
def test_missing_required_file_is_fatal(desk: Path, kind: str) -> None:
    """Each of the five required files, when absent, stops the run naming that file."""
    _file(desk, RUN, kind).unlink()
    with pytest.raises(InputFileError, match="required file is missing") as err:
        read_night(desk, RUN)
    assert str(_file(desk, RUN, kind)) in str(err.value)


def test_optional_fx_file_may_be_absent(desk: Path) -> None:
    """Without fx_rates.parquet the night reads, with no fx table and no fx hash."""
    _file(desk, RUN, "fx_rates").unlink()
    night = read_night(desk, RUN)
    assert "fx_rates.parquet" not in night.tables
    assert "fx_rates.parquet" not in night.hashes
    assert set(night.tables) == {f"{k}.parquet" for k in REQUIRED}


def test_every_file_is_hashed_with_sha256_of_its_bytes(desk: Path) -> None:
    """The recorded hash of each file is the SHA-256 of its bytes (reference: hashlib)."""
    night = read_night(desk, RUN)
    for file, digest in night.hashes.items():
        assert digest == hashlib.sha256((folder_for(desk, RUN) / file).read_bytes()).hexdigest()
    assert night.path("positions.parquet") == str(folder_for(desk, RUN) / "positions.parquet")


def test_truncated_parquet_is_fatal(desk: Path) -> None:
    """A Parquet file cut in half stops the run naming the file and saying it cannot be read."""
    path = _file(desk, RUN, "option_marks")
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    with pytest.raises(InputFileError, match="cannot be read as Parquet") as err:
        read_night(desk, RUN)
    assert str(path) in str(err.value)


def test_file_that_is_not_parquet_is_fatal(desk: Path) -> None:
    """A CSV saved under a .parquet name stops the run naming the file."""
    path = _file(desk, RUN, "positions")
    path.write_text("trade_id,book\nT1,Index vol\n")
    with pytest.raises(InputFileError, match="positions.parquet: cannot be read as Parquet"):
        read_night(desk, RUN)


@pytest.mark.parametrize(("kind", "column", "values", "wanted"), [
    ("positions", "quantity", pa.array(["10"] * 6), "float64"),
    ("positions", "trade_id", pa.array(range(6), pa.int64()), "string"),
    ("positions", "trade_date", pa.array([dt.datetime(2026, 11, 27)] * 6, pa.timestamp("s")), "date32"),
    ("instruments", "strike", pa.array(["100"] * 5), "float64"),
    ("instruments", "expiry", pa.array(["2027-06-18"] * 5), "date32"),
    ("option_marks", "implied_vol", pa.array([True] * 5), "float64"),
    ("underlying_marks", "spot", pa.array([Decimal("100.50")] * 2, pa.decimal128(10, 2)), "float64"),
])
def test_wrong_column_type_is_fatal(desk: Path, kind: str, column: str, values: pa.Array, wanted: str) -> None:
    """A column of a type the contract does not allow stops the run naming file, column and wanted type."""
    _replace_column(desk, kind, column, values)
    with pytest.raises(InputFileError) as err:
        read_night(desk, RUN)
    message = str(err.value)
    assert f"{kind}.parquet" in message and f"'{column}'" in message and wanted in message


MINI_DESK_FILES = [k for k in FILE_COLUMNS if k not in OPTIONAL_FILES - {"fx_rates.parquet"}]  # what it writes


@pytest.mark.parametrize(("kind", "column"), [(k, c) for k in MINI_DESK_FILES for c, _ in FILE_COLUMNS[k][:2]]
                         + [("positions.parquet", "trade_price")])
def test_missing_column_is_fatal(desk: Path, kind: str, column: str) -> None:
    """A required column that is absent stops the run naming the file and the column."""
    name = kind.removesuffix(".parquet")
    path = _file(desk, RUN, name)
    if not path.exists():  # an optional file the mini desk does not write
        pq.write_table(table(name, []), path)
    pq.write_table(pq.read_table(path).drop_columns([column]), path)
    with pytest.raises(InputFileError, match=f"{kind}: required column '{column}' is missing"):
        read_night(desk, RUN)


def test_extra_column_is_accepted_and_ignored(desk: Path) -> None:
    """A column the contract does not name is read past; the frame has exactly the contract's columns."""
    path = _file(desk, RUN, "positions")
    t = pq.read_table(path)
    pq.write_table(t.append_column("desk_note", pa.array(["x"] * t.num_rows)), path)
    frame = read_night(desk, RUN).tables["positions.parquet"]
    assert list(frame.columns) == POSITION_COLUMNS
    assert len(frame) == t.num_rows


def test_integer_column_is_accepted_for_float64(desk: Path) -> None:
    """An int64 quantity column reads as float64 with the same values."""
    _replace_column(desk, "positions", "quantity", pa.array([10, -5, 20, 6, 2, 1], pa.int64()))
    frame = read_night(desk, RUN).tables["positions.parquet"]
    assert frame["quantity"].dtype == np.float64
    np.testing.assert_array_equal(frame["quantity"].to_numpy(), [10.0, -5.0, 20.0, 6.0, 2.0, 1.0])


def test_integer_beyond_float_precision_reads_instead_of_failing_the_file(desk: Path) -> None:
    """An int64 above 2**53 becomes the nearest float64 (then judged by the row rules), not a crash."""
    _replace_column(desk, "positions", "quantity", pa.array([2**53 + 1, -5, 20, 6, 2, 1], pa.int64()))
    frame = read_night(desk, RUN).tables["positions.parquet"]
    np.testing.assert_allclose(frame["quantity"].iloc[0], 2.0**53, rtol=0, atol=2.0)


def test_float32_and_all_null_columns_are_accepted(desk: Path) -> None:
    """float32 widens to float64; a column of Arrow type null reads as all-null (NaN) float64."""
    _replace_column(desk, "option_marks", "price", pq.read_table(_file(desk, RUN, "option_marks"))
                    .column("price").cast(pa.float32()))
    _replace_column(desk, "positions", "trade_price", pa.nulls(6))
    night = read_night(desk, RUN)
    assert night.tables["option_marks.parquet"]["price"].dtype == np.float64
    assert night.tables["positions.parquet"]["trade_price"].isna().all()


def test_dictionary_encoded_and_large_strings_are_accepted(desk: Path) -> None:
    """Dictionary-encoded, large_string and string_view columns read as plain strings."""
    path = _file(desk, RUN, "positions")
    t = pq.read_table(path)
    t = t.set_column(0, "trade_id", t.column("trade_id").dictionary_encode())
    t = t.set_column(1, "book", t.column("book").cast(pa.large_string()))
    pq.write_table(t, path)
    assert pa.types.is_dictionary(pq.read_table(path).schema.field("trade_id").type)
    frame = read_night(desk, RUN).tables["positions.parquet"]
    assert frame["trade_id"].tolist() == ["T1", "T2", "T3", "T6", "T7", "T8"]
    assert frame["book"].iloc[2] == "Euro single names"
    view = pa.table({"instrument_id": pa.array(["A"], pa.string_view()), "price": [1.0], "implied_vol": [0.2]})
    pq.write_table(view, _file(desk, RUN, "option_marks"))
    frame, _ = read_file(folder_for(desk, RUN), "option_marks.parquet")
    assert frame is not None and frame["instrument_id"].tolist() == ["A"]


def test_date64_column_is_accepted_as_dates(desk: Path) -> None:
    """An Arrow date64 expiry (stored by Parquet as a day count) reads as the same calendar dates."""
    _replace_column(desk, "instruments", "expiry", pa.array([dt.date(2027, 6, 18)] * 5, pa.date64()))
    frame = read_night(desk, RUN).tables["instruments.parquet"]
    assert (frame["expiry"] == np.datetime64("2027-06-18")).all()


def test_empty_file_with_the_contract_schema_reads_as_zero_rows(desk: Path) -> None:
    """A file with zero rows and the contract's columns is a valid, empty table."""
    pq.write_table(table("positions", []), _file(desk, RUN, "positions"))
    frame = read_night(desk, RUN).tables["positions.parquet"]
    assert len(frame) == 0
    assert list(frame.columns) == POSITION_COLUMNS


def test_prior_date_is_the_latest_folder_strictly_before(tmp_path: Path) -> None:
    """The prior date is the latest as_of folder strictly before the run date; other names are ignored."""
    root = tmp_path / "data"
    for name in ("as_of=2026-11-25", "as_of=2026-11-27", "as_of=2026-11-30", "as_of=2026-12-01",
                 "as_of=2026-13-01", "notes", "as_of=2026-11-29.bak"):
        (root / name).mkdir(parents=True)
    (root / "as_of=2026-11-28").write_text("a file, not a folder")
    assert available_dates(root) == [dt.date(2026, 11, 25), dt.date(2026, 11, 27), dt.date(2026, 11, 30),
                                     dt.date(2026, 12, 1)]
    assert prior_date(root, dt.date(2026, 11, 30)) == dt.date(2026, 11, 27)
    assert prior_date(root, dt.date(2026, 11, 29)) == dt.date(2026, 11, 27)
    assert prior_date(root, dt.date(2026, 12, 5)) == dt.date(2026, 12, 1)
    with pytest.raises(InputFileError, match="no as_of folder before 2026-11-25"):
        prior_date(root, dt.date(2026, 11, 25))


def test_mini_desk_reads_with_contract_dtypes(desk: Path) -> None:
    """Both nights read with object strings, float64 numbers and dates, one row per written row."""
    for day in (PRIOR, RUN):
        night = read_night(desk, day)
        assert night.as_of == day
        positions = night.tables["positions.parquet"]
        assert positions["trade_id"].dtype == object
        assert positions["quantity"].dtype == np.float64
        assert np.issubdtype(positions["trade_date"].dtype, np.datetime64)
        assert len(positions) == 6


def test_strategy_column_is_optional(desk: Path) -> None:
    """positions.parquet without `strategy` reads it as all null; with it, the labels come through (contract v2)."""
    frame = read_night(desk, RUN).tables["positions.parquet"]
    assert frame["strategy"].isna().all()
    path = _file(desk, RUN, "positions")
    t = pq.read_table(path)
    labels = ["straddle"] + [None] * (t.num_rows - 1)
    pq.write_table(t.append_column("strategy", pa.array(labels, type=pa.string())), path)
    frame = read_night(desk, RUN).tables["positions.parquet"]
    assert frame["strategy"].tolist()[0] == "straddle" and frame["strategy"].iloc[1:].isna().all()


def test_strategy_of_the_wrong_type_is_fatal(desk: Path) -> None:
    """A `strategy` column that is not text stops the run naming the file and the column."""
    path = _file(desk, RUN, "positions")
    t = pq.read_table(path)
    pq.write_table(t.append_column("strategy", pa.array([1.0] * t.num_rows)), path)
    with pytest.raises(InputFileError, match="positions.parquet: column 'strategy' has type double"):
        read_night(desk, RUN)


def test_books_file_is_optional(desk: Path) -> None:
    """Without books.parquet the night has no books table; with it, its rows are read (contract v2)."""
    assert "books.parquet" not in read_night(desk, RUN).tables
    pq.write_table(table("books", [{"book": "B1", "desk": "Index vol"}]), _file(desk, RUN, "books"))
    frame = read_night(desk, RUN).tables["books.parquet"]
    assert frame.to_dict("records") == [{"book": "B1", "desk": "Index vol"}]
@pytest.mark.parametrize("kind", ["future_marks", "trade_activity", "cash_flows", "official_pnl"])
def test_version_two_file_missing_a_column_is_fatal(desk: Path, kind: str) -> None:
    """An optional version-2 file that is present must have the contract's columns: the run stops naming both."""
    from tests.contract_files import COLUMNS
    first = COLUMNS[kind][0][0]
    columns = {name: pa.array([], type=pa.string() if t == "string" else pa.float64()) for name, t in COLUMNS[kind]
               if name != first}
    pq.write_table(pa.table(columns), desk / f"as_of={RUN.isoformat()}" / f"{kind}.parquet")
    with pytest.raises(InputFileError, match=f"{kind}.parquet: required column '{first}' is missing"):
        read_night(desk, RUN)
