"""``sounding search --server``: the same passages as in process, over a real uvicorn server.

The fake encoder indexes and serves; the in-process command loads the same fake, so both
paths rank the same index with the same vectors and must print the same thing.
"""

from __future__ import annotations

import json
import os
from collections.abc import Iterator
from pathlib import Path

import pytest
from click.testing import CliRunner, Result
from sounding.indexer.embedding import HashingEmbedder
from sounding.indexer.settings import IndexSettings

from sounding.cli import cli
from sounding.cli import search as search_module
from tests.serving import Served, free_port, served_index

PAGES = {
    "runbooks/pump.md": "---\ntags: [pumps]\n---\n# Pump restart\n\nOpen the valve slowly.\n",
    "runbooks/boiler.md": "# Boiler restart\n\nBleed the radiator, relight the pilot.\n",
    "faq/canteen.txt": "Canteen hours\n\nLunch is served from noon until two.\n",
    "faq/duty.md": "---\ntags: [Pumps, duty]\n---\n# Out of hours\n\nCall the duty engineer.\n",
}


@pytest.fixture(autouse=True)
def clean_environment(monkeypatch: pytest.MonkeyPatch, tmp_path: Path) -> None:
    for name in list(os.environ):
        if name.startswith("SOUNDING_"):
            monkeypatch.delenv(name)
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "cache"))


@pytest.fixture(scope="module")
def served(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Served]:
    with served_index(
        tmp_path_factory.mktemp("client"), PAGES, keys=[("reader", "read", None, False)],
        socket=True,
    ) as s:  # fmt: skip
        yield s


@pytest.fixture
def same_encoder(monkeypatch: pytest.MonkeyPatch, served: Served) -> None:
    """The in-process command encodes with the fake the server uses."""
    monkeypatch.setattr(IndexSettings, "embedder", lambda self: HashingEmbedder(32, seed=7))


def sounding(*args: str, env: dict[str, str] | None = None) -> Result:
    return CliRunner().invoke(cli, list(args), env=env)


def one_line_error(result: Result) -> str:
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in result.stderr, result.stderr
    return lines[0]


@pytest.mark.parametrize(
    "options",
    [
        [],
        ["--mode", "lexical"],
        ["--mode", "dense", "-k", "2"],
        ["--tag", "pumps"],
        ["--under", "runbooks/", "--collection", "wiki"],
        ["--after", "2000-01-01"],
        ["--after", "2999-01-01T00:00:00Z"],
    ],
)
def test_server_and_in_process_print_the_same(
    served: Served, same_encoder: None, options: list[str]
) -> None:
    key = {"SOUNDING_API_KEY": served.keys["reader"]}
    for extra in (["--json"], []):
        local = sounding("search", "restart the pump", *options, *extra,
                         "--index", str(served.settings.index_dir))  # fmt: skip
        remote = sounding("search", "restart the pump", *options, *extra,
                          "--server", served.url, env=key)  # fmt: skip
        assert local.exit_code == 0 and remote.exit_code == 0, (local.stderr, remote.stderr)
        assert remote.stdout == local.stdout
    if "2999" in " ".join(options):
        assert remote.stdout == "no results\n"
    else:
        assert remote.stdout.startswith(" 1. ")


def test_json_passages_carry_the_api_fields(served: Served) -> None:
    key = {"SOUNDING_API_KEY": served.keys["reader"]}
    result = sounding("search", "lunch", "--json", "--server", served.url, env=key)
    hits = json.loads(result.stdout)
    assert hits and set(hits[0]) == set(search_module.PASSAGE_FIELDS)


def test_server_and_key_file_from_the_environment(served: Served, tmp_path: Path) -> None:
    key_file = tmp_path / "key"
    key_file.write_text(served.keys["reader"] + "\n")
    env = {"SOUNDING_SERVER": served.url, "SOUNDING_API_KEY_FILE": str(key_file)}
    result = sounding("search", "lunch", "-k", "1", env=env)
    assert result.exit_code == 0 and "[faq/canteen.txt]" in result.stdout, result.stderr
    # An explicit --key-file wins over SOUNDING_API_KEY.
    env = {"SOUNDING_SERVER": served.url, "SOUNDING_API_KEY": "snd_000000000000_bad"}
    assert sounding("search", "lunch", "--key-file", str(key_file), env=env).exit_code == 0


@pytest.mark.parametrize(
    ("env", "code", "text"),
    [
        ({}, 77, "set SOUNDING_API_KEY or --key-file"),
        ({"SOUNDING_API_KEY": "snd_000000000000_nope"}, 77, "check the key"),
    ],
)
def test_refused_keys_are_one_line(served: Served, env: dict, code: int, text: str) -> None:
    result = sounding("search", "lunch", "--server", served.url, env=env)
    assert result.exit_code == code
    line = one_line_error(result)
    assert "401" in line and text in line and result.stdout == ""


def test_a_bad_request_is_exit_2(served: Served) -> None:
    key = {"SOUNDING_API_KEY": served.keys["reader"]}
    result = sounding("search", "lunch", "-k", "100000", "--server", served.url, env=key)
    assert result.exit_code == 2 and "422" in one_line_error(result)


def test_an_unreachable_server_says_how_to_start_one(tmp_path: Path) -> None:
    url = f"http://127.0.0.1:{free_port()}"
    result = sounding("search", "lunch", "--server", url)
    assert result.exit_code == 69
    line = one_line_error(result)
    assert f"cannot reach {url}" in line and "sounding serve" in line


@pytest.mark.parametrize(
    ("argv", "text"),
    [
        (["--server", "ftp://example"], "not an http:// or https:// address"),
        (["--key-file", "/no/such/key", "--server", "http://127.0.0.1:9"], "cannot read the key"),
    ],
)
def test_bad_client_options_are_one_line(argv: list[str], text: str) -> None:
    result = sounding("search", "lunch", *argv)
    assert result.exit_code != 0 and text in one_line_error(result)


@pytest.mark.parametrize("value", ["yesterday", "2026-13-01", "1e400x"])
def test_a_bad_after_date_is_a_usage_error(value: str) -> None:
    result = sounding("search", "x", "--after", value)
    assert result.exit_code == 2 and "--after" in one_line_error(result)


def test_after_reads_dates_times_and_unix_seconds() -> None:
    parse = search_module.parse_after
    assert parse("2026-06-01") == parse("2026-06-01T00:00:00Z") == parse("1780272000")
    assert parse("2026-06-01T02:00:00+02:00") == parse("2026-06-01")


def test_the_server_hint_is_shown_once(monkeypatch: pytest.MonkeyPatch, capsys) -> None:
    monkeypatch.setattr(search_module.sys.stderr, "isatty", lambda: True, raising=False)
    search_module.hint_server_once()
    search_module.hint_server_once()
    err = capsys.readouterr().err
    assert err.count("note:") == 1 and "sounding serve" in err
