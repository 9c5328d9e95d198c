"""The API key store: only salted scrypt hashes on disk, revocation at once, and its CLI."""

from __future__ import annotations

import hashlib
import json
import sqlite3
import stat
import subprocess
import threading
from pathlib import Path

import pytest
import sounding.service.keys as keys
from sounding.indexer.errors import AccessError
from sounding.service.keys import SCOPES, KeyStore, check_groups, scope_rank

from sounding.cli import main


@pytest.fixture
def store(tmp_path: Path):
    with KeyStore(tmp_path / "idx" / "keys.db") as s:
        yield s


def on_disk(path: Path) -> bytes:
    """Every byte SQLite keeps for this database: the file, its WAL and shared memory."""
    return b"".join(p.read_bytes() for p in sorted(path.parent.glob(path.name + "*")))


def test_secret_is_shown_once_and_only_its_hash_is_stored(store: KeyStore) -> None:
    record, secret = store.create("wiki-bot", "read", "hr,finance", act_for=True)
    assert secret.startswith(f"snd_{record.id}_") and len(secret) == 4 + 12 + 1 + 43
    assert (record.name, record.scope, record.groups, record.act_for) == (
        "wiki-bot",
        "read",
        frozenset({"hr", "finance"}),
        True,
    )
    data = on_disk(store.path)
    random_part = secret[len("snd_") + 12 + 1 :]  # may itself hold '_'
    assert secret.encode() not in data and random_part.encode() not in data
    assert record.id.encode() in data  # the public part is what finds the row
    listed = store.list()
    assert listed == [record]
    assert secret not in json.dumps([r.to_json() for r in listed])
    assert set(listed[0].to_json()) == {
        "id",
        "name",
        "scope",
        "groups",
        "act_for",
        "act_for_groups",
        "created_at",
        "revoked_at",
    }


def test_hash_is_scrypt_with_the_stated_parameters_and_a_salt_per_key(store: KeyStore) -> None:
    _, secret_a = store.create("a", "read")
    _, secret_b = store.create("b", "read")
    conn = sqlite3.connect(store.path)
    rows = conn.execute(
        "SELECT name, salt, hash, scrypt_n, scrypt_r, scrypt_p FROM keys ORDER BY name"
    ).fetchall()
    conn.close()
    # Percival 2009, interactive logins: N=2^14, r=8, p=1 (also RFC 7914 section 2 on r, p).
    assert [(n, r, p) for *_, n, r, p in rows] == [(2**14, 8, 1)] * 2
    (_, salt_a, hash_a, *_), (_, salt_b, hash_b, *_) = rows
    assert len(salt_a) == len(salt_b) == 16 and salt_a != salt_b
    # Recomputed with the standard library, independently of the store's helper.
    for secret, salt, stored in ((secret_a, salt_a, hash_a), (secret_b, salt_b, hash_b)):
        assert stored == hashlib.scrypt(secret.encode(), salt=salt, n=2**14, r=8, p=1, dklen=32)


def test_keys_file_is_readable_by_its_owner_only(tmp_path: Path) -> None:
    path = tmp_path / "new" / "keys.db"
    with KeyStore(path) as s:
        s.create("a", "read")
        files = sorted(path.parent.glob("keys.db*"))
        assert [p.name for p in files] == ["keys.db", "keys.db-shm", "keys.db-wal"]
        for p in files:  # the WAL and shm files too, while open
            assert stat.S_IMODE(p.stat().st_mode) == 0o600, p
    assert stat.S_IMODE(path.parent.stat().st_mode) == 0o700
    path.chmod(0o644)
    KeyStore(path).close()  # a loosened file is tightened again
    assert stat.S_IMODE(path.stat().st_mode) == 0o600


def test_right_secret_passes_and_wrong_or_malformed_ones_fail(store: KeyStore) -> None:
    record, secret = store.create("ana", "write", "hr")
    assert store.authenticate(secret) == record
    wrong = secret[:-1] + ("A" if secret[-1] != "A" else "B")
    other_id = "snd_000000000000_" + secret[17:]
    for bad in (wrong, other_id):
        with pytest.raises(AccessError, match="not recognised"):
            store.authenticate(bad)
    for malformed in ("", "hunter2", secret + "x", secret.upper(), " " + secret):
        with pytest.raises(AccessError, match="not a sounding key"):
            store.authenticate(malformed)


def test_comparison_is_constant_time(store: KeyStore, monkeypatch: pytest.MonkeyPatch) -> None:
    _, secret = store.create("ana", "read")
    calls: list[tuple[bytes, bytes]] = []
    real = keys.hmac.compare_digest

    def spy(a: bytes, b: bytes) -> bool:
        calls.append((a, b))
        return real(a, b)

    monkeypatch.setattr(keys.hmac, "compare_digest", spy)
    store.authenticate(secret)
    with pytest.raises(AccessError):
        store.authenticate(secret[:-1] + ("A" if secret[-1] != "A" else "B"))
    assert len(calls) == 2 and all(len(a) == len(b) == 32 for a, b in calls)


