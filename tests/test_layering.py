"""The package's layering, read from its source: every import (at module level, inside functions, or for
type checking only) of every module under attribution/, sub-packages included, by an AST scan.

Rules (DEVELOPERS.md, "Layout"): no import cycle; the numeric core imports only the standard library,
numpy, scipy and the core itself (no frames, files, archive, schema or templates); nothing imports the
demo but the command line; the numpy array aliases are defined once, in attribution.arrays.
"""

from __future__ import annotations

import ast
import sys
from dataclasses import dataclass
from pathlib import Path

import attribution

PACKAGE = Path(attribution.__file__).parent
CORE = frozenset({"attribution.arrays", "attribution.pricing", "attribution.implied_vol", "attribution.explain",
                  "attribution.american", "attribution.american_greeks", "attribution.valuation",
                  "attribution.revaluation", "attribution.quality", "attribution.controls", "attribution.group_sums"})
CORE_MAY_USE = frozenset({"numpy", "scipy"})  # besides the standard library and the core itself
DEMO = "attribution.demo"
DEMO_USERS = frozenset({"attribution.cli"})  # its ``demo`` command


@dataclass(frozen=True, slots=True)
class Import:
    """One import statement's target as the importing module names it."""

    source: str
    target: str
    line: int


def module_name(path: Path, package: Path = PACKAGE) -> str:
    """``attribution/report/queries.py`` -> ``attribution.report.queries``; a package's ``__init__`` is the package."""
    parts = list(path.relative_to(package.parent).with_suffix("").parts)
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def modules(package: Path = PACKAGE) -> dict[str, Path]:
    """Every module of the package, sub-packages included."""
    return {module_name(p, package): p for p in sorted(package.rglob("*.py"))}


def imports_in(source: str, name: str, known: set[str], is_package: bool = False) -> list[Import]:
    """Every import in ``source`` (anywhere in the tree); ``from a import b`` names ``a.b`` when that is a module."""
    found = []
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, ast.Import):
            found += [Import(name, alias.name, node.lineno) for alias in node.names]
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                anchor = name.split(".") if is_package else name.split(".")[:-1]
                anchor = anchor[: len(anchor) - node.level + 1]
                base = ".".join(anchor + ([base] if base else []))
            for alias in node.names:
                target = f"{base}.{alias.name}"
                found.append(Import(name, target if target in known else base, node.lineno))
    return found


def import_graph(package: Path = PACKAGE) -> list[Import]:
    """Every import of every module of the package."""
    found = modules(package)
    known = set(found)
    return [i for name, path in found.items()
            for i in imports_in(path.read_text(encoding="utf-8"), name, known, path.name == "__init__.py")]


def internal_target(target: str, known: set[str]) -> str | None:
    """The package module an import loads (``a.b.c`` that is no module resolves to ``a.b``), else None."""
    while target and target not in known:
        target = target.rpartition(".")[0]
    return target or None


def find_cycle(edges: dict[str, set[str]]) -> list[str]:
    """One import cycle as a path ``[a, b, ..., a]``, or ``[]`` when the graph has none."""
    state: dict[str, int] = {}  # 1 on the current path, 2 done
    path: list[str] = []

    def visit(node: str) -> list[str]:
        state[node] = 1
        path.append(node)
        for nxt in sorted(edges.get(node, ())):
            if state.get(nxt) == 1:
                return path[path.index(nxt):] + [nxt]
            if nxt not in state and (cycle := visit(nxt)):
                return cycle
        state[node] = 2
        path.pop()
        return []

    for start in sorted(edges):
        if start not in state and (cycle := visit(start)):
            return cycle
    return []


def internal_edges(graph: list[Import], known: set[str]) -> dict[str, set[str]]:
    """Module -> the package modules it imports (a sub-package's own ``__init__`` left out of its modules' edges)."""
    edges: dict[str, set[str]] = {name: set() for name in known}
    for imp in graph:
        target = internal_target(imp.target, known)
        if target is None or target == imp.source or imp.source.startswith(target + "."):
            continue  # the package itself, or a module's own parent package (loaded first by Python anyway)
        edges[imp.source].add(target)
    return edges


# ---------------------------------------------------------------- the rules on the package


def test_the_scan_reaches_every_sub_package():
    """The scan sees the modules of attribution/report and attribution/demo, not only the top level."""
    names = set(modules())
    assert {"attribution.report.queries", "attribution.report.html", "attribution.demo.build"} <= names


def test_no_import_cycle():
    """No chain of imports (module level or inside functions) leads from a module back to itself."""
    known = set(modules())
    assert find_cycle(internal_edges(import_graph(), known)) == []


