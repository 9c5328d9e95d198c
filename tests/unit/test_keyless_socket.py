"""Keys off serves keyless requests only from a loopback socket (finding 8).

The settings may say loopback while the server listens elsewhere (``uvicorn --factory
--host 0.0.0.0`` does not change ``SOUNDING_HOST``), so the check is the connection's peer
address. No traffic leaves loopback here: the ASGI scope's client address is set by
FastAPI's TestClient, which is what uvicorn fills in from the socket.
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest
from fastapi import FastAPI
from fastapi.testclient import TestClient
from sounding.indexer.build import refresh_index
from sounding.indexer.embedding import HashingEmbedder
from sounding.service.app import create_app
from sounding.service.keys import KeyStore
from sounding.service.settings import ServiceSettings

PAGE = {"runbooks/pump.md": "# Pump\n\nOpen the valve slowly.\n"}


@pytest.fixture(scope="module")
def app_and_key(tmp_path_factory: pytest.TempPathFactory) -> Iterator[tuple[FastAPI, str]]:
    tmp = tmp_path_factory.mktemp("keyless")
    (tmp / "wiki" / "runbooks").mkdir(parents=True)
    (tmp / "wiki" / "runbooks" / "pump.md").write_text(PAGE["runbooks/pump.md"])
    # The setting says loopback, as it did when uvicorn was started on another address.
    settings = ServiceSettings(
        index_dir=tmp / "index", require_keys=False, host="127.0.0.1", reload_check_seconds=0
    )
    embedder = HashingEmbedder(32, seed=5)
    refresh_index([tmp / "wiki"], settings, embedder)
    with KeyStore(settings.keys_file) as store:
        _, secret = store.create("writer", "write")
    yield create_app(settings, embedder=embedder), secret


def _client(app: FastAPI, host: str) -> TestClient:
    return TestClient(app, client=(host, 50123))


@pytest.mark.parametrize("host", ["10.1.2.3", "192.168.0.7", "2001:db8::1", "::ffff:10.0.0.1"])
def test_a_keyless_request_from_another_address_is_refused(app_and_key, host: str) -> None:
    app, _ = app_and_key
    with _client(app, host) as client:
        put = client.put("/documents/api/x.md", json={"text": "# X\n\nx\n"})
        assert put.status_code == 401, put.text
        assert put.headers["www-authenticate"] == 'Bearer realm="sounding"'
        assert "loopback" in put.json()["detail"] and host in put.json()["detail"]
        assert client.post("/search", json={"query": "pump"}).status_code == 401
        assert client.get("/documents/runbooks/pump.md").status_code == 401
        assert client.get("/health").status_code == 200  # never needs a key


def test_a_request_with_no_address_or_a_name_is_refused(app_and_key) -> None:
    app, _ = app_and_key
    with _client(app, "testclient") as client:
        assert client.post("/search", json={"query": "pump"}).status_code == 401


@pytest.mark.parametrize("host", ["127.0.0.1", "127.8.9.10", "::1", "::ffff:127.0.0.1"])
def test_a_keyless_request_from_loopback_is_anonymous(app_and_key, host: str) -> None:
    app, _ = app_and_key
    with _client(app, host) as client:
        r = client.post("/search", json={"query": "pump"})
        assert r.status_code == 200, r.text


def test_a_key_from_another_address_is_still_accepted(app_and_key) -> None:
    app, secret = app_and_key
    with _client(app, "10.1.2.3") as client:
        r = client.put(
            "/documents/api/remote.md",
            json={"text": "# Remote\n\nfrom afar\n"},
            headers={"Authorization": f"Bearer {secret}"},
        )
        assert r.status_code == 200, r.text


def test_from_loopback_without_a_client_address(tmp_path: Path) -> None:
    from sounding.service.auth import from_loopback
    from starlette.requests import Request

    assert not from_loopback(Request({"type": "http", "client": None, "headers": []}))
    assert from_loopback(Request({"type": "http", "client": ("127.0.0.1", 1), "headers": []}))