def test_scrypt_runs_once_per_secret_but_every_time_for_wrong_ones(
    store: KeyStore, monkeypatch: pytest.MonkeyPatch
) -> None:
    _, secret = store.create("ana", "read")
    runs: list[int] = []
    real = keys.scrypt
    monkeypatch.setattr(keys, "scrypt", lambda *a: runs.append(1) or real(*a))
    for _ in range(5):
        store.authenticate(secret)
    assert len(runs) == 1
    wrong = secret[:-1] + ("A" if secret[-1] != "A" else "B")
    for _ in range(3):
        with pytest.raises(AccessError):
            store.authenticate(wrong)
    assert len(runs) == 4  # failures are never cached


def test_revocation_counts_at_once_even_for_a_cached_key_and_from_another_process(
    store: KeyStore,
) -> None:
    record, secret = store.create("bot", "read")
    store.authenticate(secret)  # now in the cache
    with KeyStore(store.path) as cli:  # what `sounding keys revoke` opens
        revoked = cli.revoke("bot")
    assert revoked.revoked and revoked.id == record.id
    with pytest.raises(AccessError, match=r"'bot' \(.*\) was revoked on 20"):
        store.authenticate(secret)
    assert store.list()[0].revoked_at == revoked.revoked_at


def test_revoked_state_is_told_only_to_a_holder_of_the_secret(store: KeyStore) -> None:
    _, secret = store.create("bot", "read")
    store.revoke("bot")
    with pytest.raises(AccessError, match="not recognised"):
        store.authenticate(secret[:-1] + ("A" if secret[-1] != "A" else "B"))


def test_revoke_by_name_or_id_and_name_reuse(store: KeyStore) -> None:
    first, _ = store.create("bot", "read")
    with pytest.raises(AccessError, match="exists already"):
        store.create("bot", "admin")
    store.revoke(first.id)
    assert store.revoke(first.id).revoked_at is not None  # idempotent by id
    with pytest.raises(AccessError, match="revoked already"):
        store.revoke("bot")
    second, secret = store.create("bot", "write")  # a revoked key's name is free again
    assert second.id != first.id and store.authenticate(secret) == second
    assert store.revoke("bot").id == second.id
    assert [r.id for r in store.list(include_revoked=False)] == []
    with pytest.raises(AccessError, match="no key named 'nobody'"):
        store.revoke("nobody")


@pytest.mark.parametrize("name", ["", "-bot", "bot bot", "ana@example", "x" * 65, "é"])
def test_bad_names_are_refused(store: KeyStore, name: str) -> None:
    with pytest.raises(AccessError, match="key name"):
        store.create(name, "read")


@pytest.mark.parametrize("scope", ["", "READ", "owner", "read,write"])
def test_bad_scopes_are_refused(store: KeyStore, scope: str) -> None:
    with pytest.raises(AccessError, match="unknown scope"):
        store.create("bot", scope)
    assert store.list() == []


@pytest.mark.parametrize(
    "groups",
    ["hr,,finance", "a b", "-hr", "hr;finance", "x" * 65, ",".join(f"g{i}" for i in range(65))],
)
def test_bad_groups_are_refused(store: KeyStore, groups: str) -> None:
    with pytest.raises(AccessError, match="group"):
        store.create("bot", "read", groups)


@pytest.mark.parametrize(
    ("given", "expected"),
    [
        (None, frozenset()),
        ("", frozenset()),
        ("  ", frozenset()),
        ("hr", {"hr"}),
        (" hr , finance ,hr", {"hr", "finance"}),
        (["ops.oncall", "HR_2"], {"ops.oncall", "HR_2"}),
    ],
)
def test_groups_parse(given, expected) -> None:
    assert check_groups(given) == frozenset(expected)


def test_scopes_are_ordered() -> None:
    assert [scope_rank(s) for s in SCOPES] == [0, 1, 2] and SCOPES == ("read", "write", "admin")


def test_concurrent_checks_of_one_store_agree(store: KeyStore) -> None:
    made = [store.create(f"k{i}", "read") for i in range(4)]
    results: list[str] = []
    errors: list[BaseException] = []

    def check(secret: str) -> None:
        try:
            for _ in range(5):
                results.append(store.authenticate(secret).name)
        except BaseException as exc:  # noqa: BLE001 - reported below
            errors.append(exc)

    threads = [threading.Thread(target=check, args=(s,)) for _, s in made * 2]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert not errors and sorted(results) == sorted([r.name for r, _ in made] * 10)


# --- the CLI -------------------------------------------------------------------------


