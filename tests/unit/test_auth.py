"""Who is calling: bearer keys, scopes, groups and act-for, in process (FastAPI's TestClient).

The routes here are a tiny app of their own, so these tests check the
dependencies in ``service.auth`` whatever the real routes look like.
Statuses and challenges follow RFC 6750 section 3.1.
"""

from __future__ import annotations

import logging
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from dataclasses import asdict
from pathlib import Path

import pytest
from fastapi import FastAPI, Request
from fastapi.testclient import TestClient
from sounding.indexer.embedding import HashingEmbedder
from sounding.indexer.errors import AccessError, SettingsError
from sounding.service.app import create_app
from sounding.service.auth import (
    ANONYMOUS,
    ON_BEHALF_HEADER,
    AdminCaller,
    Caller,
    ReadCaller,
    WriteCaller,
    open_keys,
    require,
)
from sounding.service.keys import KeyStore
from sounding.service.settings import ServiceSettings

from tests.serving import serving


def tiny_app(settings: ServiceSettings) -> FastAPI:
    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        app.state.keys = open_keys(settings)
        try:
            yield
        finally:
            app.state.keys.close()

    app = FastAPI(lifespan=lifespan)
    app.state.settings = settings

    def shown(caller: Caller) -> dict:
        return asdict(caller) | {"groups": sorted(caller.groups)}

    @app.get("/health")
    def health() -> dict:
        return {"status": "ok"}

    @app.get("/read")
    def read(caller: ReadCaller, request: Request) -> dict:
        return shown(caller) | {"logged": request.state.caller is caller}

    @app.post("/write")
    def write(caller: WriteCaller) -> dict:
        return shown(caller)

    @app.delete("/admin")
    def admin(caller: AdminCaller) -> dict:
        return shown(caller)

    return app


