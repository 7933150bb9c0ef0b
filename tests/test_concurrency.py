"""Runs cannot collide: a second run on a busy archive is refused at once, runs on two archives do not interfere.

The lock is an OS file lock (flock) on ``<archive>.lock``. A busy archive is made either by holding
that lock from the test process (``archive.archive_lock`` in a thread) or by a real run frozen with
SIGSTOP while it holds the lock, so the overlap never depends on timing.
"""

from __future__ import annotations

import contextlib
import os
import shutil
import signal
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import duckdb
import pandas as pd
import pytest

from attribution.archive import archive_lock, connect
from attribution.cli import main
from tests.archive_checks import assert_same_rows, checksums, night_rows
from tests.mini_desk import RUN, write_mini_desk

ARCHIVE, REPORTS = "archive.duckdb", "reports"
WAIT_SECONDS = 300.0   # only a hung run gets near this; a slow machine does not


def args(data: Path, archive: str = ARCHIVE) -> list[str]:
    """Run-date arguments with archive and reports relative to the working folder."""
    return ["run", "--as-of", RUN.isoformat(), "--data", str(data), "--archive", archive, "--reports", REPORTS]


def start(cwd: Path, data: Path, archive: str = ARCHIVE) -> subprocess.Popen[str]:
    """``python -m attribution.cli run`` in ``cwd``, in the background."""
    return subprocess.Popen([sys.executable, "-m", "attribution.cli", *args(data, archive)], cwd=cwd,
                            stdin=subprocess.DEVNULL, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            start_new_session=True)


def wait_until_holding(proc: subprocess.Popen[str], cwd: Path) -> None:
    """Return once ``proc`` holds its archive's lock (it writes its pid into the lock file after taking it)."""
    lock = cwd / (ARCHIVE + ".lock")
    deadline = time.monotonic() + WAIT_SECONDS
    while not (lock.exists() and lock.read_text().strip() == str(proc.pid)):
        assert proc.poll() is None, f"the run ended before it was seen holding the lock: {proc.communicate()}"
        assert time.monotonic() < deadline, "the run never took the lock"
        time.sleep(0.001)


@contextlib.contextmanager
def frozen(proc: subprocess.Popen[str]) -> Iterator[None]:
    """SIGSTOP ``proc`` for the block, SIGCONT after (and SIGKILL if the block failed)."""
    os.kill(proc.pid, signal.SIGSTOP)
    try:
        yield
    except BaseException:
        os.kill(proc.pid, signal.SIGKILL)
        raise
    finally:
        os.kill(proc.pid, signal.SIGCONT)


@contextlib.contextmanager
def lock_held_by_this_process(archive: Path) -> Iterator[None]:
    """Hold ``archive``'s lock from a thread of the test process for the duration of the block."""
    taken, release = threading.Event(), threading.Event()
    failure: list[BaseException] = []

    def hold() -> None:
        try:
            with archive_lock(archive):
                taken.set()
                release.wait(WAIT_SECONDS)
        except BaseException as exc:  # noqa: BLE001 - reported to the test below
            failure.append(exc)
            taken.set()

    thread = threading.Thread(target=hold, daemon=True)
    thread.start()
    assert taken.wait(WAIT_SECONDS) and not failure, failure
    try:
        yield
    finally:
        release.set()
        thread.join(WAIT_SECONDS)


