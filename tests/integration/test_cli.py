"""The ``sounding`` command: exit codes, one-line errors, help, output formats.

Commands run in-process with click's CliRunner; a few checks start the real
console script to see what a shell sees (marked ``subprocess``).
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
from click.testing import CliRunner, Result
from sounding.indexer.embedding import HashingEmbedder
from sounding.indexer.settings import IndexSettings

from sounding.cli import cli, main
from tests.unit.test_evaluation import tiny_collection

COMMANDS = ["index", "search", "serve", "eval", "check", "judgments", "keys"]


@pytest.fixture(autouse=True)
def clean_environment(monkeypatch: pytest.MonkeyPatch) -> None:
    """No SOUNDING_* setting of the developer's shell leaks into a command."""
    for name in list(os.environ):
        if name.startswith("SOUNDING_"):
            monkeypatch.delenv(name)


def sounding(*args: str) -> Result:
    return CliRunner().invoke(cli, list(args))


def one_line_error(result: Result) -> str:
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1, result.stderr
    assert "Traceback" not in result.stderr
    return lines[0]


@pytest.fixture
def fake_encoder(monkeypatch: pytest.MonkeyPatch) -> None:
    """Every command encodes with the seeded fake instead of loading the model."""
    monkeypatch.setattr(IndexSettings, "embedder", lambda self: HashingEmbedder(16))


@pytest.mark.parametrize(
    "command",
    [*COMMANDS, "keys create", "keys list", "keys revoke", "judgments export"],
)
def test_every_command_help_has_an_example(command: str) -> None:
    result = sounding(*command.split(), "--help")
    assert result.exit_code == 0
    assert re.search(r"examples?:\n", result.stdout) and f"sounding {command}" in result.stdout


def test_the_group_help_lists_every_command() -> None:
    result = sounding("--help")
    assert result.exit_code == 0 and "sounding index demo_corpus" in result.stdout
    assert all(re.search(rf"^  {c}\s", result.stdout, re.M) for c in COMMANDS)


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        ([], "Missing command"),
        (["bogus"], "No such command 'bogus'"),
        (["index"], "Missing argument 'PATH...'"),
        (["search", "x", "--mode", "fuzzy"], "'fuzzy' is not one of"),
        (["search", "x", "-k", "many"], "'many' is not a valid integer"),
        (["keys"], "Missing command"),
        (["keys", "create", "--name", "a"], "Missing option '--scope'"),
    ],
)
def test_usage_errors_are_one_line_and_exit_2(argv: list[str], message: str) -> None:
    result = sounding(*argv)
    assert result.exit_code == 2
    line = one_line_error(result)
    assert line.startswith("sounding") and message in line and "--help" in line


def test_main_returns_the_exit_code(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["--help"]) == 0
    assert "Usage: sounding" in capsys.readouterr().out
    assert main(["index"]) == 2
    assert "Missing argument" in capsys.readouterr().err


def test_missing_path_fails_at_once_with_one_line(tmp_path: Path) -> None:
    result = sounding("index", str(tmp_path / "no-such-folder"), "--index", str(tmp_path / "idx"))
    assert result.exit_code == 2
    line = one_line_error(result)
    assert "the folder to index does not exist" in line and "no-such-folder" in line
    assert not (tmp_path / "idx").exists()


@pytest.mark.parametrize("command", [["index", "."], ["search", "pump"], ["check"]])
def test_an_index_folder_that_is_a_file_is_one_line(tmp_path: Path, command: list[str]) -> None:
    (tmp_path / "idx").write_text("not a folder")
    result = sounding(*command, "--index", str(tmp_path / "idx"))
    assert result.exit_code == 2
    line = one_line_error(result)
    assert "is a file, not a folder" in line and "SOUNDING_INDEX_DIR" in line
    assert "lock" not in line and "sounding index" not in line


def test_an_empty_folder_says_there_is_nothing_to_read(tmp_path: Path, fake_encoder) -> None:
    (tmp_path / "docs").mkdir()
    result = sounding("index", str(tmp_path / "docs"), "--index", str(tmp_path / "idx"))
    assert result.exit_code == 1
    line = one_line_error(result)
    assert "nothing could be indexed" in line and "above" not in line and ".md" in line