def bearer(secret: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {secret}"}


@pytest.fixture(scope="module")
def served(tmp_path_factory: pytest.TempPathFactory):
    """A service that requires keys, and one secret per kind of key."""
    settings = ServiceSettings(index_dir=tmp_path_factory.mktemp("idx"))
    with KeyStore(settings.keys_file) as store:
        secrets = {
            name: store.create(name, scope, groups, act_for, *acting)[1]
            for name, scope, groups, act_for, *acting in [
                ("reader", "read", "hr", False),
                ("writer", "write", "", False),
                ("boss", "admin", "finance,hr", False),
                ("chat-bot", "read", "bots", True, "finance,hr,HR_2,ops.oncall"),
                ("doomed", "read", "", False),
            ]
        }
    with serving(tiny_app(settings)) as client:
        yield client, secrets, settings


def test_health_never_needs_a_key(served) -> None:
    client, _, _ = served
    assert client.get("/health").status_code == 200


def test_no_key_is_401_with_a_bearer_challenge_and_a_reason(served) -> None:
    client, _, _ = served
    r = client.get("/read")
    assert r.status_code == 401
    assert r.headers["www-authenticate"] == 'Bearer realm="sounding"'  # no error code: 3.1
    assert "Authorization: Bearer" in r.json()["detail"]
    assert "sounding keys create" in r.json()["detail"]


@pytest.mark.parametrize(
    ("authorization", "error", "reason"),
    [
        ("Basic dXNlcjpwYXNz", "invalid_request", "must be 'Bearer <key>'"),
        ("Bearer", "invalid_request", "must be 'Bearer <key>'"),
        ("Bearer hunter2", "invalid_token", "not a sounding key"),
        ("Bearer snd_000000000000_" + "A" * 43, "invalid_token", "not recognised"),
    ],
)
def test_bad_keys_are_401_naming_the_reason(served, authorization, error, reason) -> None:
    client, _, _ = served
    r = client.get("/read", headers={"Authorization": authorization})
    assert r.status_code == 401 and reason in r.json()["detail"]
    challenge = r.headers["www-authenticate"]
    assert challenge.startswith('Bearer realm="sounding", ') and f'error="{error}"' in challenge


def test_wrong_secret_of_a_real_key_is_refused(served) -> None:
    client, secrets, _ = served
    good = secrets["boss"]
    bad = good[:-1] + ("A" if good[-1] != "A" else "B")
    assert client.get("/read", headers=bearer(good)).status_code == 200
    r = client.get("/read", headers=bearer(bad))
    assert r.status_code == 401 and "not recognised" in r.json()["detail"]


def test_scheme_is_case_insensitive(served) -> None:
    client, secrets, _ = served
    r = client.get("/read", headers={"Authorization": f"bearer {secrets['reader']}"})
    assert r.status_code == 200  # RFC 9110 section 11.1: the auth scheme is case-insensitive


@pytest.mark.parametrize(
    ("key", "allowed"),
    [("reader", {"read"}), ("writer", {"read", "write"}), ("boss", {"read", "write", "admin"})],
)
def test_each_scope_includes_the_lower_ones(served, key: str, allowed: set[str]) -> None:
    client, secrets, _ = served
    for scope, method in (("read", "GET"), ("write", "POST"), ("admin", "DELETE")):
        r = client.request(method, f"/{scope}", headers=bearer(secrets[key]))
        if scope in allowed:
            assert r.status_code == 200, (key, scope, r.text)
            assert r.json()["name"] == key
        else:
            assert r.status_code == 403, (key, scope)
            assert f"needs scope '{scope}'" in r.json()["detail"]
            challenge = r.headers["www-authenticate"]
            assert 'error="insufficient_scope"' in challenge and f'scope="{scope}"' in challenge


def test_caller_carries_the_keys_own_groups(served) -> None:
    client, secrets, _ = served
    body = client.get("/read", headers=bearer(secrets["boss"])).json()
    assert body["groups"] == ["finance", "hr"] and body["scope"] == "admin"
    assert body["on_behalf"] is False and body["act_for"] is False and body["key_id"]
    assert body["logged"] is True  # request.state.caller is the same object


@pytest.mark.parametrize(
    ("value", "groups"),
    [
        ("hr,finance", ["finance", "hr"]),
        ("hr", ["hr"]),
        ("", []),
        ("ops.oncall , HR_2,hr", ["HR_2", "hr", "ops.oncall"]),
    ],
)
def test_act_for_key_takes_exactly_the_end_users_groups(served, value, groups) -> None:
    client, secrets, _ = served
    r = client.get("/read", headers=bearer(secrets["chat-bot"]) | {ON_BEHALF_HEADER: value})
    assert r.status_code == 200, r.text
    body = r.json()
    assert body["groups"] == groups  # never the bot's own "bots"
    assert body["on_behalf"] is True and body["name"] == "chat-bot"


def test_act_for_key_without_the_header_has_its_own_groups(served) -> None:
    client, secrets, _ = served
    body = client.get("/read", headers=bearer(secrets["chat-bot"])).json()
    assert body["groups"] == ["bots"] and body["on_behalf"] is False and body["act_for"] is True


@pytest.mark.parametrize("key", ["reader", "writer", "boss"])
def test_keys_without_act_for_may_not_send_the_header(served, key: str) -> None:
    client, secrets, _ = served
    r = client.get("/read", headers=bearer(secrets[key]) | {ON_BEHALF_HEADER: "hr"})
    assert r.status_code == 403
    assert f"key '{key}' lacks the act-for right" in r.json()["detail"]


@pytest.mark.parametrize(
    ("value", "reason"),
    [
        ("hr,,finance", "group '' is not a valid group name"),
        ("hr;finance", "group 'hr;finance'"),
        ("-hr", "group '-hr'"),
        ("a" * 65, "is not a valid group name"),
        (",".join(f"g{i}" for i in range(65)), "at most 64"),
        (",".join(["a" * 60] * 70), "at most 4096"),
        ("caf\u00e9".encode(), "is not a valid group name"),  # latin-1 bytes on the wire
    ],
)
def test_on_behalf_values_are_checked(served, value, reason) -> None:
    client, secrets, _ = served
    r = client.get("/read", headers=bearer(secrets["chat-bot"]) | {ON_BEHALF_HEADER: value})
    assert r.status_code == 400 and reason in r.json()["detail"], r.text


@pytest.mark.parametrize("name", ["Authorization", ON_BEHALF_HEADER])
def test_repeated_headers_are_refused(served, name: str) -> None:
    client, secrets, _ = served
    headers = [("Authorization", f"Bearer {secrets['chat-bot']}"), (ON_BEHALF_HEADER, "hr")]
    headers.append((name, "Bearer x" if name == "Authorization" else "finance"))
    r = client.get("/read", headers=headers)
    assert r.status_code == 400 and f"send the {name} header once" in r.json()["detail"]


def test_keys_made_and_revoked_while_running_count_at_once(served) -> None:
    client, secrets, settings = served
    assert client.get("/read", headers=bearer(secrets["doomed"])).status_code == 200
    with KeyStore(settings.keys_file) as cli:  # what `sounding keys ...` does, aside
        cli.revoke("doomed")
        _, fresh = cli.create("fresh", "read")
    r = client.get("/read", headers=bearer(secrets["doomed"]))
    assert r.status_code == 401 and "'doomed'" in r.json()["detail"]
    assert "revoked" in r.json()["detail"] and "invalid_token" in r.headers["www-authenticate"]
    assert client.get("/read", headers=bearer(fresh)).json()["name"] == "fresh"


# --- keys off, on loopback only ------------------------------------------------------


@pytest.fixture(scope="module")
def open_door(tmp_path_factory: pytest.TempPathFactory):
    settings = ServiceSettings(index_dir=tmp_path_factory.mktemp("idx"), require_keys=False)
    with KeyStore(settings.keys_file) as store:
        _, secret = store.create("reader", "read", "hr")
    with serving(tiny_app(settings)) as client:
        yield client, secret


def test_keys_off_makes_every_caller_anonymous_with_no_groups(open_door) -> None:
    client, _ = open_door
    for method, path in (("GET", "/read"), ("POST", "/write"), ("DELETE", "/admin")):
        r = client.request(method, path)
        assert r.status_code == 200
        body = r.json()
        assert body["name"] == "anonymous" and body["groups"] == []
        assert body["act_for"] is False and body["key_id"] is None


def test_keys_off_anonymous_may_not_act_for_anyone(open_door) -> None:
    client, _ = open_door
    r = client.get("/read", headers={ON_BEHALF_HEADER: "hr"})
    assert r.status_code == 403 and "anonymous callers lack the act-for right" in r.text


def test_keys_off_a_key_sent_anyway_is_still_checked(open_door) -> None:
    client, secret = open_door
    body = client.get("/read", headers=bearer(secret)).json()
    assert body["name"] == "reader" and body["groups"] == ["hr"]
    assert client.post("/write", headers=bearer(secret)).status_code == 403
    assert client.get("/read", headers=bearer("hunter2")).status_code == 401


# --- settings, start-up and the API itself ---------------------------------------------


@pytest.mark.parametrize("host", ["127.0.0.1", "127.3.2.1", "::1", "localhost"])
def test_keys_may_be_off_on_loopback(tmp_path: Path, host: str) -> None:
    settings = ServiceSettings(index_dir=tmp_path, host=host, require_keys=False)
    assert settings.on_loopback
    settings.check_access()


@pytest.mark.parametrize("host", ["0.0.0.0", "::", "10.1.2.3", "wiki.example", "localhost."])
def test_keys_off_beyond_loopback_is_a_settings_error(tmp_path: Path, host: str) -> None:
    settings = ServiceSettings(index_dir=tmp_path, host=host, require_keys=False)
    with pytest.raises(SettingsError, match="keys may be turned off only on loopback"):
        create_app(settings, embedder=HashingEmbedder(16))
    ServiceSettings(index_dir=tmp_path, host=host).check_access()  # keys on: fine anywhere


def test_keys_are_required_by_default(monkeypatch: pytest.MonkeyPatch, tmp_path: Path) -> None:
    monkeypatch.delenv("SOUNDING_REQUIRE_KEYS", raising=False)
    settings = ServiceSettings(index_dir=tmp_path)
    assert settings.require_keys is True and settings.keys_file == tmp_path / "keys.db"
    monkeypatch.setenv("SOUNDING_REQUIRE_KEYS", "false")
    monkeypatch.setenv("SOUNDING_KEYS_PATH", str(tmp_path / "k.db"))
    settings = ServiceSettings(index_dir=tmp_path)
    assert settings.require_keys is False and settings.keys_file == tmp_path / "k.db"


def test_start_logs_say_when_keys_are_off_and_who_can_connect(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    settings = ServiceSettings(index_dir=tmp_path, require_keys=False, port=9999)
    with caplog.at_level(logging.WARNING, logger="sounding.service"):
        open_keys(settings).close()
    [record] = [r for r in caplog.records if "API keys are OFF" in r.getMessage()]
    assert record.levelno == logging.WARNING and "127.0.0.1:9999" in record.getMessage()


def test_start_logs_warn_when_keys_are_required_but_none_exist(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    settings = ServiceSettings(index_dir=tmp_path)
    with caplog.at_level(logging.WARNING, logger="sounding.service"):
        open_keys(settings).close()
    assert any("holds no live key" in r.getMessage() for r in caplog.records)
    with KeyStore(settings.keys_file) as s:
        s.create("a", "read")
    caplog.clear()
    with caplog.at_level(logging.WARNING, logger="sounding.service"):
        open_keys(settings).close()
    assert caplog.records == []


def test_the_real_app_opens_the_keys_store_in_its_lifespan(tmp_path: Path) -> None:
    app = create_app(
        ServiceSettings(index_dir=tmp_path / "idx", reload_check_seconds=0),
        embedder=HashingEmbedder(16),
    )
    with TestClient(app) as client:
        assert isinstance(client.app.state.keys, KeyStore)
        assert client.get("/health").status_code == 200
        store = client.app.state.keys
    assert (tmp_path / "idx" / "keys.db").is_file()
    with pytest.raises(Exception, match="closed"):
        store.list()


@pytest.mark.parametrize(
    ("scope", "allowed"),
    [("read", ["read"]), ("write", ["read", "write"]), ("admin", ["read", "write", "admin"])],
)
def test_caller_may(scope: str, allowed: list[str]) -> None:
    caller = Caller(name="k", scope=scope, groups=frozenset())
    assert [s for s in ("read", "write", "admin") if caller.may(s)] == allowed


def test_anonymous_has_every_scope_but_no_groups() -> None:
    assert ANONYMOUS.may("admin") and ANONYMOUS.groups == frozenset()
    assert not ANONYMOUS.act_for and ANONYMOUS.anonymous


def test_require_is_one_dependency_per_scope_and_refuses_unknown_scopes() -> None:
    assert require("read") is require("read") and require("read") is not require("write")
    with pytest.raises(AccessError, match="unknown scope 'owner'"):
        require("owner")


def test_openapi_shows_the_bearer_scheme_and_the_on_behalf_header(tmp_path: Path) -> None:
    app = tiny_app(ServiceSettings(index_dir=tmp_path))
    schema = app.openapi()
    assert schema["components"]["securitySchemes"]["APIKey"] == {
        "type": "http",
        "scheme": "bearer",
        "bearerFormat": "snd_<id>_<secret>",
        "description": "An API key from `sounding keys create`.",
    }
    params = schema["paths"]["/read"]["get"]["parameters"]
    assert [p["name"] for p in params if p["in"] == "header"] == [ON_BEHALF_HEADER]
    assert "security" not in schema["paths"]["/health"]["get"]
