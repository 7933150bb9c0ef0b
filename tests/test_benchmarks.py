"""The benchmark scripts still run (tiny sizes, never timed) and print the figures the README quotes.

A benchmark is a script, not a test: nothing here checks a duration. What is checked is that each
script starts, runs its whole path on a few options, and prints the lines whose figures the README's
speed table reports, so a change elsewhere cannot break a script silently. The behaviour check
``compare_archives.py`` is run for real: it must find two runs identical and find a changed value.
"""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

import duckdb
import pytest

BENCHMARKS = Path(__file__).resolve().parent.parent / "benchmarks"


def _run(script: str, *args: str, expect: int = 0) -> str:
    done = subprocess.run([sys.executable, str(BENCHMARKS / script), *args], capture_output=True, text=True,
                          timeout=600, check=False)
    assert done.returncode == expect, f"{script} {' '.join(args)} exited {done.returncode}:\n{done.stderr[-3000:]}"
    return done.stdout


@pytest.mark.parametrize(("script", "args", "printed"), [
    ("bench_pricing.py", ("--n", "2000", "--repeats", "1", "--quantlib-sample", "20"), "QuantLib loop"),
    ("bench_revaluation.py", ("--positions", "2000", "--repeats", "1"), "shapley_allocate"),
    ("bench_quality.py", ("--books", "4", "--nights", "30", "--repeats", "1"), "quality_frame from 120 rows"),
    ("bench_smile.py", ("--smiles", "40", "--strikes", "8", "--positions", "2000", "--repeat", "1"), "total"),
    ("bench_report.py", ("--books", "2", "--positions", "4", "--history", "3", "--repeat", "1"), "book page"),
    ("bench_american.py", ("--n", "100", "--quantlib-sample", "10", "--repeats", "1", "--night-instruments", "50"),
     "American work"),
    ("bench_memory.py", ("--positions", "2000", "--books", "4", "--instruments", "40", "--underlyings", "4"),
     "the highest samples"),
])
def test_a_benchmark_script_runs_its_whole_path(script: str, args: tuple[str, ...], printed: str) -> None:
    pytest.importorskip("QuantLib")  # the scripts compare against it where it is installed (the test extra)
    out = _run(script, *args)
    assert printed in out, out


def test_compare_archives_finds_two_runs_identical_and_names_a_changed_column(tmp_path: Path) -> None:
    first = tmp_path / "first"
    _run("compare_archives.py", "run", str(first), "--days", "6", "--nights", "1")
    second = tmp_path / "second"
    shutil.copytree(first, second)
    for page in (second / "reports").rglob("*.html"):  # what a second run into `second` would have written
        page.write_text(page.read_text(encoding="utf-8").replace(str(first), str(second)), encoding="utf-8")
    assert "IDENTICAL" in _run("compare_archives.py", "compare", str(first), str(second))

    con = duckdb.connect(str(second / "archive.duckdb"))
    con.execute("UPDATE position_pnl SET pnl_theta = pnl_theta + 1e-9 "
                "WHERE trade_id = (SELECT min(trade_id) FROM position_pnl)")
    con.close()
    out = _run("compare_archives.py", "compare", str(first), str(second), expect=1)
    assert "pnl_theta" in out, out


def test_compare_archives_runs_the_bench_night_and_finds_it_identical_to_itself(tmp_path: Path) -> None:
    """The synthetic mode archives the bench's night (every kind in it); two runs of the same code compare identical."""
    sizes = ("--positions", "3000", "--books", "6", "--instruments", "150", "--underlyings", "8")
    first, second = tmp_path / "first", tmp_path / "second"
    for out in (first, second):
        assert "archived the synthetic night" in _run("compare_archives.py", "synthetic", str(out), *sizes)
    con = duckdb.connect(str(first / "archive.duckdb"), read_only=True)
    kinds = {r[0] for r in con.execute("SELECT DISTINCT coalesce(exercise, kind) FROM position_pnl").fetchall()}
    con.close()
    assert kinds == {"american", "european", "underlying", "future", "forward"}
    assert "IDENTICAL" in _run("compare_archives.py", "compare", str(first), str(second))
