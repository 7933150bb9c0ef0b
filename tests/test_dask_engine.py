"""The night on a Dask cluster, split by book, gives the local engine's archive (attribution.dask_engine).

The reference is the package's own local engine (attribution.engine.prepare_night in one process):
the cluster must reproduce its archived rows exactly, text and amounts to the last bit: each position and
each book is computed by the same operations, whatever else is computed with it (README, "Running on a Dask
cluster"). The mini desk's marks come from QuantLib (tests/mini_desk.py); the synthetic night from
attribution.synthetic. One two-process local cluster serves the whole module.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import multiprocessing
import sys
from collections.abc import Iterator
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest

from attribution.cli import main
from attribution.config import JobConfig
from attribution.engine import prepare_night
from attribution.loading import InputFileError, folder_for, read_file, read_night
from attribution.runner import run_night
from attribution.synthetic import write_synthetic_night
from tests.contract_files import read_rows, table, write_folder
from tests.hedged_desk import write_whole_book
from tests.mini_desk import PRIOR, RUN, write_mini_desk

distributed = pytest.importorskip("distributed", reason='the Dask engine needs pip install -e ".[dask]"')

from attribution.dask_engine import PositionKeys, book_groups, position_keys, prepare_night_dask  # noqa: E402

SORT_KEYS = {"position_pnl": ["trade_id"], "book_pnl": ["book"], "book_quality": ["book"],
             "input_exceptions": ["file", "key", "rule", "detail", "severity"]}


@pytest.fixture(scope="module")
def client() -> Iterator[object]:
    """A two-worker, one-thread-each local cluster for the whole module.

    Its scheduler's HTTP port is a free one, so that the cluster a run starts for itself finds the
    default port unused.
    """
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=":0") as cluster, distributed.Client(cluster) as c:
        yield c


def _rows(path: Path, kind: str) -> list[dict[str, object]]:
    return pq.read_table(path / f"{kind}.parquet").to_pylist()


def _write(folder: Path, kind: str, rows: list[dict[str, object]]) -> None:
    pq.write_table(table(kind, rows), folder / f"{kind}.parquet")


def _position(trade: str | None, book: str | None, instrument: str, quantity: float, day: dt.date,
              price: float | None = None) -> dict[str, object]:
    return {"trade_id": trade, "book": book, "instrument_id": instrument, "quantity": quantity,
            "trade_date": day, "trade_price": price}


def write_planted_desk(root: Path) -> Path:
    """The mini desk with more books and planted faults (common practice, no source: each is a
    rule of the data contract): a trade moving book, a trade_id booked in two books, a null, a blank
    and a keyless row, a position in an unknown instrument, a missing mark, a duplicated instrument row."""
    write_mini_desk(root)
    f0, f1 = folder_for(root, PRIOR), folder_for(root, RUN)
    p0, p1 = _rows(f0, "positions"), _rows(f1, "positions")
    for k in range(4):
        for rows, day in ((p0, PRIOR), (p1, RUN)):
            rows.append(_position(f"D{k}", "Dispersion", "ZEN-C100-J27", 1.0 + k, day))
    p0 += [_position("S1", "Skew", "ZEN-C100-J27", 5.0, PRIOR), _position("N1", "Skew", "ZEN-C100-J27", 2.0, PRIOR),
           _position("B1", "  ", "ZEN-C100-J27", 1.0, PRIOR)]
    p1 += [_position("S1", "Dispersion", "ZEN-C100-J27", 5.0, RUN),           # moved book: Skew -> Dispersion
           _position("N1", None, "ZEN-C100-J27", 2.0, RUN),                   # null book on the run date
           _position("X1", "Index vol", "ZEN-C100-J27", 1.0, RUN, 10.0),      # one trade_id in two books
           _position("X1", "Euro single names", "QRX-C50-F27", 1.0, RUN, 1.0),
           _position(None, "Dispersion", "ZEN-C100-J27", 3.0, RUN, 9.0),     # no trade_id
           _position("U1", "Skew", "NOT-LISTED", 1.0, RUN, 1.0)]             # unknown instrument
    _write(f0, "positions", p0)
    _write(f1, "positions", p1)
    _write(f1, "option_marks", [m for m in _rows(f1, "option_marks") if m["instrument_id"] != "ZEN-P120-M27"])
    instruments = _rows(f1, "instruments")
    _write(f1, "instruments", instruments + [i for i in instruments if i["instrument_id"] == "QRX-C50-F27"])
    return root


@pytest.fixture(scope="module")
def desks(tmp_path_factory: pytest.TempPathFactory) -> dict[str, tuple[Path, dt.date]]:
    """The mini desk, a 5,000-position synthetic night and the planted desk, written once."""
    root = tmp_path_factory.mktemp("desks")
    synthetic = write_synthetic_night(root / "synthetic", positions=5000, books=12, instruments=400, underlyings=20)
    return {"mini": (write_mini_desk(root / "mini"), RUN), "synthetic": (synthetic.data_root, synthetic.run),
            "planted": (write_planted_desk(root / "planted"), RUN), "whole": (_whole_book(root / "whole"), RUN)}


def _whole_book(root: Path) -> Path:
    """The hedged desk with activity, cash flows and official P&L, plus an activity row of no trade, a cash
    flow of a book without positions and a trade moved between books (tests/hedged_desk.py)."""
    write_whole_book(root)
    rows = read_rows(root, RUN, "trade_activity") + [
        {"activity_id": "A9", "trade_id": "NOPE", "kind": "increase", "quantity": 1.0, "price": 2.0}]
    flows = read_rows(root, RUN, "cash_flows") + [
        {"flow_id": "C9", "book": "Ghost book", "trade_id": None, "currency": "USD", "amount": 7.0, "kind": "other"}]
    write_folder(root, RUN, {"trade_activity": rows, "cash_flows": flows})
    return root


def _archive_tables(archive: Path) -> dict[str, pd.DataFrame]:
    con = duckdb.connect(str(archive), read_only=True)
    try:
        frames = {"position_pnl": con.execute("SELECT * FROM position_pnl").df(),
                  "book_pnl": con.execute("SELECT * FROM book_pnl").df(),
                  "input_exceptions": con.execute("SELECT * FROM input_exceptions").df(),
                  "book_quality": con.execute("SELECT * FROM book_quality").df()}
    finally:
        con.close()
    return {name: f.sort_values(SORT_KEYS[name]).reset_index(drop=True) for name, f in frames.items()}


def _run(data: Path, as_of: dt.date, out: Path, *extra: str) -> int:
    return main(["run", "--as-of", as_of.isoformat(), "--data", str(data), "--archive", str(out / "archive.duckdb"),
                 "--reports", str(out / "reports"), *extra])


def _assert_same(local: pd.DataFrame, cluster: pd.DataFrame) -> None:
    pd.testing.assert_frame_equal(local, cluster, check_exact=True)


def _sorted_ledger(frame: pd.DataFrame) -> pd.DataFrame:
    return frame.sort_values(SORT_KEYS["input_exceptions"]).reset_index(drop=True)


@pytest.mark.parametrize("desk", ["mini", "synthetic", "planted", "whole"])
def test_cluster_archive_equals_local(desk, desks, client, tmp_path):
    """position_pnl, book_pnl, input_exceptions and book_quality rows, and the exit code, are the local engine's."""
    data, as_of = desks[desk]
    local_code = _run(data, as_of, tmp_path / "local", "--no-reports")
    scheduler = client.scheduler.address
    cluster_code = _run(data, as_of, tmp_path / "dask", "--no-reports", "--engine", "dask", "--scheduler", scheduler)
    assert cluster_code == local_code
    local, cluster = _archive_tables(tmp_path / "local" / "archive.duckdb"), _archive_tables(
        tmp_path / "dask" / "archive.duckdb")
    for name in SORT_KEYS:
        assert len(local[name]) > 0 or name == "input_exceptions"
        _assert_same(local[name], cluster[name])


