"""The DuckDB archive: a rerun replaces a date in every table, a failed run changes nothing, each run is
recorded with its inputs' hashes and settings, and every SQL statement takes its values as parameters.

Shared archive checks (checksums, night rows) live in tests/archive_checks.py.
"""

from __future__ import annotations

import ast
import contextlib
import datetime as dt
import hashlib
import json
import re
import shutil
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
import pytest

import attribution
import attribution.archive as archive_module
import attribution.engine as engine_module
from attribution.cli import main
from attribution.config import JobConfig
from attribution.quality_table import quality_columns
from attribution.schema import TABLES
from tests.archive_checks import assert_same_rows, checksums, night_rows
from tests.contract_files import put_rows
from tests.mini_desk import PRIOR, RUN, write_mini_desk


def read_archive(path: Path, as_of: dt.date) -> tuple[dict[str, tuple[int, int]], dict[str, pd.DataFrame]]:
    """All-row checksums and one night's rows, read-only."""
    con = duckdb.connect(str(path), read_only=True)
    try:
        return checksums(con), night_rows(con, as_of)
    finally:
        con.close()


# ---------------------------------------------------------------- a mini desk with one rejected position

@pytest.fixture(scope="module")
def desk(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The mini desk, plus a run-date position in an unknown instrument and a dividend beyond every expiry
    (so every table gets rows)."""
    root = write_mini_desk(tmp_path_factory.mktemp("archive") / "data")
    for day in (PRIOR, RUN):
        put_rows(root, day, "dividends", [{"underlying": "ZEN", "ex_date": dt.date(2027, 12, 1), "amount": 0.5}])
    path = root / f"as_of={RUN.isoformat()}" / "positions.parquet"
    positions = pq.read_table(path)
    extra = pa.Table.from_pylist([{"trade_id": "TX", "book": "Index vol", "instrument_id": "NO-SUCH-OPTION",
                                   "quantity": 1.0, "trade_date": RUN, "trade_price": 1.0}], schema=positions.schema)
    pq.write_table(pa.concat_tables([positions, extra]), path)
    return root


def run(data: Path, box: Path, reports: bool = False) -> int:
    """``attribution run`` of the mini desk's run date in ``box`` (BUS/252; no reports unless asked: the archive is
    tested).

    Archive and reports are named relative to ``box``, so copies of a box record the same settings.
    """
    with contextlib.chdir(box):
        return main(["run", "--as-of", RUN.isoformat(), "--data", str(data), "--archive", "a.duckdb",
                     "--reports", "reports", "--basis", "BUS/252", *([] if reports else ["--no-reports"])])


@pytest.fixture(scope="module")
def archived(desk: Path, tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A folder whose archive holds one run of the desk's run date."""
    box = tmp_path_factory.mktemp("archived")
    assert run(desk, box) == 3  # the rejected position makes it exit 3
    return box


def copy_of(box: Path, into: Path) -> Path:
    """A private copy of an archive folder."""
    shutil.copytree(box, into, ignore=shutil.ignore_patterns("*.lock"))
    return into


def test_quality_rows_go_to_arrow_as_a_frame_of_them_would():
    """The book_quality rows the archive takes straight from the quality test's columns hold the values, NULLs and
    texts that converting a frame of those columns gives: a one-night book (no statistic: NULL), a missing zone."""
    series = pd.DataFrame({"as_of": pd.to_datetime(["2026-01-05", "2026-01-05", "2026-01-06", "2026-01-07"]),
                           "book": ["B", "A", "A", "A"], "hpl": [1.0, 2.0, -1.5, 0.25],
                           "rtpl": [0.9, 2.1, -1.4, 0.5]})
    columns = quality_columns(series, dt.date(2026, 1, 7))
    columns["zone_60"] = np.array([None, "green"], dtype=object)
    direct = archive_module.column_rows(columns, "book_quality")
    framed = archive_module.arrow_table(pd.DataFrame(columns), "book_quality")
    assert direct.column_names == framed.column_names == [name for name, _ in TABLES["book_quality"]]
    for name in direct.column_names:
        assert direct.column(name).to_pylist() == framed.column(name).to_pylist(), name
    assert direct.column("spearman").to_pylist()[1] is None and direct.column("zone_60").null_count == 1


