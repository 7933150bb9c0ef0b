"""A run killed with SIGKILL at any stage completes or changes nothing, and the next run repairs the rest.

``python -m attribution.cli run`` is started in a subprocess on a synthetic night
(tests/synthetic_night.py) with its stderr on a pseudo-terminal, so its progress line names each
stage as it ends. The test watches that line and the files from outside, with no hook in the
package, and kills the run while reading (the lock file shows the run's pid), explaining, with the
archive transaction open, while the transaction commits (DuckDB's write-ahead log appears), and
while rendering. The report's files are written and moved in milliseconds, too short a window to
hit from outside: for those two points the run starts through a bootstrap whose Python audit hook
kills it at the Nth file write or at the move (KILL_BOOTSTRAP below; the package is unchanged).

After each kill: the archive opens, earlier dates are untouched, the killed date is absent or
complete (its run record present iff its rows equal a clean run's), the lock is free, no
half-written report is visible, and a rerun gives exactly the rows of a clean run.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import os
import pty
import re
import select
import shutil
import signal
import subprocess
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import duckdb
import pandas as pd
import pytest

from attribution.archive import archive_lock
from attribution.cli import main
from attribution.schema import TABLES
from tests.archive_checks import assert_same_rows, checksums, night_rows
from tests.synthetic_night import write_synthetic_desk

ARCHIVE, REPORTS = "archive.duckdb", "reports"
WAIT_SECONDS = 300.0                 # only a hung run ever gets near this; a slow machine does not
LABEL = re.compile(rb"\] \d+/\d+ (\w+)")


# ---------------------------------------------------------------- a run watched from outside

class WatchedRun:
    """``python -m attribution.cli run`` with stderr on a pseudo-terminal, so its stage labels can be read."""

    def __init__(self, cwd: Path, args: list[str]) -> None:
        master, slave = pty.openpty()
        with (cwd / "stdout.txt").open("wb") as out:
            self.proc = subprocess.Popen([sys.executable, "-m", "attribution.cli", "run", *args], cwd=cwd,
                                         stdin=subprocess.DEVNULL, stdout=out, stderr=slave,
                                         start_new_session=True)
        os.close(slave)
        self.cwd, self.master, self.output = cwd, master, b""

    def labels(self) -> list[str]:
        """Stage labels drawn so far, in order (a label is drawn when its stage ends)."""
        return [m.decode() for m in LABEL.findall(self.output)]

    def _pump(self, timeout: float) -> bool:
        """Read what the run wrote; False once the terminal is closed (the run is gone)."""
        ready, _, _ = select.select([self.master], [], [], timeout)
        if not ready:
            return True
        try:
            chunk = os.read(self.master, 65536)
        except OSError:  # EIO: every writer has closed the terminal
            return False
        self.output += chunk
        return bool(chunk)

    def wait_for(self, condition: Callable[[], bool], what: str, poll: float) -> None:
        """Return as soon as ``condition()`` holds; fail if the run ends first."""
        deadline = time.monotonic() + WAIT_SECONDS
        while not condition():
            if self.proc.poll() is not None:
                self._pump(0.0)
                if condition():
                    return
                pytest.fail(f"the run ended (exit {self.proc.returncode}) before {what}; "
                            f"stderr: {self.output[-2000:]!r}")
            if time.monotonic() > deadline:
                self.kill()
                pytest.fail(f"gave up waiting for {what}")
            self._pump(poll)

    def kill(self) -> list[str]:
        """SIGKILL the run, reap it, read what it drew before it died; returns its labels."""
        with contextlib.suppress(ProcessLookupError):
            os.kill(self.proc.pid, signal.SIGKILL)
        self.proc.wait()
        while self._pump(0.2):
            pass
        os.close(self.master)
        return self.labels()


def cli_args(data: Path, as_of: dt.date, *extra: str) -> list[str]:
    """The run's arguments; archive and reports are relative, so every sandbox records the same settings."""
    return ["--as-of", as_of.isoformat(), "--data", str(data), "--archive", ARCHIVE, "--reports", REPORTS, *extra]


# ---------------------------------------------------------------- what the archive and the reports hold

