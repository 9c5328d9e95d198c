"""Serving the app to tests: in process, or on a real uvicorn server in a background thread.

``served_index`` is the one factory the API tests use: it writes pages to a folder, indexes
them with the seeded ``HashingEmbedder``, creates keys, and serves ``create_app`` over it.
By default the app runs in process (FastAPI's ``TestClient``: the lifespan runs, no socket);
``socket=True`` puts it on real uvicorn for what only a server shows (bytes on the wire,
path decoding, a 500 after an exception, concurrency). Either way the test gets an
``httpx.Client`` whose base URL is the service, so a test reads the same in both.
"""

from __future__ import annotations

import socket as sockets
import threading
import time
from collections.abc import Callable, Iterable, Iterator, Mapping
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import httpx
import uvicorn
from fastapi import FastAPI
from fastapi.testclient import TestClient
from sounding.indexer.build import refresh_index
from sounding.indexer.embedding import HashingEmbedder
from sounding.service.app import create_app
from sounding.service.keys import KeyStore
from sounding.service.settings import ServiceSettings

# (name, scope, groups, act_for[, act_for_groups]), as `sounding keys create` takes them.
KeySpec = tuple[str, str, str | None, bool] | tuple[str, str, str | None, bool, str]


def free_port() -> int:
    """A loopback port nobody listens on right now."""
    with sockets.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@contextmanager
def running(app: FastAPI, timeout: float = 120.0) -> Iterator[str]:
    """Serve ``app`` with uvicorn until the block ends; yields the base URL."""
    port = free_port()
    server = uvicorn.Server(uvicorn.Config(app, host="127.0.0.1", port=port, log_level="warning"))
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    base = f"http://127.0.0.1:{port}"
    deadline = time.monotonic() + timeout
    while not server.started:
        if not thread.is_alive() or time.monotonic() > deadline:
            raise RuntimeError("uvicorn did not start")
        time.sleep(0.05)
    try:
        httpx.get(f"{base}/health", timeout=10).raise_for_status()
        yield base
    finally:
        server.should_exit = True
        thread.join(timeout=30)


@contextmanager
def serving(app: FastAPI, *, socket: bool = False) -> Iterator[httpx.Client]:
    """A client for ``app``: in process (lifespan run, no socket) or over real uvicorn.

    Redirects are not followed in either case, as plain ``httpx`` does not follow them.
    In process, requests come from a loopback address, as they do over uvicorn here.
    """
    if socket:
        with running(app) as url, httpx.Client(base_url=url) as client:
            yield client
    else:
        with TestClient(app, follow_redirects=False, client=("127.0.0.1", 50000)) as client:
            yield client


def write_pages(root: Path, pages: Mapping[str, str | bytes]) -> None:
    """Write ``pages`` (relative path -> content) under ``root``."""
    for rel, content in pages.items():
        path = root / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        if isinstance(content, bytes):
            path.write_bytes(content)
        else:
            path.write_text(content)


@dataclass
class Served:
    """A service over an index of test pages, and what the tests need to talk to it."""

    client: httpx.Client
    settings: ServiceSettings
    embedder: HashingEmbedder
    root: Path
    keys: dict[str, str] = field(default_factory=dict)  # key name -> secret

    @property
    def url(self) -> str:
        """The base URL, without a trailing slash."""
        return str(self.client.base_url).rstrip("/")

    def auth(self, who: str, **headers: str) -> dict[str, str]:
        """A bearer header for the key called ``who``, and any extra headers."""
        return {"Authorization": f"Bearer {self.keys[who]}", **headers}


@contextmanager
def served_index(
    tmp: Path,
    pages: Mapping[str, str | bytes],
    *,
    embedder: HashingEmbedder | None = None,
    keys: Iterable[KeySpec] = (),
    socket: bool = False,
    app_hook: Callable[[FastAPI], None] | None = None,
    **settings: Any,
) -> Iterator[Served]:
    """Index ``pages`` under ``tmp`` with a seeded fake encoder and serve them.

    ``settings`` are ``ServiceSettings`` fields (``index_dir`` defaults to ``tmp/index`` and
    ``reload_check_seconds`` to 0); ``app_hook`` may add routes before the app starts.
    An empty ``pages`` serves a service without an index.
    """
    root = tmp / "wiki"
    root.mkdir(parents=True, exist_ok=True)
    write_pages(root, pages)
    settings.setdefault("index_dir", tmp / "index")
    settings.setdefault("reload_check_seconds", 0)
    service_settings = ServiceSettings(**settings)
    embedder = embedder or HashingEmbedder(32, seed=7)
    if pages:
        refresh_index([root], service_settings, embedder)
    secrets: dict[str, str] = {}
    specs = list(keys)
    if specs:
        with KeyStore(service_settings.keys_file) as store:
            for name, scope, groups, act_for, *acting in specs:
                secrets[name] = store.create(name, scope, groups, act_for, *acting)[1]
    app = create_app(service_settings, embedder=embedder)
    if app_hook is not None:
        app_hook(app)
    with serving(app, socket=socket) as client:
        yield Served(client, service_settings, embedder, root, secrets)
