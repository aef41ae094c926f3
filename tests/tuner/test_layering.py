"""The tuner is a library below the service: it must never import upward."""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

TUNER = Path(__file__).resolve().parents[2] / "tuner"
FORBIDDEN = {"service", "client", "fastapi", "sqlalchemy", "starlette", "uvicorn"}
# The trial journal is Optuna storage on SQL tables: journal.py and its tables and engines
# (journal_db.py) are the only modules that talk SQL.
ALLOWED = {"journal.py": {"sqlalchemy"}, "journal_db.py": {"sqlalchemy"}}


def _imported_roots(path: Path) -> set[str]:
    roots = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            roots.update(alias.name.split(".")[0] for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            roots.add(node.module.split(".")[0])
    return roots


MODULES = sorted(TUNER.rglob("*.py"))


def test_tuner_package_found() -> None:
    assert len(MODULES) >= 8


@pytest.mark.parametrize("path", MODULES, ids=lambda p: str(p.relative_to(TUNER)))
def test_no_upward_imports(path: Path) -> None:
    assert _imported_roots(path) & (FORBIDDEN - ALLOWED.get(path.name, set())) == set()


@pytest.mark.parametrize("path", MODULES, ids=lambda p: str(p.relative_to(TUNER)))
def test_no_environment_reads(path: Path) -> None:
    text = path.read_text(encoding="utf-8")
    assert "os.environ" not in text and "getenv" not in text


CLIENT = TUNER.parent / "client"
# A client machine needs no LightGBM, pandas or Optuna: the client speaks HTTP and shares
# only the dependency-free vocabulary with the rest.
CLIENT_MAY_IMPORT = {"client", "vocabulary", "httpx", "pydantic_settings", "__future__"}


@pytest.mark.parametrize("path", sorted(CLIENT.rglob("*.py")), ids=lambda p: p.name)
def test_client_imports_only_the_vocabulary(path: Path) -> None:
    import sys

    third_party = {r for r in _imported_roots(path) if r not in sys.stdlib_module_names}
    assert third_party <= CLIENT_MAY_IMPORT, third_party - CLIENT_MAY_IMPORT


@pytest.mark.parametrize("path", sorted((TUNER.parent / "vocabulary").glob("*.py")),
                         ids=lambda p: p.name)
def test_vocabulary_is_dependency_free(path: Path) -> None:
    import sys

    assert {r for r in _imported_roots(path) if r not in sys.stdlib_module_names} <= {
        "__future__", "vocabulary"}