def open_copy(sandbox: Path, into: Path) -> duckdb.DuckDBPyConnection:
    """Open a copy of the sandbox's archive (with its write-ahead log), leaving the original for the rerun."""
    into.mkdir(parents=True, exist_ok=True)
    for name in (ARCHIVE, ARCHIVE + ".wal"):
        if (sandbox / name).exists():
            shutil.copy2(sandbox / name, into / name)
    return duckdb.connect(str(into / ARCHIVE))


def visible_entries(reports: Path) -> list[Path]:
    """What a reader of the reports folder sees (temporary folders are dot-named)."""
    return sorted(p for p in reports.iterdir() if not p.name.startswith(".")) if reports.exists() else []


def hidden_entries(reports: Path) -> list[str]:
    """Dot-named leftovers of interrupted writes in the reports folder."""
    return sorted(p.name for p in reports.iterdir() if p.name.startswith(".")) if reports.exists() else []


def assert_complete_report(folder: Path, pages: frozenset[str]) -> None:
    """The folder holds every page of the night, each one whole."""
    assert folder.is_dir(), f"{folder} missing"
    assert {p.name for p in folder.iterdir()} == pages, f"{folder}: pages differ from a clean run's"
    for name in pages:
        text = (folder / name).read_text(encoding="utf-8")
        assert text.rstrip().endswith("</html>"), f"{folder / name} is cut short"


# ---------------------------------------------------------------- the desk, a base archive, a clean run

@dataclass(frozen=True, slots=True)
class World:
    """Shared inputs: the data root, a base sandbox holding the earlier date, and a clean run's result."""

    data: Path
    earlier: dt.date
    night: dt.date
    base: Path                # archive with the earlier date only
    base_with_night: Path     # archive and reports after a clean run of the night
    earlier_sums: dict[str, tuple[int, int]]
    clean_rows: dict[str, pd.DataFrame]
    clean_exit: int
    pages: frozenset[str]


def run_in(sandbox: Path, args: list[str]) -> int:
    """The command line run to its end inside the test process, with ``sandbox`` as working folder."""
    with contextlib.chdir(sandbox):
        return main(["run", *args])


@pytest.fixture(scope="module")
def world(tmp_path_factory: pytest.TempPathFactory) -> World:
    """Write the synthetic desk, archive its first night, and run the second one cleanly once."""
    root = tmp_path_factory.mktemp("crash")
    desk = write_synthetic_desk(root / "data", positions=10_000, books=8, instruments=800, underlyings=16)
    _, earlier, night = desk.dates
    base = root / "base"
    base.mkdir()
    assert run_in(base, cli_args(desk.root, earlier, "--no-reports")) in (0, 3)
    clean = root / "clean"
    shutil.copytree(base, clean)
    clean_exit = run_in(clean, cli_args(desk.root, night))
    assert clean_exit in (0, 3)
    con = duckdb.connect(str(clean / ARCHIVE), read_only=True)
    try:
        sums, rows = checksums(con, night), night_rows(con, night)
    finally:
        con.close()
    assert len(rows["position_pnl"]) == desk.positions and len(rows["runs"]) == 1
    pages = frozenset(p.name for p in (clean / REPORTS / night.isoformat()).iterdir())
    assert len(pages) == desk.books + 3  # index, exceptions, one page per book and the one desk's page
    return World(desk.root, earlier, night, base, clean, sums, rows, clean_exit, pages)


def sandbox_from(source: Path, into: Path) -> Path:
    """A private copy of a base sandbox (archive and reports)."""
    shutil.copytree(source, into, ignore=shutil.ignore_patterns("stdout.txt", "*.lock"))
    return into


# ---------------------------------------------------------------- the checks after a kill and after a rerun

def check_after_kill(world: World, sandbox: Path, inspect: Path) -> bool:
    """Every promise that must hold right after a kill; returns whether the killed night is archived."""
    con = open_copy(sandbox, inspect)
    try:
        tables = {r[0] for r in con.execute("SELECT table_name FROM information_schema.tables").fetchall()}
        assert set(TABLES) <= tables
        assert checksums(con, world.night) == world.earlier_sums, "earlier dates changed"
        rows = night_rows(con, world.night)
    finally:
        con.close()
    archived = len(rows["runs"]) > 0
    if archived:
        assert_same_rows(rows, world.clean_rows)
    else:
        assert {t: len(f) for t, f in rows.items()} == dict.fromkeys(TABLES, 0), "a partial night is visible"
    with archive_lock(sandbox / ARCHIVE):  # a killed holder leaves no lock behind: this does not raise
        pass
    for entry in visible_entries(sandbox / REPORTS):
        assert_complete_report(entry, world.pages)
        assert archived or entry.name != world.night.isoformat(), "pages published for a night not archived"
    return archived