def test_rerun_replaces_the_date_in_every_table(archived, desk, tmp_path):
    """A rerun leaves each table with the same rows for the date as one run: nothing duplicated, nothing lost."""
    box = copy_of(archived, tmp_path / "box")
    sums_once, rows_once = read_archive(box / "a.duckdb", RUN)
    assert all(len(rows_once[t]) > 0 for t in TABLES), {t: len(f) for t, f in rows_once.items()}
    assert run(desk, box) == 3
    sums_twice, rows_twice = read_archive(box / "a.duckdb", RUN)
    assert {t: n for t, (n, _) in sums_twice.items()} == {t: n for t, (n, _) in sums_once.items()}
    assert_same_rows(rows_twice, rows_once)
    assert rows_twice["position_pnl"]["trade_id"].is_unique and rows_twice["book_pnl"]["book"].is_unique
    assert len(rows_twice["runs"]) == 1


def test_one_session_writing_a_date_twice_replaces_it(archived, desk, tmp_path):
    """A session (a backfill holds one) skips the deletes only for a date it knows has no row: a date the archive
    held when the session opened, and a date the session wrote itself, are both replaced, never duplicated."""
    box = copy_of(archived, tmp_path / "box")
    sums_once, rows_once = read_archive(box / "a.duckdb", RUN)
    config = JobConfig(data_root=desk, archive_path=Path("a.duckdb"), reports_dir=Path("reports"),
                       write_reports=False, time_basis="BUS/252")  # the settings `run` records
    with contextlib.chdir(box), engine_module.open_archive(config) as session:
        assert session.holds(RUN) and not session.holds(PRIOR)
        for _ in range(2):
            engine_module.run_night(config, RUN, session=session)
        assert session.holds(RUN)
    sums_thrice, rows_thrice = read_archive(box / "a.duckdb", RUN)
    assert {t: n for t, (n, _) in sums_thrice.items()} == {t: n for t, (n, _) in sums_once.items()}
    assert_same_rows(rows_thrice, rows_once)


def test_rerun_with_changed_inputs_leaves_no_stale_rows(archived, desk, tmp_path):
    """A rerun after a position left the run date's file drops that position's old row (replace, not merge)."""
    box = copy_of(archived, tmp_path / "box")
    data = shutil.copytree(desk, tmp_path / "data")
    path = data / f"as_of={RUN.isoformat()}" / "positions.parquet"
    positions = pq.read_table(path)
    pq.write_table(positions.filter(pc.not_equal(positions["trade_id"], "T8")), path)
    assert "T8" in set(read_archive(box / "a.duckdb", RUN)[1]["position_pnl"]["trade_id"])
    assert run(data, box) == 3
    _, rows = read_archive(box / "a.duckdb", RUN)
    assert sorted(rows["position_pnl"]["trade_id"]) == ["T1", "T2", "T3", "T4", "T5", "T6", "T7"]
    assert int(rows["runs"]["positions_in"].iloc[0]) == 8  # T1-T7 and the rejected TX
    assert len(rows["runs"]) == 1


def _fail_quality(series: pd.DataFrame, as_of: object) -> pd.DataFrame:
    raise RuntimeError("injected failure in the quality step")


def _fail_runs_insert(original):
    def insert(con: duckdb.DuckDBPyConnection, table: str, frame: pd.DataFrame) -> None:
        if table == "runs":
            raise RuntimeError("injected failure inserting the run record")
        original(con, table, frame)
    return insert


@pytest.mark.parametrize("where", ["quality step", "run record insert"])
def test_failed_write_leaves_the_archive_exactly_as_it_was(archived, desk, tmp_path, monkeypatch, capsys, where):
    """A failure inside begin_night after its deletes rolls everything back; the run exits 1 naming the error."""
    box = copy_of(archived, tmp_path / "box")
    before, rows_before = read_archive(box / "a.duckdb", RUN)
    if where == "quality step":
        monkeypatch.setattr(archive_module, "quality_columns", _fail_quality)
    else:
        monkeypatch.setattr(archive_module, "_insert", _fail_runs_insert(archive_module._insert))
    capsys.readouterr()
    assert run(desk, box) == 1
    assert "injected failure" in capsys.readouterr().err
    after, rows_after = read_archive(box / "a.duckdb", RUN)
    assert after == before
    assert_same_rows(rows_after, rows_before)


