"""The package's floor plan, as rules a change cannot break unnoticed: no import cycles,
pure statistics, DDL only in the store, stage packages that export their entry only."""

from __future__ import annotations

import ast
import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PACKAGE = ROOT / "monitor"
STAGES = {
    "store": {"Store"},
    "ingest": {"ingest", "IngestSummary"},
    "refit": {"refit", "RefitSummary", "read_fits"},
    "assess": {"assess", "AssessSummary"},
    "audit": {"export"},
    "dashboard": {"launch"},
}


def _modules() -> dict[str, Path]:
    out = {}
    for path in PACKAGE.rglob("*.py"):
        parts = path.relative_to(ROOT).with_suffix("").parts
        name = ".".join(parts[:-1] if parts[-1] == "__init__" else parts)
        out[name] = path
    return out


def _imports(path: Path, modules: dict[str, Path]) -> set[str]:
    found = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            for alias in node.names:
                full = f"{node.module}.{alias.name}"
                found.add(full if full in modules else node.module)
        elif isinstance(node, ast.Import):
            found.update(alias.name for alias in node.names)
    return found


def test_no_import_cycles_between_modules():
    modules = _modules()
    edges = {
        m: {t for t in _imports(p, modules) if t in modules and t != m} for m, p in modules.items()
    }
    state: dict[str, int] = {}

    def visit(m: str, trail: list[str]) -> None:
        state[m] = 1
        for t in edges[m]:
            if state.get(t) == 1:
                pytest.fail("import cycle: " + " -> ".join([*trail, m, t]))
            if t not in state:
                visit(t, [*trail, m])
        state[m] = 2

    for m in sorted(modules):
        if m not in state:
            visit(m, [])


def test_statistics_are_pure():
    modules = _modules()
    for name, path in modules.items():
        if name.startswith("monitor.stats"):
            bad = {
                t
                for t in _imports(path, modules)
                if t.split(".")[0] in ("duckdb", "pandas", "streamlit")
                or t.startswith(("monitor.store", "monitor.config"))
            }
            assert not bad, f"{name} imports {bad}"


def test_only_the_store_writes_ddl():
    ddl = re.compile(
        r"\b(CREATE|ALTER|DROP)\s+(TEMP\s+|OR\s+REPLACE\s+)?(TABLE|VIEW|SEQUENCE|INDEX)\b"
    )
    for path in [*PACKAGE.rglob("*.py"), *(ROOT / "dashboards").rglob("*.py")]:
        if (PACKAGE / "store") in path.parents:
            continue
        assert not ddl.search(path.read_text(encoding="utf-8")), path


def test_stage_packages_export_their_entry_only():
    for stage, names in STAGES.items():
        tree = ast.parse((PACKAGE / stage / "__init__.py").read_text(encoding="utf-8"))
        exported = {a.name for n in tree.body if isinstance(n, ast.ImportFrom) for a in n.names}
        assert exported == names, (stage, exported)
        defined = [n for n in tree.body if isinstance(n, ast.FunctionDef | ast.ClassDef)]
        assert not defined, stage
