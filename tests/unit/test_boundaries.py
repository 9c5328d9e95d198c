"""Imports point one way: the indexer owns the index and knows nothing of HTTP."""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[2]
INDEXER_FILES = sorted((REPO / "indexer").rglob("*.py"))


def imported_modules(path: Path) -> set[str]:
    tree = ast.parse(path.read_text("utf-8"))
    names: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names |= {a.name for a in node.names}
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            names.add(node.module)
    return names


def reaches(names: set[str], packages: set[str]) -> set[str]:
    """The imported names that are one of ``packages`` or inside one."""
    return {n for n in names if any(n == p or n.startswith(p + ".") for p in packages)}


@pytest.mark.parametrize("path", INDEXER_FILES, ids=lambda p: str(p.relative_to(REPO)))
def test_indexer_never_imports_the_web_stack_or_the_service(path: Path) -> None:
    forbidden = {"fastapi", "starlette", "uvicorn", "sounding.service", "sounding.cli", "service"}
    assert reaches(imported_modules(path), forbidden) == set()


@pytest.mark.parametrize(
    "path", sorted((REPO / "service").rglob("*.py")), ids=lambda p: str(p.relative_to(REPO))
)
def test_service_never_imports_the_command_line(path: Path) -> None:
    assert reaches(imported_modules(path), {"sounding.cli"}) == set()


@pytest.mark.parametrize(
    "path",
    sorted(
        {
            *REPO.glob("indexer/**/*.py"),
            *REPO.glob("service/**/*.py"),
            *REPO.glob("sounding/**/*.py"),
            *REPO.glob("tests/**/*.py"),
        }
    ),
    ids=lambda p: str(p.relative_to(REPO)),
)
def test_code_imports_the_installed_package_names(path: Path) -> None:
    # Installed, the code is one package, `sounding`: a bare `indexer` or `service` import
    # would only work from a checkout.
    assert reaches(imported_modules(path), {"indexer", "service"}) == set()


@pytest.mark.parametrize(
    "path", sorted((REPO / "service").rglob("*.py")), ids=lambda p: str(p.relative_to(REPO))
)
def test_service_never_uses_the_index_writer(path: Path) -> None:
    # The service reads the index; only the indexer's build step writes it.
    source = path.read_text("utf-8")
    assert "IndexWriter" not in source