def _commit_fails_like_a_full_disk(con: duckdb.DuckDBPyConnection) -> None:
    """COMMIT failing the way DuckDB's does when the disk is full.

    Checked on DuckDB 2.0 with a 3 MB tmpfs: COMMIT raises "TransactionContext Error: Failed to
    commit: Could not write file ... .wal: No space left on device" and has already ended the
    transaction, so a following ROLLBACK raises "cannot rollback - no transaction is active".
    """
    con.execute("ROLLBACK")
    raise duckdb.TransactionException("TransactionContext Error: Failed to commit: Could not write "
                                      "file \"a.duckdb.wal\": No space left on device")


@pytest.mark.parametrize("pages", [False, True])
def test_failed_commit_reports_its_own_cause(archived, desk, tmp_path, monkeypatch, capsys, pages):
    """When COMMIT itself fails (disk full), the run exits 1 with that cause, not a rollback error; no change.
    With pages, the commit fails while they are rendered: none is published (their temporary folder removed)."""
    box = copy_of(archived, tmp_path / "box")
    before, _ = read_archive(box / "a.duckdb", RUN)
    monkeypatch.setattr(archive_module, "_commit", _commit_fails_like_a_full_disk)
    capsys.readouterr()
    assert run(desk, box, reports=pages) == 1
    err = capsys.readouterr().err
    assert "No space left on device" in err and "cannot rollback" not in err, err
    assert read_archive(box / "a.duckdb", RUN)[0] == before
    assert not (box / "reports").exists() or list((box / "reports").iterdir()) == []


def test_archive_of_an_earlier_version_gains_the_new_columns_and_keeps_its_rows(archived, desk, tmp_path):
    """An archive without the version-2 columns is extended in place: old rows kept (NULL there), new night written."""
    box = copy_of(archived, tmp_path / "old")
    con = duckdb.connect(str(box / "a.duckdb"))
    names = {t: [c for c, _ in TABLES[t]] for t in ("position_pnl", "book_pnl")}
    v2 = {t: names[t][names[t].index(first):] for t, first in (("position_pnl", "kind"), ("book_pnl", "desk"))}
    con.execute("UPDATE runs SET as_of = as_of - 1")  # keep a row per table that the rerun will not replace
    for table, columns in v2.items():
        con.execute(f"UPDATE {table} SET as_of = as_of - 1")
        for column in columns:
            con.execute(f'ALTER TABLE {table} DROP COLUMN "{column}"')
    con.close()
    assert run(desk, box) == 3
    con = duckdb.connect(str(box / "a.duckdb"), read_only=True)
    try:
        for table, columns in v2.items():
            names = [r[0] for r in con.execute(f"DESCRIBE {table}").fetchall()]
            assert names == [c for c, _ in TABLES[table]]
            old = con.execute(f"SELECT count(*), count({columns[-1]}) FROM {table} WHERE as_of < ?", [RUN]).fetchone()
            assert old[0] > 0 and (table == "position_pnl" or old[1] == 0)
        missing_kind = "SELECT count(*) FROM position_pnl WHERE as_of = ? AND kind IS NULL"
        assert con.execute(missing_kind, [RUN]).fetchone()[0] == 0
    finally:
        con.close()