def test_the_plain_report_lists_changed_removed_and_skipped(tmp_path: Path, fake_encoder) -> None:
    docs = tmp_path / "docs"
    docs.mkdir()
    (docs / "boiler.md").write_text("# Boiler\n\nBleed the radiator.\n")
    (docs / "canteen.txt").write_text("Canteen hours\n\nLunch at noon.\n")
    idx = str(tmp_path / "idx")
    first = sounding("index", str(docs), "--index", idx, "--quiet")
    assert first.stdout.splitlines()[1:] == ["added boiler.md", "added canteen.txt"]
    (docs / "boiler.md").write_text("# Boiler\n\nBleed the radiator, then relight.\n")
    (docs / "canteen.txt").unlink()
    (docs / "photo.jpg").write_bytes(b"\xff\xd8\xff")
    second = sounding("index", str(docs), "--index", idx, "--quiet")
    assert second.exit_code == 0, second.stderr
    lines = second.stdout.splitlines()
    assert lines[0].startswith("added 0, updated 1, removed 1, unchanged 0, skipped 1;")
    assert lines[1:3] == ["updated boiler.md", "removed canteen.txt"]
    assert lines[3].startswith("skipped photo.jpg: ")
    third = sounding("index", str(docs), "--index", idx, "--json")
    assert json.loads(third.stdout)["published"] is False
    assert json.loads(third.stdout)["generation"] == 2


def test_search_without_an_index_says_how_to_build_one(tmp_path: Path) -> None:
    result = sounding("search", "pump", "--index", str(tmp_path / "idx"))
    assert result.exit_code == 4
    assert "sounding index" in one_line_error(result)


def test_bad_model_folder_is_one_line(tmp_path: Path) -> None:
    (tmp_path / "docs").mkdir()
    (tmp_path / "docs" / "a.md").write_text("# A\n\ntext\n")
    result = sounding(
        "index", str(tmp_path / "docs"), "--index", str(tmp_path / "idx"), "--model", str(tmp_path)
    )
    assert result.exit_code == 3
    assert "model folder" in one_line_error(result)


def test_bad_setting_from_the_environment_is_one_line(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("SOUNDING_CHUNK_TOKENS", "lots")
    result = sounding("search", "x")
    assert result.exit_code == 2
    line = one_line_error(result)
    assert "SOUNDING_CHUNK_TOKENS='lots' is not valid: expected a whole number" in line
    assert "http" not in line and "pydantic" not in line


@pytest.mark.parametrize(
    ("name", "value", "expected"),
    [
        ("SOUNDING_PORT", "0", "expected at least 1"),
        ("SOUNDING_PRECISION", "fp16", "expected one of 'auto', 'fp32' or 'bf16'"),
        ("SOUNDING_REQUIRE_KEYS", "maybe", "expected true or false"),
    ],
)
def test_bad_settings_name_the_variable_and_the_form(
    monkeypatch: pytest.MonkeyPatch, name: str, value: str, expected: str
) -> None:
    monkeypatch.setenv(name, value)
    result = sounding("check")
    assert result.exit_code == 2
    assert f"{name}={value!r} is not valid: {expected}" in one_line_error(result)


@pytest.mark.parametrize(
    ("raised", "code", "text"),
    [
        (RuntimeError("boom"), 70, "unexpected error: RuntimeError: boom"),
        (KeyboardInterrupt(), 130, "interrupted"),
    ],
)
def test_unexpected_errors_and_interrupts_are_one_line(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, raised: BaseException, code: int, text: str
) -> None:
    from sounding.indexer import check

    def fail(index_dir: Path):
        raise raised

    monkeypatch.setattr(check, "check_index", fail)
    result = sounding("check", "--index", str(tmp_path))
    assert result.exit_code == code
    assert text in one_line_error(result)


def test_sounding_debug_shows_the_traceback(tmp_path: Path, monkeypatch) -> None:
    from sounding.indexer import check

    def fail(index_dir: Path):
        raise RuntimeError("boom")

    monkeypatch.setattr(check, "check_index", fail)
    monkeypatch.setenv("SOUNDING_DEBUG", "1")
    result = sounding("check", "--index", str(tmp_path))
    assert isinstance(result.exception, RuntimeError)


def test_index_check_search_with_a_fake_encoder(tmp_path: Path, fake_encoder) -> None:
    docs = tmp_path / "docs"
    docs.mkdir()
    (docs / "boiler.md").write_text("# Boiler restart\n\nBleed the radiator, relight the pilot.\n")
    (docs / "canteen.txt").write_text("Canteen hours\n\nLunch is served from noon until two.\n")
    idx = str(tmp_path / "idx")
    first = sounding("index", str(docs), "--index", idx, "--quiet")
    assert first.exit_code == 0, first.stderr
    assert first.stdout.startswith("added 2, updated 0, removed 0, unchanged 0, skipped 0;")
    report = json.loads(sounding("index", str(docs), "--index", idx, "--json").stdout)
    assert report["unchanged"] == 2 and report["chunks_embedded"] == 0
    checked = sounding("check", "--index", idx)
    assert checked.exit_code == 0 and checked.stdout.strip().endswith("is consistent")
    found = sounding("search", "lunch noon", "--index", idx, "-k", "1", "--mode", "lexical")
    assert found.exit_code == 0
    assert re.match(r" 1\. \d+\.\d{3}  Canteen hours  \[canteen.txt\]\n    ", found.stdout)
    hits = json.loads(
        sounding("search", "lunch", "--index", idx, "--json", "--under", "boiler").stdout
    )
    assert [h["document_id"] for h in hits] == ["boiler.md"]
    assert sounding("search", "zzz", "--index", idx, "--mode", "lexical").stdout == "no results\n"


def test_eval_cache_run_file_and_compare(tmp_path: Path, fake_encoder) -> None:
    data = tiny_collection(tmp_path / "tiny")
    cache = tmp_path / "cache"
    runs = {}
    for mode in ("dense", "lexical"):
        runs[mode] = tmp_path / f"{mode}.run"
        result = sounding(
            "eval", str(data), "--mode", mode, "--cache", str(cache), "--json",
            "--run-out", str(runs[mode]),
        )  # fmt: skip
        assert result.exit_code == 0, result.stderr
        out = json.loads(result.stdout)
        assert set(out) == {"ndcg@10", "recall@100", "mrr@10", "map", "queries"}
        assert out["queries"] == 4
    assert len([p for p in cache.iterdir() if not p.name.startswith(".")]) == 1  # one build
    text = sounding("eval", str(data), "--mode", "hybrid")
    assert text.exit_code == 0
    assert text.stdout.splitlines()[0] == f"{data} mode=hybrid queries=4"
    assert [line.split()[0] for line in text.stdout.splitlines()[1:]] == [
        "ndcg@10", "recall@100", "mrr@10", "map",
    ]  # fmt: skip
    compared = sounding(
        "eval", "--compare", str(runs["dense"]), str(runs["lexical"]),
        "--qrels", str(data / "qrels.tsv"), "--json",
    )  # fmt: skip
    assert compared.exit_code == 0, compared.stderr
    assert set(json.loads(compared.stdout)) == {"ndcg@10", "recall@100", "mrr@10", "map"}


def test_eval_cache_from_the_environment(tmp_path: Path, fake_encoder, monkeypatch) -> None:
    data = tiny_collection(tmp_path / "tiny")
    monkeypatch.setenv("SOUNDING_EVAL_CACHE", str(tmp_path / "cache"))
    assert sounding("eval", str(data), "--mode", "lexical").exit_code == 0
    assert any((tmp_path / "cache").iterdir())


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        (["eval"], "name a BEIR-layout folder"),
        (["eval", "--compare", "a.run", "b.run"], "--compare needs --qrels"),
        (["eval", "no-such-folder"], "dataset folder does not exist"),
    ],
)
def test_eval_argument_errors(argv: list[str], message: str) -> None:
    result = sounding(*argv)
    assert result.exit_code == 2 and message in one_line_error(result)