def test_cli_create_prints_the_secret_once_on_stdout(tmp_path: Path, capsys) -> None:
    index = str(tmp_path / "idx")
    assert (
        main(
            [
                "keys",
                "create",
                "--name",
                "chat-bot",
                "--scope",
                "read",
                "--groups",
                "hr,finance",
                "--act-for",
                "--index",
                index,
            ]
        )
        == 0
    )
    out, err = capsys.readouterr()
    secret = out.strip()
    assert out.count("\n") == 1 and secret.startswith("snd_")
    assert err.count("\n") == 1 and "not shown again" in err and secret not in err
    with KeyStore(tmp_path / "idx" / "keys.db") as s:
        record = s.authenticate(secret)
    assert record.groups == {"hr", "finance"} and record.act_for and record.scope == "read"

    assert main(["keys", "list", "--index", index, "--json"]) == 0
    out, _ = capsys.readouterr()
    [listed] = json.loads(out)
    assert listed["name"] == "chat-bot" and listed["groups"] == ["finance", "hr"]
    assert secret not in out and secret[17:] not in out
    assert main(["keys", "list", "--index", index]) == 0
    out, _ = capsys.readouterr()
    assert "chat-bot" in out and "live" in out and "act-for" in out and secret not in out

    assert main(["keys", "revoke", "chat-bot", "--index", index]) == 0
    out, _ = capsys.readouterr()
    assert "revoked key 'chat-bot'" in out
    assert main(["keys", "list", "--index", index]) == 0
    assert "revoked 20" in capsys.readouterr().out


def test_cli_keys_path_setting_wins(tmp_path: Path, capsys, monkeypatch) -> None:
    monkeypatch.setenv("SOUNDING_KEYS_PATH", str(tmp_path / "elsewhere.db"))
    assert (
        main(
            ["keys", "create", "--name", "a", "--scope", "admin", "--index", str(tmp_path / "idx")]
        )
        == 0
    )
    assert (tmp_path / "elsewhere.db").is_file() and not (tmp_path / "idx").exists()
    assert (
        main(
            [
                "keys",
                "create",
                "--name",
                "b",
                "--scope",
                "admin",
                "--keys",
                str(tmp_path / "third.db"),
            ]
        )
        == 0
    )
    assert (tmp_path / "third.db").is_file()


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        (["create", "--name", "a", "--scope", "owner"], "unknown scope 'owner'"),
        (["create", "--name", "a b", "--scope", "read"], "key name 'a b' is not valid"),
        (["create", "--name", "a", "--scope", "read", "--groups", "hr,"], "group '' is not"),
        (["create", "--name", "dup", "--scope", "read"], "exists already"),
        (["revoke", "nobody"], "no key named 'nobody'"),
    ],
)
def test_cli_bad_values_are_one_line_and_exit_2(tmp_path: Path, capsys, argv, message) -> None:
    index = ["--index", str(tmp_path / "idx")]
    assert main(["keys", "create", "--name", "dup", "--scope", "read", *index]) == 0
    capsys.readouterr()
    assert main(["keys", *argv, *index]) == 2
    out, err = capsys.readouterr()
    assert out == "" and err.count("\n") == 1 and message in err and err.startswith("sounding:")


def test_cli_list_without_a_keys_file_says_how_to_make_one(tmp_path: Path, capsys) -> None:
    assert main(["keys", "list", "--index", str(tmp_path / "none")]) == 2
    assert "sounding keys create" in capsys.readouterr().err
    assert not (tmp_path / "none").exists()


def run_cli(*args: str, env: dict[str, str] | None = None) -> subprocess.CompletedProcess:
    """The command in-process (click's CliRunner), no SOUNDING_* setting but ``env``."""
    import os

    from click.testing import CliRunner

    from sounding.cli import cli

    unset: dict[str, str | None] = {k: None for k in os.environ if k.startswith("SOUNDING_")}
    result = CliRunner(env={**unset, **(env or {})}).invoke(cli, list(args))
    return subprocess.CompletedProcess(list(args), result.exit_code, result.stdout, result.stderr)


@pytest.mark.parametrize(
    "argv", [["keys"], ["keys", "create"], ["keys", "list"], ["keys", "revoke"]]
)
def test_every_keys_help_has_an_example(argv: list[str]) -> None:
    proc = run_cli(*argv, "--help")
    assert proc.returncode == 0
    assert "example:\n" in proc.stdout or "examples:\n" in proc.stdout
    assert f"sounding {' '.join(argv)}" in proc.stdout


@pytest.mark.parametrize("host", ["0.0.0.0", "192.0.2.10", "wiki.example"])
def test_serve_refuses_keys_off_beyond_loopback(tmp_path: Path, host: str) -> None:
    proc = run_cli(
        "serve",
        "--host",
        host,
        "--index",
        str(tmp_path / "idx"),
        env={"SOUNDING_REQUIRE_KEYS": "false"},
    )
    assert proc.returncode == 2
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and "require_keys is false" in lines[0] and host in lines[0]