@pytest.mark.parametrize("desk", ["mini", "synthetic", "planted", "whole"])
def test_prepared_night_equals_local_in_row_order(desk, desks, client):
    """Positions in the local engine's row order, books by book, the same ledger rows, counts and hashes."""
    data, as_of = desks[desk]
    config = dataclasses.replace(JobConfig(), data_root=data)
    local = prepare_night(config, as_of)
    cluster = prepare_night_dask(config, as_of, client=client)
    _assert_same(local.positions, cluster.positions)
    _assert_same(local.books, cluster.books)
    _assert_same(_sorted_ledger(local.exceptions), _sorted_ledger(cluster.exceptions))
    assert (cluster.positions_in, cluster.rejected_positions, cluster.unaccounted, cluster.hashes) == (
        local.positions_in, local.rejected_positions, local.unaccounted, local.hashes)
    assert local.dividend_schedule is not None and cluster.dividend_schedule is not None
    pd.testing.assert_frame_equal(local.dividend_schedule, cluster.dividend_schedule, check_exact=True)
    assert [name for name, _ in cluster.stages] == ["cluster", "merge"]


def test_planted_faults_keep_conservation(desks, client):
    """Every planted fault is rejected as locally, and every position is archived or rejected, none twice."""
    data, as_of = desks["planted"]
    night = prepare_night_dask(dataclasses.replace(JobConfig(), data_root=data), as_of, client=client)
    assert night.positions_in == len(night.positions) + night.rejected_positions
    assert night.unaccounted == ()
    rules = set(night.exceptions["rule"])
    assert {"duplicate trade_id", "book is null", "trade_id is null", "duplicate instrument_id",
            "trade rejected on the other date"} <= rules
    duplicate_instrument = night.exceptions[night.exceptions["rule"] == "duplicate instrument_id"]
    assert len(duplicate_instrument) == 2  # both copies, as the local ledger has them, not one per worker
    moved = night.positions.set_index("trade_id").loc["S1"]
    assert (moved["book"], moved["status"]) == ("Skew", "carried") and "moved_book" in moved["flags"]
    assert not night.positions["trade_id"].duplicated().any()