def test_run_record_holds_input_hashes_and_settings(archived, desk):
    """The runs row names every input file with its SHA-256 (checked with hashlib) and the job's settings."""
    _, rows = read_archive(archived / "a.duckdb", RUN)
    record = rows["runs"].iloc[0]
    hashes = json.loads(record["input_hashes"])
    files = sorted(p for d in (PRIOR, RUN) for p in (desk / f"as_of={d.isoformat()}").glob("*.parquet"))
    assert len(files) == 14  # six files and a dividends file per date
    assert hashes == {str(p): hashlib.sha256(p.read_bytes()).hexdigest() for p in files}
    settings = json.loads(record["job_settings"])
    expected = JobConfig(data_root=desk, archive_path=Path("a.duckdb"), reports_dir=Path("reports"),
                         time_basis="BUS/252", write_reports=False)
    assert settings == json.loads(json.dumps(expected.as_record()))
    assert record["tool_version"] == attribution.__version__ and record["status"] == "complete"
    assert pd.Timestamp(record["prior_as_of"]).date() == PRIOR and int(record["exit_code"]) == 3
    assert int(record["positions_in"]) == int(record["positions_archived"]) + int(record["positions_rejected"])
    assert int(record["positions_archived"]) == len(rows["position_pnl"])


# ---------------------------------------------------------------- SQL takes values as parameters

SQL_WORDS = re.compile(r"\b(SELECT|INSERT|DELETE|UPDATE|CREATE|DROP|ALTER|ATTACH|COPY|PRAGMA)\b")

# Expressions that may be formatted into SQL: table and column names taken from attribution.schema
# (checked below to be plain identifiers), never a value. A new one needs a reviewer's look.
ALLOWED_IN_SQL = {
    "archive.py": {"table", "body", "view", "column"},
    "report/queries.py": {"_columns(BOOK_PNL)", "_columns(BOOK_QUALITY)", "_columns(RUNS)", "terms", "row_cols",
                  "underlying_cols", "rest_terms",  # column lists of TERM_COLUMNS and EXPOSURE_COLUMNS
                  "exception_cols"},
    "periods.py": {"_COUNT_SUMS", "_AMOUNT_SUMS", "_BOOK_RUNNING", "_DESK_RUNNING", "_PERIOD_SUMS", "_BOOK_NIGHTS",
                   "_DESK_NIGHTS", "_RANGE", "key", "window", "c", "suffix", "since", "period"},
}


def _is_sql(node: ast.AST) -> bool:
    if isinstance(node, ast.Constant) and isinstance(node.value, str):
        return bool(SQL_WORDS.search(node.value))
    if isinstance(node, ast.JoinedStr):
        return any(_is_sql(part) for part in node.values)
    return False


def sql_formatting_findings(source: str, file_name: str) -> list[str]:
    """Places where ``source`` formats something other than an allowed identifier list into SQL text."""
    allowed = ALLOWED_IN_SQL.get(file_name, set())
    findings = []
    for node in ast.walk(ast.parse(source)):
        where = f"{file_name}:{getattr(node, 'lineno', '?')}"
        if isinstance(node, ast.JoinedStr) and _is_sql(node):
            for part in node.values:
                if isinstance(part, ast.FormattedValue) and ast.unparse(part.value) not in allowed:
                    findings.append(f"{where}: f-string puts {ast.unparse(part.value)!r} into SQL")
        elif isinstance(node, ast.BinOp) and isinstance(node.op, ast.Mod | ast.Add) and \
                (_is_sql(node.left) or _is_sql(node.right)):
            findings.append(f"{where}: SQL built with {type(node.op).__name__}")
        elif isinstance(node, ast.Call) and isinstance(node.func, ast.Attribute) and \
                node.func.attr == "format" and _is_sql(node.func.value):
            findings.append(f"{where}: SQL built with str.format")
    return sorted(findings, key=lambda f: int(f.split(":")[1]))


def test_every_sql_statement_takes_values_as_parameters():
    """No f-string, %-format, + or .format puts anything but a schema identifier list into SQL in attribution/."""
    package = Path(attribution.__file__).parent
    sources = sorted(package.rglob("*.py"))
    assert package / "report" / "queries.py" in sources  # the scan reaches into sub-packages
    findings = [f for path in sources for f in
                sql_formatting_findings(path.read_text(encoding="utf-8"), path.relative_to(package).as_posix())]
    assert findings == []


