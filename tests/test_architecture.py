"""Import rules that keep the data flow one-way (an ast scan of the package's imports).

- ``qcfit.stats`` imports nothing of qcfit but ``qcfit.errors`` (pure core);
- only ``qcfit.store`` imports SQLAlchemy (and ``migrations/``);
- ``qcfit.store`` never imports stats, policy, evaluate or config;
- nothing in the library imports ``qcfit.cli``;
- the clock (``datetime.now``, ``time.time`` for wall time) is read only in scheduler.py and cli.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "qcfit"


def _modules() -> list[tuple[str, Path, ast.Module]]:
    out = []
    for path in sorted(PACKAGE.rglob("*.py")):
        rel = path.relative_to(PACKAGE.parent).with_suffix("")
        name = ".".join(rel.parts).removesuffix(".__init__")
        out.append((name, path, ast.parse(path.read_text(encoding="utf-8"), filename=str(path))))
    return out


MODULES = _modules()


def _imports(tree: ast.Module) -> set[str]:
    found: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            found.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            found.add(node.module)
    return found


def _in(name: str, package: str) -> bool:
    return name == package or name.startswith(package + ".")


@pytest.mark.parametrize("name,path,tree", [m for m in MODULES if _in(m[0], "qcfit.stats")], ids=lambda v: str(v) if isinstance(v, str) else "")
def test_stats_is_pure(name, path, tree):
    for imp in _imports(tree):
        if _in(imp, "qcfit"):
            assert _in(imp, "qcfit.stats") or imp == "qcfit.errors", f"{name} imports {imp}"
        assert not _in(imp, "sqlalchemy"), f"{name} imports {imp}"
        assert imp not in {"os", "pathlib", "sqlite3", "pandas", "click"}, f"{name} imports {imp}"


def test_only_store_imports_sqlalchemy():
    offenders = [
        (name, imp)
        for name, _, tree in MODULES
        for imp in _imports(tree)
        if _in(imp, "sqlalchemy") and not _in(name, "qcfit.store")
    ]
    assert offenders == []


def test_store_does_not_reach_up():
    forbidden = ("qcfit.stats", "qcfit.policy", "qcfit.evaluate", "qcfit.config", "qcfit.service")
    offenders = [
        (name, imp)
        for name, _, tree in MODULES
        if _in(name, "qcfit.store")
        for imp in _imports(tree)
        if any(_in(imp, f) for f in forbidden)
    ]
    assert offenders == []


def test_nothing_imports_the_cli():
    offenders = [
        (name, imp)
        for name, _, tree in MODULES
        if not _in(name, "qcfit.cli") and name != "qcfit.__main__"
        for imp in _imports(tree)
        if _in(imp, "qcfit.cli")
    ]
    assert offenders == []


def _reads_clock(tree: ast.Module) -> bool:
    for node in ast.walk(tree):
        if isinstance(node, ast.Attribute) and node.attr in {"now", "utcnow", "today"}:
            return True
    return False


def test_clock_is_read_only_at_the_edges():
    allowed = ("qcfit.scheduler", "qcfit.cli")
    offenders = [
        name for name, _, tree in MODULES if _reads_clock(tree) and not any(_in(name, a) for a in allowed)
    ]
    assert offenders == []