def test_books_sharing_a_trade_stay_in_one_group(desks):
    """A moved trade, a trade_id in two books and the rows without a book tie their books into one group,
    which comes first and alone takes the rows without a book."""
    data, as_of = desks["planted"]
    keys = position_keys(dataclasses.replace(JobConfig(), data_root=data), PRIOR, as_of)
    groups = book_groups(keys, 8)
    assert [g.books for g in groups] == [frozenset({"Skew", "Dispersion"}),
                                         frozenset({"Index vol", "Euro single names"})]
    assert [g.keep_null_books for g in groups] == [True, False]
    assert sum(g.positions for g in groups) == len(keys[0].book) + len(keys[1].book)


def test_groups_balance_position_counts():
    """Independent books are spread so that no group holds much more than its share (largest first)."""
    rng = np.random.default_rng(11)
    book = np.array([f"Book {k:02d}" for k in rng.integers(0, 40, 20_000)], dtype=object)
    trade = np.array([f"T{k}" for k in range(len(book))], dtype=object)
    keys = (PositionKeys(trade, book, np.zeros(len(book), dtype=bool)),
            PositionKeys(trade[:0], book[:0], np.zeros(0, dtype=bool)))
    groups = book_groups(keys, 4)
    sizes = [g.positions for g in groups]
    assert len(groups) == 4 and sum(sizes) == 20_000
    assert max(sizes) - min(sizes) <= pd.Series(book).value_counts().max()
    assert book_groups(keys, 4) == groups  # deterministic
    assert frozenset().union(*(g.books for g in groups)) == frozenset(book)


def test_read_night_keeps_only_the_books_asked(desks):
    """Only the named books' rows (and blank-book rows when asked) are read, indexed by their row in the
    file; the hash is still the whole file's."""
    data, as_of = desks["planted"]
    folder = folder_for(data, as_of)
    whole, digest = read_file(folder, "positions.parquet")
    part, part_digest = read_file(folder, "positions.parquet", frozenset({"Dispersion"}), keep_null_books=True)
    assert part_digest == digest
    expected = whole[(whole["book"] == "Dispersion") | whole["book"].isna()]
    pd.testing.assert_frame_equal(part, expected)
    without_null = read_night(data, as_of, frozenset({"Dispersion"}), keep_null_books=False)
    assert set(without_null.tables["positions.parquet"]["book"]) == {"Dispersion"}
    assert len(without_null.tables["instruments.parquet"]) == len(read_night(data, as_of).tables[
        "instruments.parquet"])