def check_rerun(world: World, sandbox: Path, exit_code: int) -> None:
    """After a full run: same exit code, earlier dates untouched, rows equal a clean run's, report whole."""
    assert exit_code == world.clean_exit
    con = duckdb.connect(str(sandbox / ARCHIVE), read_only=True)
    try:
        assert checksums(con, world.night) == world.earlier_sums
        assert_same_rows(night_rows(con, world.night), world.clean_rows)
    finally:
        con.close()
    assert [p.name for p in visible_entries(sandbox / REPORTS)] == [world.night.isoformat()]
    assert_complete_report(sandbox / REPORTS / world.night.isoformat(), world.pages)


# ---------------------------------------------------------------- kills at stages, seen from outside

@dataclass(frozen=True, slots=True)
class KillPoint:
    """Kill after a stage label (None: as soon as the run holds the lock), and once ``path`` appears if given.

    ``labels_at_death``: the last label the run may have drawn when it died (None: none yet);
    ``archived``: whether the night must be in the archive afterwards (None: either is correct).
    """

    name: str
    after_label: str | None
    path: Callable[[Path], bool] | None
    labels_at_death: tuple[str | None, ...]
    archived: bool | None


def _holds_lock(run: WatchedRun) -> bool:
    lock = run.cwd / (ARCHIVE + ".lock")
    return lock.exists() and lock.read_text().strip() == str(run.proc.pid)


def _wal_exists(sandbox: Path) -> bool:
    return (sandbox / (ARCHIVE + ".wal")).exists()


KILL_POINTS = (
    KillPoint("reading", None, None, (None,), False),
    KillPoint("explaining", "market", None, ("market",), False),
    KillPoint("archiving-transaction-open", "controls", None, ("controls",), None),
    KillPoint("archiving-commit-under-way", "controls", _wal_exists, ("controls", "archive"), None),
    # the night's commit runs while its pages are rendered: killed then, the night is absent or whole
    KillPoint("rendering", "archive", None, ("archive",), None),
)


@pytest.mark.parametrize("point", KILL_POINTS, ids=[p.name for p in KILL_POINTS])
def test_kill_at_stage_leaves_a_usable_archive_and_rerun_repairs(world, tmp_path, point):
    """SIGKILL at the stage: archive opens, earlier dates untouched, night absent or whole, lock free, rerun equal."""
    sandbox = sandbox_from(world.base, tmp_path / "box")
    run = WatchedRun(sandbox, cli_args(world.data, world.night))
    if point.after_label is None:
        run.wait_for(lambda: _holds_lock(run), "the run held the lock", poll=0.001)
    else:
        run.wait_for(lambda: point.after_label in run.labels(), f"stage label {point.after_label!r}", poll=0.05)
    if point.path is not None:
        run.wait_for(lambda: point.path(sandbox), f"the marker of {point.name}", poll=0.0005)
    labels = run.kill()
    assert (labels[-1] if labels else None) in point.labels_at_death, f"killed after {labels}, not {point.name}"
    archived = check_after_kill(world, sandbox, tmp_path / "inspect")
    if point.archived is not None:
        assert archived == point.archived
    assert hidden_entries(sandbox / REPORTS) == []
    check_rerun(world, sandbox, run_in(sandbox, cli_args(world.data, world.night)))


# ---------------------------------------------------------------- kills inside the report's file writes