def test_numeric_core_imports_only_numpy_scipy_and_itself():
    """pricing, implied_vol, explain, revaluation, quality, controls: no pandas, pyarrow, duckdb, jinja2 or storage."""
    known = set(modules())
    assert CORE <= known
    bad = []
    for imp in import_graph():
        if imp.source not in CORE:
            continue
        top = imp.target.split(".")[0]
        inside = internal_target(imp.target, known)
        if top == "attribution":
            if inside not in CORE and inside != "attribution":
                bad.append(f"{imp.source}:{imp.line} imports {imp.target}")
        elif top not in sys.stdlib_module_names and top not in CORE_MAY_USE and top != "__future__":
            bad.append(f"{imp.source}:{imp.line} imports {imp.target}")
    assert bad == []


def test_only_the_command_line_imports_the_demo():
    """attribution.demo is a leaf: no module outside it imports it, except the cli's demo command."""
    bad = [f"{i.source}:{i.line}" for i in import_graph()
           if (i.target == DEMO or i.target.startswith(DEMO + "."))
           and not (i.source == DEMO or i.source.startswith(DEMO + ".")) and i.source not in DEMO_USERS]
    assert bad == []


def test_array_aliases_are_defined_once():
    """FloatArray (and the other aliases) are assigned only in attribution.arrays; everyone else imports them."""
    aliases = {"FloatArray", "IntArray", "BoolArray", "ObjectArray"}
    bad = []
    for name, path in modules().items():
        for node in ast.parse(path.read_text(encoding="utf-8")).body:
            targets = node.targets if isinstance(node, ast.Assign) else \
                [node.target] if isinstance(node, ast.AnnAssign) else []
            hits = {t.id for t in targets if isinstance(t, ast.Name)} & aliases
            if hits and name != "attribution.arrays":
                bad.append(f"{name}:{node.lineno} defines {sorted(hits)}")
    assert bad == []


# ---------------------------------------------------------------- the scan catches what it should


def test_scan_resolves_relative_and_from_imports():
    """``from . import x``, ``from .x import y`` and ``from pkg import module`` name the module imported."""
    known = {"pkg", "pkg.a", "pkg.sub", "pkg.sub.b", "pkg.sub.c"}
    source = ("from . import b\nfrom .b import thing\nfrom pkg.sub import c\nimport numpy\n\n"
              "def f():\n    import pkg.a\n")
    found = sorted((i.target, i.line) for i in imports_in(source, "pkg.sub.c", known))
    assert found == [("numpy", 4), ("pkg.a", 7), ("pkg.sub.b", 1), ("pkg.sub.b", 2), ("pkg.sub.c", 3)]


def test_cycle_finder_sees_a_cycle_through_a_function_level_import(tmp_path):
    """A cycle closed only by an import inside a function is still a cycle; a one-way chain is not."""
    pkg = tmp_path / "pkg"
    (pkg / "sub").mkdir(parents=True)
    for path, text in {"__init__.py": "", "engine.py": "def run():\n    from pkg.sub import worker\n",
                       "sub/__init__.py": "", "sub/worker.py": "from pkg.engine import run\n"}.items():
        (pkg / path).write_text(text, encoding="utf-8")
    known = set(modules(pkg))
    assert find_cycle(internal_edges(import_graph(pkg), known)) == ["pkg.engine", "pkg.sub.worker", "pkg.engine"]
    (pkg / "sub/worker.py").write_text("import numpy\n", encoding="utf-8")
    assert find_cycle(internal_edges(import_graph(pkg), known)) == []


# ---------------------------------------------------------------- the tests and the repository


REPOSITORY = PACKAGE.parent
TESTS = REPOSITORY / "tests"


def test_tests_share_helpers_only_through_helper_modules():
    """No test file imports another test file; shared checks live in helper modules (tests/*.py without test_)."""
    known = {f"tests.{p.stem}" for p in TESTS.glob("*.py")} | {p.stem for p in TESTS.glob("*.py")}
    bad = [f"{p.name}:{i.line} imports {i.target}" for p in sorted(TESTS.glob("*.py"))
           for i in imports_in(p.read_text(encoding="utf-8"), f"tests.{p.stem}", known)
           if i.target.rpartition(".")[2].startswith("test_") or i.target.startswith("test_")]
    assert bad == []


def test_no_machine_paths_in_the_repository():
    """No file cites a path outside the repository (the data contract for users is README.md, "Input files")."""
    machine = ("/" + "work/", "/" + "shared/", "data-" + "contract.md")
    folders = ("attribution", "tests", "benchmarks", "jobs", "fixtures", ".ci")
    files = [REPOSITORY / n for n in ("README.md", "DEVELOPERS.md", "pyproject.toml")]
    files += [p for f in folders for p in sorted((REPOSITORY / f).rglob("*")) if p.is_file()
              and p.suffix in {".py", ".md", ".toml", ".html", ".css", ".json", ""} and "__pycache__" not in p.parts]
    bad = [f"{p.relative_to(REPOSITORY)}: {m}" for p in files for m in machine
           if m in p.read_text(encoding="utf-8", errors="replace")]
    assert bad == []