def test_local_cluster_started_for_the_run(desks, tmp_path, capsys):
    """Without --scheduler a local cluster is started for the run, closed after it, and the summary printed."""
    data, as_of = desks["mini"]
    before = {c.pid for c in multiprocessing.active_children()}
    assert _run(data, as_of, tmp_path, "--engine", "dask") == 0
    assert {c.pid for c in multiprocessing.active_children()} <= before  # its worker processes are gone
    out = capsys.readouterr().out
    assert "8 in = 8 archived + 0 rejected" in out and "report" in out


def test_run_night_uses_the_client_given(desks, client, tmp_path):
    """A client passed to run_night (as a backfill would keep one) is used, not replaced, and stays open."""
    data, as_of = desks["mini"]
    config = dataclasses.replace(JobConfig(), data_root=data, archive_path=tmp_path / "archive.duckdb",
                                 write_reports=False, engine="dask")
    outcome = run_night(config, as_of, client=client)
    assert (outcome.exit_code, outcome.archived) == (0, 8)
    assert [name for name, _ in outcome.stages] == ["cluster", "merge", "archive"]
    assert client.status == "running"


def test_missing_input_file_fails_as_locally(desks, client, tmp_path):
    """A missing file of a worker's read stops the night with the local engine's message (exit 1)."""
    data, as_of = desks["mini"]
    copy = tmp_path / "data"
    for day in (PRIOR, as_of):
        target = folder_for(copy, day)
        target.mkdir(parents=True)
        for path in folder_for(data, day).iterdir():
            if not (day == as_of and path.name == "instruments.parquet"):
                (target / path.name).write_bytes(path.read_bytes())
    config = dataclasses.replace(JobConfig(), data_root=copy)
    with pytest.raises(InputFileError) as local:
        prepare_night(config, as_of)
    with pytest.raises(InputFileError) as cluster:
        prepare_night_dask(config, as_of, client=client)
    assert str(cluster.value) == str(local.value)
    (folder_for(copy, as_of) / "positions.parquet").unlink()
    with pytest.raises(InputFileError, match="positions.parquet: required file is missing"):
        prepare_night_dask(config, as_of, client=client)


def test_missing_dask_names_the_install_command(desks, tmp_path, monkeypatch, capsys):
    """Without dask installed, --engine dask exits 1 naming pip install -e ".[dask]"; no archive is made."""
    monkeypatch.setitem(sys.modules, "distributed", None)  # the import then raises ImportError
    data, as_of = desks["mini"]
    assert _run(data, as_of, tmp_path, "--engine", "dask") == 1
    assert 'pip install -e ".[dask]"' in capsys.readouterr().err
    assert not (tmp_path / "archive.duckdb").exists()


def test_unreachable_scheduler_fails_with_its_address(desks, tmp_path, capsys):
    """A scheduler address nobody answers at ends the run with exit 1 naming the address."""
    import dask
    data, as_of = desks["mini"]
    with dask.config.set({"distributed.comm.timeouts.connect": "1s"}):
        code = _run(data, as_of, tmp_path, "--engine", "dask", "--scheduler", "tcp://127.0.0.1:9")
    assert code == 1
    assert "cannot reach the Dask scheduler at tcp://127.0.0.1:9" in capsys.readouterr().err


def test_blank_book_rows_follow_keep_null_books(tmp_path):
    """Null, empty and white-space books are read only with keep_null_books; other books only when named."""
    write_mini_desk(tmp_path)
    folder = folder_for(tmp_path, RUN)
    rows = _rows(folder, "positions")
    for k, name in enumerate([None, "", " \t", "Index vol "]):
        rows.append(_position(f"Z{k}", name, "ZEN-C100-J27", 1.0, RUN, 1.0))
    _write(folder, "positions", rows)
    kept, _ = read_file(folder, "positions.parquet", frozenset(), keep_null_books=True)
    assert kept["trade_id"].tolist() == ["Z0", "Z1", "Z2"]
    assert kept.index.tolist() == [6, 7, 8]
    dropped, _ = read_file(folder, "positions.parquet", frozenset({"Index vol "}), keep_null_books=False)
    assert dropped["trade_id"].tolist() == ["Z3"]