# The report's files are written in a few milliseconds, too short a window to hit from outside.
# The run is started through this bootstrap instead: a Python audit hook (sys.addaudithook, no
# change to the package) SIGKILLs the process when it is about to open its Nth file inside the
# temporary report folder ("open N"), or to move that folder into place ("rename").
KILL_BOOTSTRAP = """
import os, signal, sys
mode, nth = sys.argv[1], int(sys.argv[2])
seen = 0
def hook(event, args):
    global seen
    if mode == "open" and event == "open" and ".tmp-" in str(args[0]) and "w" in str(args[1] or ""):
        seen += 1
        if seen == nth:
            os.kill(os.getpid(), signal.SIGKILL)
    elif mode == "rename" and event == "os.rename" and ".tmp-" in str(args[0]):
        os.kill(os.getpid(), signal.SIGKILL)
sys.addaudithook(hook)
from attribution.cli import main
sys.exit(main(["run", *sys.argv[3:]]))
"""


@dataclass(frozen=True, slots=True)
class KilledInRender:
    """A rerun of an already reported night, killed inside the report's file writes, then run once more."""

    after_kill: Path          # a copy of the sandbox as the kill left it
    sandbox: Path             # the sandbox after one more full run
    killed_exit: int
    rerun_exit: int


def _kill_in_render(world: World, root: Path, mode: str, nth: int) -> KilledInRender:
    sandbox = sandbox_from(world.base_with_night, root / "box")
    killed = subprocess.run([sys.executable, "-c", KILL_BOOTSTRAP, mode, str(nth),
                             *cli_args(world.data, world.night)], cwd=sandbox, capture_output=True, text=True,
                            timeout=WAIT_SECONDS, check=False)
    after_kill = root / "after-kill"
    shutil.copytree(sandbox, after_kill)
    return KilledInRender(after_kill, sandbox, killed.returncode,
                          run_in(sandbox, cli_args(world.data, world.night)))


@pytest.fixture(scope="module")
def killed_mid_pages(world: World, tmp_path_factory: pytest.TempPathFactory) -> KilledInRender:
    """Killed about to open the fourth file of the new report (three pages written)."""
    return _kill_in_render(world, tmp_path_factory.mktemp("mid-pages"), "open", 4)


@pytest.fixture(scope="module")
def killed_at_move(world: World, tmp_path_factory: pytest.TempPathFactory) -> KilledInRender:
    """Killed about to move the finished new report into place (the previous one already moved aside)."""
    return _kill_in_render(world, tmp_path_factory.mktemp("at-move"), "rename", 0)


def _staging(sandbox: Path, night: dt.date) -> list[Path]:
    return [p for p in (sandbox / REPORTS).iterdir() if p.name.startswith(f".{night.isoformat()}.tmp-")]


def test_kill_while_writing_pages_keeps_the_previous_report_whole(world, killed_mid_pages, tmp_path):
    """SIGKILL mid-write: the night's visible report is still the previous whole one; archive intact; rerun equal."""
    state = killed_mid_pages
    assert state.killed_exit == -signal.SIGKILL
    assert check_after_kill(world, state.after_kill, tmp_path / "inspect")  # archived before the report began
    assert_complete_report(state.after_kill / REPORTS / world.night.isoformat(), world.pages)
    staged = _staging(state.after_kill, world.night)
    assert len(staged) == 1 and len(list(staged[0].iterdir())) == 3  # the kill came mid-write
    check_rerun(world, state.sandbox, state.rerun_exit)


def test_kill_while_moving_the_report_into_place_leaves_nothing_half_written(world, killed_at_move, tmp_path):
    """SIGKILL between moving the old report aside and the new one in: no partial report visible; rerun equal."""
    state = killed_at_move
    assert state.killed_exit == -signal.SIGKILL
    assert check_after_kill(world, state.after_kill, tmp_path / "inspect")
    assert visible_entries(state.after_kill / REPORTS) == []  # the previous report is aside, the new one staged
    staged = _staging(state.after_kill, world.night)
    assert len(staged) == 1
    assert_complete_report(staged[0], world.pages)
    check_rerun(world, state.sandbox, state.rerun_exit)


@pytest.mark.parametrize("fixture", ["killed_mid_pages", "killed_at_move"])
def test_rerun_removes_temporary_folders_left_by_a_killed_render(fixture, request):
    """After a kill inside the report's writes and one full rerun, no temporary folder is left behind."""
    state: KilledInRender = request.getfixturevalue(fixture)
    assert state.rerun_exit in (0, 3)
    assert hidden_entries(state.after_kill / REPORTS)  # the kill did leave folders behind
    assert hidden_entries(state.sandbox / REPORTS) == []