# --- the real console script -------------------------------------------------------


def run(*args: str, env: dict[str, str] | None = None, command: list[str] | None = None):
    full_env = {k: v for k, v in os.environ.items() if not k.startswith("SOUNDING_")}
    full_env.update(env or {})
    return subprocess.run(
        [*(command or [sys.executable, "-m", "sounding.cli"]), *args],
        capture_output=True,
        text=True,
        env=full_env,
        timeout=300,
    )


@pytest.mark.slow  # seconds each: the fast loop stays under a minute
@pytest.mark.subprocess
def test_console_script_and_module_agree_on_exit_codes(tmp_path: Path) -> None:
    script = shutil.which("sounding", path=str(Path(sys.executable).parent))
    assert script, "the `sounding` console script is not installed beside this python"
    for command in ([script], [sys.executable, "-m", "sounding.cli"]):
        assert run("--help", command=command).returncode == 0
        missing = run("index", str(tmp_path / "none"), command=command)
        assert missing.returncode == 2 and len(missing.stderr.strip().splitlines()) == 1
        assert run("search", "x", "--index", str(tmp_path), command=command).returncode == 4


@pytest.mark.subprocess
def test_help_imports_no_heavy_module() -> None:
    code = (
        "import sys\nfrom sounding.cli import main\nmain(['--help'])\n"
        "print(sorted(m for m in ('torch', 'faiss', 'fastapi', 'sounding.service') "
        "if m in sys.modules))"
    )
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert proc.returncode == 0 and proc.stdout.strip().endswith("[]"), proc.stdout


@pytest.mark.slow
@pytest.mark.subprocess
def test_index_and_search_round_trip_with_the_real_encoder(tmp_path: Path) -> None:
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
    found = run("search", "when can I eat at midday?", "--index", idx, "-k", "1", "--json")
    assert found.returncode == 0, found.stderr
    (hit,) = json.loads(found.stdout)
    assert hit["document_id"] == "canteen.txt" and hit["rank"] == 1


@pytest.mark.slow
def test_nothing_indexable_is_an_error(tmp_path: Path) -> None:
    docs = tmp_path / "docs"
    docs.mkdir()
    (docs / "empty.md").write_text("")
    result = sounding("index", str(docs), "--index", str(tmp_path / "idx"))
    assert result.exit_code == 1
    assert "skipped empty.md" in result.stdout
    assert "nothing could be indexed" in one_line_error(result)