@pytest.fixture(scope="module")
def data(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The mini desk's two nights."""
    return write_mini_desk(tmp_path_factory.mktemp("concurrency") / "data")


@dataclass(frozen=True, slots=True)
class Serial:
    """A run on its own: its folder, exit code, the night's rows and the report's page names."""

    box: Path
    code: int
    rows: dict[str, pd.DataFrame]
    pages: frozenset[str]


@pytest.fixture(scope="module")
def serial(data: Path, tmp_path_factory: pytest.TempPathFactory) -> Serial:
    """A run on its own."""
    box = tmp_path_factory.mktemp("serial")
    with contextlib.chdir(box):
        code = main(args(data))
    con = duckdb.connect(str(box / ARCHIVE), read_only=True)
    try:
        rows = night_rows(con, RUN)
    finally:
        con.close()
    return Serial(box, code, rows, frozenset(p.name for p in (box / REPORTS / RUN.isoformat()).iterdir()))


def archive_state(box: Path) -> dict[str, tuple[int, int]]:
    """Row counts and hashes of every table, read-only."""
    con = duckdb.connect(str(box / ARCHIVE), read_only=True)
    try:
        return checksums(con)
    finally:
        con.close()


def test_second_run_is_refused_at_once_while_the_lock_is_held(data, serial, tmp_path, capsys):
    """While another holder (a thread here) has the lock, a run exits 1 at once naming the archive and its pid."""
    shutil.copytree(serial.box, tmp_path, dirs_exist_ok=True, ignore=shutil.ignore_patterns("*.lock"))
    before = archive_state(tmp_path)
    reports_before = sorted(p.name for p in (tmp_path / REPORTS).rglob("*"))
    capsys.readouterr()
    with lock_held_by_this_process(tmp_path / ARCHIVE), contextlib.chdir(tmp_path):
        code = main(args(data))   # a run that waited for the lock would hang here until the holder lets go
    err = capsys.readouterr().err
    assert code == 1
    assert ARCHIVE in err and f"pid {os.getpid()}" in err, err
    assert archive_state(tmp_path) == before
    assert sorted(p.name for p in (tmp_path / REPORTS).rglob("*")) == reports_before


def test_second_run_is_refused_while_a_real_run_holds_the_archive(data, serial, tmp_path, capsys):
    """A run started while another process runs on the archive exits 1 naming its pid; the first ends as if alone."""
    code, rows, pages = serial.code, serial.rows, serial.pages
    first = start(tmp_path, data)
    capsys.readouterr()
    try:
        wait_until_holding(first, tmp_path)
        with frozen(first), contextlib.chdir(tmp_path):
            second = main(args(data))
    finally:
        out, err = first.communicate(timeout=WAIT_SECONDS)
    refusal = capsys.readouterr().err
    assert second == 1
    assert ARCHIVE in refusal and f"pid {first.pid}" in refusal, refusal
    assert first.returncode == code, err
    con = duckdb.connect(str(tmp_path / ARCHIVE), read_only=True)
    try:
        assert_same_rows(night_rows(con, RUN), rows)
    finally:
        con.close()
    assert frozenset(p.name for p in (tmp_path / REPORTS / RUN.isoformat()).iterdir()) == pages


def test_runs_on_two_archives_at_once_do_not_interfere(data, serial, tmp_path):
    """Two runs on different archives, overlapping for certain, both complete with a lone run's rows and pages."""
    code, rows, pages = serial.code, serial.rows, serial.pages
    boxes = [tmp_path / "a", tmp_path / "b"]
    for box in boxes:
        box.mkdir()
    first = start(boxes[0], data)
    second = None
    try:
        wait_until_holding(first, boxes[0])
        with frozen(first):  # the first is mid-run, holding its archive, while the second starts and takes its own
            second = start(boxes[1], data)
            wait_until_holding(second, boxes[1])
    finally:
        results = [p.communicate(timeout=WAIT_SECONDS) for p in (first, second) if p is not None]
    assert [first.returncode, second.returncode] == [code, code], results
    for box in boxes:
        con = duckdb.connect(str(box / ARCHIVE), read_only=True)
        try:
            assert_same_rows(night_rows(con, RUN), rows)
        finally:
            con.close()
        assert frozenset(p.name for p in (box / REPORTS / RUN.isoformat()).iterdir()) == pages


def test_same_archive_through_a_symbolic_link_is_refused_too(data, tmp_path, capsys):
    """The lock belongs to the archive file, not to the name used for it: a link to a busy archive is refused."""
    connect(tmp_path / ARCHIVE).close()  # an archive with its tables and no night yet
    (tmp_path / "link.duckdb").symlink_to(tmp_path / ARCHIVE)
    before = archive_state(tmp_path)
    capsys.readouterr()
    with lock_held_by_this_process(tmp_path / ARCHIVE), contextlib.chdir(tmp_path):
        code = main(args(data, archive="link.duckdb"))
    err = capsys.readouterr().err
    assert code == 1, err
    assert f"pid {os.getpid()}" in err, err
    assert archive_state(tmp_path) == before


# A run started through this bootstrap stops itself (SIGSTOP) just before it moves its finished report
# into place, by a Python audit hook on os.rename; the package is unchanged.
STOP_BEFORE_MOVING_REPORT = """
import os, signal, sys
def hook(event, args):
    if event == "os.rename" and ".tmp-" in str(args[0]):
        os.kill(os.getpid(), signal.SIGSTOP)
sys.addaudithook(hook)
from attribution.cli import main
sys.exit(main(sys.argv[1:]))
"""


class RunsCollided(AssertionError):
    """Two runs on different archives writing the same reports folder disturbed each other."""


def test_runs_on_two_archives_sharing_a_reports_folder_do_not_interfere(data, serial, tmp_path):
    """Runs on two archives writing one reports folder (the default ./reports) both succeed; one whole report."""
    first = subprocess.Popen([sys.executable, "-c", STOP_BEFORE_MOVING_REPORT, *args(data, "first.duckdb")],
                             cwd=tmp_path, stdin=subprocess.DEVNULL, stdout=subprocess.PIPE,
                             stderr=subprocess.PIPE, text=True, start_new_session=True)
    try:
        _, status = os.waitpid(first.pid, os.WUNTRACED)   # returns once the first run has stopped itself
        assert os.WIFSTOPPED(status), status
        # The second run archives its night and then waits for the reports folder, which the
        # stopped first run holds; it must neither fail nor disturb the first run's staging.
        results: list[int] = []
        with contextlib.chdir(tmp_path):
            worker = threading.Thread(target=lambda: results.append(main(args(data, "second.duckdb"))))
            worker.start()
            worker.join(timeout=3.0)
            assert worker.is_alive(), "the second run should wait for the reports folder"
    finally:
        with contextlib.suppress(ProcessLookupError):  # gone already if it ended instead of stopping
            os.kill(first.pid, signal.SIGCONT)
        _, err = first.communicate(timeout=WAIT_SECONDS)
    worker.join(timeout=WAIT_SECONDS)
    second = results[0]
    assert second == serial.code
    if first.returncode != serial.code:
        raise RunsCollided(f"the first run exited {first.returncode}: {err.strip()}")
    assert frozenset(p.name for p in (tmp_path / REPORTS / RUN.isoformat()).iterdir()) == serial.pages
    assert [p.name for p in (tmp_path / REPORTS).iterdir() if p.name.startswith(".")] == []
