"""An act-for key claims only the groups it was created to act for (finding 9).

The store, the migration of a keys file made before the column, the CLI, and the 403 a
claim outside the list gets, in process (FastAPI's TestClient on a tiny app).
"""

from __future__ import annotations

import json
import secrets
import sqlite3
import time
from collections.abc import Iterator
from pathlib import Path

import pytest
import sounding.service.keys as keys
from fastapi import FastAPI
from fastapi.testclient import TestClient
from sounding.indexer.errors import AccessError
from sounding.service.auth import ON_BEHALF_HEADER, ReadCaller, open_keys
from sounding.service.keys import KeyStore
from sounding.service.settings import ServiceSettings

from sounding.cli import main

# The keys table as it was before act_for_groups (commit 2df673a).
OLD_SCHEMA = """
CREATE TABLE keys (
    id TEXT PRIMARY KEY, name TEXT NOT NULL, scope TEXT NOT NULL, groups TEXT NOT NULL,
    act_for INTEGER NOT NULL, salt BLOB NOT NULL, hash BLOB NOT NULL, scrypt_n INTEGER NOT NULL,
    scrypt_r INTEGER NOT NULL, scrypt_p INTEGER NOT NULL, created_at REAL NOT NULL,
    revoked_at REAL
);
"""


def old_keys_file(path: Path, name: str, act_for: bool) -> str:
    """A keys file in the old layout holding one key; returns its secret."""
    key_id = secrets.token_hex(6)
    secret = f"snd_{key_id}_{secrets.token_urlsafe(32)}"
    salt = secrets.token_bytes(16)
    conn = sqlite3.connect(path)
    conn.executescript(OLD_SCHEMA)
    conn.execute(
        "INSERT INTO keys VALUES (?, ?, 'read', '[\"bots\"]', ?, ?, ?, ?, 8, 1, ?, NULL)",
        (key_id, name, int(act_for), salt, keys.scrypt(secret, salt), 2**14, time.time()),
    )
    conn.commit()
    conn.close()
    return secret


@pytest.fixture(scope="module")
def served(tmp_path_factory: pytest.TempPathFactory) -> Iterator[tuple[TestClient, dict]]:
    """A tiny app answering with the caller's groups; keys: bounded, none, legacy."""
    settings = ServiceSettings(index_dir=tmp_path_factory.mktemp("idx"))
    made = {"legacy": old_keys_file(settings.keys_file, "legacy", act_for=True)}
    with KeyStore(settings.keys_file) as store:
        made["bot"] = store.create("bot", "read", "bots", True, act_for_groups="hr,ops")[1]
        made["unlisted"] = store.create("unlisted", "read", "bots", True)[1]
    app = FastAPI()
    app.state.settings = settings

    @app.get("/read")
    def read(caller: ReadCaller) -> dict:
        return {"groups": sorted(caller.groups), "on_behalf": caller.on_behalf}

    app.state.keys = open_keys(settings)
    with TestClient(app, client=("127.0.0.1", 50000)) as client:
        yield client, made
    app.state.keys.close()


def ask(served, who: str, claim: str):
    client, made = served
    return client.get(
        "/read", headers={"Authorization": f"Bearer {made[who]}", ON_BEHALF_HEADER: claim}
    )


@pytest.mark.parametrize(("claim", "groups"), [("hr", ["hr"]), ("ops,hr", ["hr", "ops"]), ("", [])])
def test_groups_in_the_list_are_claimed(served, claim: str, groups: list[str]) -> None:
    r = ask(served, "bot", claim)
    assert r.status_code == 200, r.text
    assert r.json() == {"groups": groups, "on_behalf": True}


@pytest.mark.parametrize(("claim", "named"), [("finance", "finance"), ("hr,finance", "finance")])
def test_a_group_outside_the_list_is_403_naming_it(served, claim: str, named: str) -> None:
    r = ask(served, "bot", claim)
    assert r.status_code == 403
    detail = r.json()["detail"]
    assert f"may not act for group(s) {named}" in detail and "hr, ops" in detail
    assert "--act-for-groups" in detail


@pytest.mark.parametrize("who", ["unlisted", "legacy"])
def test_an_act_for_key_without_a_list_may_claim_no_group(served, who: str) -> None:
    """Fail-closed: no list (a new key without one, or one from before the column)."""
    assert ask(served, who, "hr").status_code == 403
    r = ask(served, who, "")  # a user in no group: nothing beyond unrestricted pages
    assert r.status_code == 200 and r.json()["groups"] == []


def test_an_old_keys_file_is_migrated_and_its_keys_keep_working(tmp_path: Path) -> None:
    path = tmp_path / "keys.db"
    secret = old_keys_file(path, "old-reader", act_for=False)
    with KeyStore(path) as store:
        record = store.authenticate(secret)
        assert (record.name, record.groups, record.act_for_groups) == (
            "old-reader",
            frozenset({"bots"}),
            frozenset(),
        )
        store.create("new", "read", None, True, act_for_groups="hr")
    with KeyStore(path) as again:  # a second open finds the column there
        assert [r.act_for_groups for r in again.list()] == [frozenset(), frozenset({"hr"})]


def test_act_for_groups_need_the_act_for_right(tmp_path: Path) -> None:
    with KeyStore(tmp_path / "keys.db") as store:
        with pytest.raises(AccessError, match="act-for"):
            store.create("a", "read", act_for_groups="hr")
        with pytest.raises(AccessError, match="group"):
            store.create("b", "read", act_for=True, act_for_groups="hr;ops")


def test_cli_creates_and_lists_act_for_groups(tmp_path: Path, capsys) -> None:
    index = ["--index", str(tmp_path / "idx")]
    argv = ["keys", "create", "--name", "bot", "--scope", "read", "--act-for"]
    assert main([*argv, "--act-for-groups", "hr,ops", *index]) == 0
    out, err = capsys.readouterr()
    assert "act-for groups hr,ops" in err and out.strip().startswith("snd_")
    assert main(["keys", "list", *index]) == 0
    assert "act-for=hr,ops" in capsys.readouterr().out
    assert main(["keys", "list", "--json", *index]) == 0
    [listed] = json.loads(capsys.readouterr().out)
    assert listed["act_for"] is True and listed["act_for_groups"] == ["hr", "ops"]
    plain = ["keys", "create", "--name", "plain", "--scope", "read"]
    assert main([*plain, "--act-for-groups", "hr", *index]) == 2
    assert "--act-for-groups needs --act-for" in capsys.readouterr().err


def test_an_act_for_key_from_an_old_keys_file_may_not_claim_any_group(tmp_path: Path) -> None:
    """The unbounded claim of finding 9, with only what the old keys file holds."""
    settings = ServiceSettings(index_dir=tmp_path)
    secret = old_keys_file(settings.keys_file, "old-bot", act_for=True)
    app = FastAPI()
    app.state.settings = settings

    @app.get("/read")
    def read(caller: ReadCaller) -> dict:
        return {"groups": sorted(caller.groups)}

    app.state.keys = open_keys(settings)
    try:
        with TestClient(app, client=("127.0.0.1", 50000)) as client:
            r = client.get(
                "/read", headers={"Authorization": f"Bearer {secret}", ON_BEHALF_HEADER: "hr"}
            )
    finally:
        app.state.keys.close()
    assert r.status_code == 403 and "hr" in r.json()["detail"], r.text
