"""The tuner is a library below the service: it must never import upward."""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

TUNER = Path(__file__).resolve().parents[2] / "tuner"
FORBIDDEN = {"service", "fastapi", "sqlalchemy", "starlette", "uvicorn"}
# The trial journal is Optuna storage on a SQL table: the one module that talks SQL.
ALLOWED = {"_journal.py": {"sqlalchemy"}}


def _imported_roots(path: Path) -> set[str]:
    roots = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            roots.update(alias.name.split(".")[0] for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            roots.add(node.module.split(".")[0])
    return roots


MODULES = sorted(TUNER.glob("*.py"))


def test_tuner_package_found() -> None:
    assert len(MODULES) >= 8


@pytest.mark.parametrize("path", MODULES, ids=lambda p: p.name)
def test_no_upward_imports(path: Path) -> None:
    assert _imported_roots(path) & (FORBIDDEN - ALLOWED.get(path.name, set())) == set()


@pytest.mark.parametrize("path", MODULES, ids=lambda p: p.name)
def test_no_environment_reads(path: Path) -> None:
    text = path.read_text(encoding="utf-8")
    assert "os.environ" not in text and "getenv" not in text