def test_sql_scan_flags_values_formatted_into_statements():
    """The scan above catches each way of formatting a value into SQL (so its silence means something)."""
    bad = '''
def f(con, as_of, book):
    con.execute(f"DELETE FROM position_pnl WHERE as_of = '{as_of}'")
    con.execute("SELECT * FROM book_pnl WHERE book = '%s'" % book)
    con.execute("SELECT * FROM book_pnl WHERE book = '" + book + "'")
    con.execute("SELECT * FROM runs WHERE as_of = '{}'".format(as_of))
    con.execute(f"INSERT INTO {table} SELECT 1")
'''
    findings = sql_formatting_findings(bad, "archive.py")
    assert [f.split(": ", 1)[1] for f in findings] == [
        "f-string puts 'as_of' into SQL", "SQL built with Mod", "SQL built with Add",
        "SQL built with str.format"]


def test_schema_names_are_plain_identifiers():
    """Every table and column name is a lower-case identifier, so formatting them into SQL cannot inject."""
    names = [t for t in TABLES] + [c for cols in TABLES.values() for c, _ in cols]
    assert all(re.fullmatch(r"[a-z][a-z0-9_]*", n) for n in names), [n for n in names
                                                                    if not re.fullmatch(r"[a-z][a-z0-9_]*", n)]


def test_a_file_holding_a_foreign_position_pnl_table_is_left_as_it_was(tmp_path, capsys):
    """An archive file whose position_pnl is another program's: the run fails (1) naming it, bytes unchanged."""
    write_mini_desk(tmp_path / "data")
    path = tmp_path / "other.duckdb"
    with duckdb.connect(str(path)) as con:
        con.execute("CREATE TABLE position_pnl (id INTEGER, label VARCHAR)")
        con.execute("INSERT INTO position_pnl VALUES (1, 'kept')")
    before = hashlib.sha256(path.read_bytes()).hexdigest()
    code = main(["run", "--as-of", RUN.isoformat(), "--data", str(tmp_path / "data"), "--archive", str(path),
                 "--no-reports"])
    assert code == 1
    assert "table position_pnl is not an archive table of this job" in capsys.readouterr().err
    assert hashlib.sha256(path.read_bytes()).hexdigest() == before
    with duckdb.connect(str(path), read_only=True) as con:
        assert [r[0] for r in con.execute("SELECT table_name FROM information_schema.tables").fetchall()] == [
            "position_pnl"]


def _memory_limit(con: duckdb.DuckDBPyConnection) -> str:
    return con.execute("SELECT current_setting('memory_limit')").fetchall()[0][0]


def test_night_rows_go_in_with_duckdbs_memory_capped_and_the_cap_is_lifted_after(archived, desk, tmp_path,
                                                                                 monkeypatch):
    """Every insert of a large night, and its commit, run under the write cap (DuckDB lets go of the blocks it
    wrote); between them, for the reports' reads, and after the commit the connection has its memory limit as
    before. The mini desk's night is made "large" by a threshold of 0 bytes."""
    monkeypatch.setattr(archive_module, "CAP_WRITE_FROM_BYTES", 0)
    box = copy_of(archived, tmp_path / "box")
    during, around, commit_limits = [], [], []
    insert, begin, commit = archive_module._insert, engine_module.begin_night, archive_module.OpenNight.commit
    committing = archive_module._commit

    def capped_insert(con, table, rows):
        during.append(_memory_limit(con))
        insert(con, table, rows)

    def watched_commit(con):
        commit_limits.append(_memory_limit(con))
        committing(con)

    def begin_night(con, *args, **kwargs):
        around.append(_memory_limit(con))
        return begin(con, *args, **kwargs)

    def committed(self, *args, **kwargs):
        around.append(_memory_limit(self.con))  # the reads' limit
        commit(self, *args, **kwargs)
        around.append(_memory_limit(self.con))

    monkeypatch.setattr(archive_module, "_insert", capped_insert)
    monkeypatch.setattr(engine_module, "begin_night", begin_night)
    monkeypatch.setattr(archive_module.OpenNight, "commit", committed)
    monkeypatch.setattr(archive_module, "_commit", watched_commit)
    assert run(desk, box, reports=True) == 3  # (the pages' reads come before the commit)
    cap = duckdb.connect()
    cap.execute(archive_module.SET_WRITE_MEMORY)
    assert len(during) >= 4 and set(during) == {_memory_limit(cap)}
    cap.close()
    [before, reads, after] = around
    assert before == reads == after != during[0]
    assert commit_limits == [during[0]]


