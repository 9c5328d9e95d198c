"""The ``sounding`` console script as a user runs it: exit codes and one-line errors."""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
from pathlib import Path

import pytest

SOUNDING = [sys.executable, "-m", "sounding.cli"]


def run(*args: str, env: dict[str, str] | None = None, cwd: Path | None = None):
    full_env = {k: v for k, v in os.environ.items() if not k.startswith("SOUNDING_")}
    full_env.update(env or {})
    return subprocess.run(
        [*SOUNDING, *args], capture_output=True, text=True, env=full_env, cwd=cwd, timeout=300
    )


def one_line_error(proc: subprocess.CompletedProcess) -> str:
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1, proc.stderr
    assert "Traceback" not in proc.stderr
    return lines[0]


@pytest.mark.parametrize(
    "command", ["index", "search", "serve", "eval", "check", "judgments", "keys"]
)
def test_every_command_help_has_an_example(command: str) -> None:
    proc = run(command, "--help")
    assert proc.returncode == 0
    assert re.search(r"examples?:\n", proc.stdout) and f"sounding {command}" in proc.stdout


def test_missing_path_fails_at_once_with_one_line(tmp_path: Path) -> None:
    proc = run("index", str(tmp_path / "no-such-folder"), "--index", str(tmp_path / "idx"))
    assert proc.returncode == 2
    assert "does not exist" in one_line_error(proc)
    assert not (tmp_path / "idx").exists()


def test_search_without_an_index_says_how_to_build_one(tmp_path: Path) -> None:
    proc = run("search", "pump", "--index", str(tmp_path / "idx"))
    assert proc.returncode == 4
    assert "sounding index" in one_line_error(proc)


def test_bad_model_folder_is_one_line(tmp_path: Path) -> None:
    (tmp_path / "docs").mkdir()
    (tmp_path / "docs" / "a.md").write_text("# A\n\ntext\n")
    proc = run(
        "index",
        str(tmp_path / "docs"),
        "--index",
        str(tmp_path / "idx"),
        "--model",
        str(tmp_path),
    )
    assert proc.returncode == 3
    assert "model folder" in one_line_error(proc)


def test_bad_setting_from_the_environment_is_one_line(tmp_path: Path) -> None:
    proc = run("search", "x", env={"SOUNDING_CHUNK_TOKENS": "lots"})
    assert proc.returncode == 2
    assert "chunk_tokens" in one_line_error(proc)


@pytest.mark.slow
def test_index_and_search_round_trip(tmp_path: Path) -> None:
    docs = tmp_path / "docs"
    docs.mkdir()
    (docs / "boiler.md").write_text(
        "---\ntitle: Boiler restart\n---\n## Steps\n\nBleed the radiator, then relight the pilot.\n"
    )
    (docs / "canteen.txt").write_text("Canteen hours\n\nLunch is served from noon until two.\n")
    (docs / "photo.jpg").write_bytes(b"\xff\xd8\xff")
    idx = str(tmp_path / "idx")
    first = run("index", str(docs), "--index", idx)
    assert first.returncode == 0, first.stderr
    assert "added 2" in first.stdout and "skipped photo.jpg: unsupported" in first.stdout
    again = run("index", str(docs), "--index", idx, "--json")
    report = json.loads(again.stdout)
    assert report["unchanged"] == 2 and report["chunks_embedded"] == 0
    found = run("search", "when can I eat at midday?", "--index", idx, "-k", "1", "--json")
    assert found.returncode == 0, found.stderr
    (hit,) = json.loads(found.stdout)
    assert hit["document_id"] == "canteen.txt" and hit["rank"] == 1
    narrowed = run(
        "search",
        "when can I eat at midday?",
        "--index",
        idx,
        "-k",
        "1",
        "--json",
        "--under",
        "boiler",
    )
    assert [h["document_id"] for h in json.loads(narrowed.stdout)] == ["boiler.md"]


@pytest.mark.slow
def test_nothing_indexable_is_an_error(tmp_path: Path) -> None:
    docs = tmp_path / "docs"
    docs.mkdir()
    (docs / "empty.md").write_text("")
    proc = run("index", str(docs), "--index", str(tmp_path / "idx"))
    assert proc.returncode == 1
    assert "skipped empty.md" in proc.stdout
    assert "nothing could be indexed" in one_line_error(proc)
