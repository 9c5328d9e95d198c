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
            names |= {a.name.split(".")[0] for a in node.names}
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            names.add(node.module.split(".")[0])
    return names


def test_there_is_an_indexer_to_check() -> None:
    assert len(INDEXER_FILES) >= 8


@pytest.mark.parametrize("path", INDEXER_FILES, ids=lambda p: str(p.relative_to(REPO)))
def test_indexer_never_imports_the_web_stack_or_the_service(path: Path) -> None:
    forbidden = {"fastapi", "starlette", "uvicorn", "service"}
    assert imported_modules(path) & forbidden == set()


@pytest.mark.parametrize(
    "path", sorted((REPO / "service").rglob("*.py")), ids=lambda p: str(p.relative_to(REPO))
)
def test_service_never_uses_the_index_writer(path: Path) -> None:
    # The service reads the index; only the indexer's build step writes it.
    source = path.read_text("utf-8")
    assert "IndexWriter" not in source