def test_a_small_night_goes_in_uncapped(archived, desk, tmp_path, monkeypatch):
    """Below the threshold (the mini desk's night is a few kB) the memory limit is never changed."""
    box = copy_of(archived, tmp_path / "box")
    during = []
    insert = archive_module._insert

    def watched_insert(con, table, rows):
        during.append(_memory_limit(con))
        insert(con, table, rows)

    monkeypatch.setattr(archive_module, "_insert", watched_insert)
    assert run(desk, box) == 3
    default = _memory_limit(duckdb.connect())
    assert len(during) >= 4 and set(during) == {default}


def test_a_file_holding_the_inserts_arrow_name_is_refused(tmp_path, capsys):
    """A table named as the inserts read their Arrow rows would be read in their place: such a file is refused
    (exit 1, naming the table) and left as it was."""
    write_mini_desk(tmp_path / "data")
    path = tmp_path / "a.duckdb"
    with duckdb.connect(str(path)) as con:
        con.execute(f"CREATE TABLE {archive_module.ARROW_ROWS.upper()} (id INTEGER)")
    before = hashlib.sha256(path.read_bytes()).hexdigest()
    code = main(["run", "--as-of", RUN.isoformat(), "--data", str(tmp_path / "data"), "--archive", str(path),
                 "--no-reports"])
    assert code == 1
    assert f"named {archive_module.ARROW_ROWS}" in capsys.readouterr().err
    assert hashlib.sha256(path.read_bytes()).hexdigest() == before


def test_archive_night_lets_go_of_the_rows_once_committed(archived, desk, tmp_path):
    """The night's Arrow rows are dropped once archived, before the reports: a large night's rows are not held
    in memory through them. What the run reports is unchanged, and the archive holds the rows."""
    box = copy_of(archived, tmp_path / "box")
    config = JobConfig(data_root=desk, archive_path=Path("a.duckdb"), reports_dir=Path("reports"),
                       write_reports=False, time_basis="BUS/252")
    with contextlib.chdir(box), engine_module.open_archive(config) as session:
        rows = engine_module.archive_rows(engine_module.prepare_night(config, RUN))
        held = rows.tables["position_pnl"].num_rows
        outcome = engine_module.archive_night(config, rows, session)
    assert rows.tables == {}
    assert outcome.archived == held > 0
    assert read_archive(box / "a.duckdb", RUN)[1]["position_pnl"].shape[0] == held


# ---------------------------------------------------------------- the commit: one-night runs fold, pages beside it

def _threshold(con: duckdb.DuckDBPyConnection) -> str:
    return con.execute("SELECT current_setting('checkpoint_threshold')").fetchall()[0][0]


@pytest.mark.parametrize("one_night", [True, False])
def test_a_one_night_session_folds_the_log_into_the_file_as_it_commits(archived, desk, tmp_path, one_night):
    """A session that writes one night and closes (``attribution run``) folds DuckDB's write-ahead log into the file
    as the night commits: no log is left once committed, before the session closes. A backfill's session keeps
    the log (folded at 256 MB or when it closes). Either way the connection's threshold is as before, and the
    archive holds the same rows."""
    box = copy_of(archived, tmp_path / "box")
    _, rows_before = read_archive(box / "a.duckdb", RUN)
    config = JobConfig(data_root=desk, archive_path=Path("a.duckdb"), reports_dir=Path("reports"),
                       write_reports=False, time_basis="BUS/252")
    with contextlib.chdir(box), engine_module.open_archive(config, one_night=one_night) as session:
        threshold = _threshold(session.con)
        engine_module.run_night(config, RUN, session=session)
        log = box / "a.duckdb.wal"
        log_bytes = log.stat().st_size if log.exists() else 0
        assert _threshold(session.con) == threshold
    assert (log_bytes == 0) is one_night, log_bytes
    assert_same_rows(read_archive(box / "a.duckdb", RUN)[1], rows_before)


def test_a_small_night_is_inserted_on_one_duckdb_thread_and_the_setting_given_back(archived, desk, tmp_path,
                                                                                   monkeypatch):
    """Tables of one row group at most go in on one DuckDB thread; then the connection has DuckDB's own setting
    again (the reports' queries use it). Above the threshold (made 0 rows here) DuckDB's setting is left alone."""
    default = duckdb.connect().execute("SELECT current_setting('threads')").fetchall()[0][0]
    for limit, expected in ((archive_module.ONE_THREAD_INSERT_ROWS, 1), (0, default)):
        monkeypatch.setattr(archive_module, "ONE_THREAD_INSERT_ROWS", limit)
        box = copy_of(archived, tmp_path / f"box{limit}")
        during, insert = [], archive_module._insert

        def watched_insert(con, table, rows, insert=insert, during=during):
            during.append(con.execute("SELECT current_setting('threads')").fetchall()[0][0])
            insert(con, table, rows)

        monkeypatch.setattr(archive_module, "_insert", watched_insert)
        config = JobConfig(data_root=desk, archive_path=Path("a.duckdb"), reports_dir=Path("reports"),
                           write_reports=False, time_basis="BUS/252")
        with contextlib.chdir(box), engine_module.open_archive(config) as session:
            engine_module.run_night(config, RUN, session=session)
            after = session.con.execute("SELECT current_setting('threads')").fetchall()[0][0]
        monkeypatch.setattr(archive_module, "_insert", insert)
        assert len(during) >= 4 and set(during) == {expected}, (limit, during)
        assert after == default


def test_pages_are_moved_into_place_only_once_the_night_is_committed(archived, desk, tmp_path, monkeypatch):
    """The commit runs on a second thread while the pages are rendered and written; the pages are moved into
    place after it returned (a slow commit, made 0.3 s slower here, still comes first)."""
    import threading
    import time

    import attribution.report as report_module
    box = copy_of(archived, tmp_path / "box")
    events: list[tuple[str, str]] = []
    commit, write = archive_module.OpenNight.commit, report_module.write_atomically

    def slow_commit(self, *args, **kwargs):
        time.sleep(0.3)
        commit(self, *args, **kwargs)
        events.append(("committed", threading.current_thread().name))

    def watched_write(target, files, before_moving=None):
        def moving():
            assert before_moving is not None
            before_moving()
            events.append(("moving", threading.current_thread().name))
        events.append(("writing pages", threading.current_thread().name))
        write(target, files, moving)

    monkeypatch.setattr(archive_module.OpenNight, "commit", slow_commit)
    monkeypatch.setattr(report_module, "write_atomically", watched_write)
    assert run(desk, box, reports=True) == 3
    assert [name for name, _ in events] == ["writing pages", "committed", "moving"]
    assert events[1][1] != events[0][1] == events[2][1] == threading.main_thread().name
    assert (box / "reports" / RUN.isoformat() / "index.html").exists()


def test_failed_report_reads_leave_the_night_archived(archived, desk, tmp_path, monkeypatch, capsys):
    """The pages' figures are read inside the night's transaction; if that fails, the night is committed all the
    same (as when pages fail after a commit) and the run exits 1 naming the error; no page is published."""
    import attribution.report as report_module
    box = copy_of(archived, tmp_path / "box")
    box_rows = read_archive(box / "a.duckdb", RUN)[1]
    (box / "a.duckdb").unlink()  # the night is archived afresh by the run below, or not at all

    def failing_reads(*args, **kwargs):
        raise report_module.ReportError("injected failure reading the pages' figures")

    monkeypatch.setattr(report_module, "load_report", failing_reads)
    capsys.readouterr()
    assert run(desk, box, reports=True) == 1
    assert "injected failure reading the pages' figures" in capsys.readouterr().err
    rows = read_archive(box / "a.duckdb", RUN)[1]
    assert len(rows["runs"]) == len(box_rows["runs"]) == 1  # (its settings say the pages were asked for)
    for table in set(TABLES) - {"runs"}:
        pd.testing.assert_frame_equal(rows[table], box_rows[table], check_exact=True, obj=table)
    assert not (box / "reports" / RUN.isoformat()).exists()
