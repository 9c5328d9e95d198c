"""Request ids and one-JSON-object-per-line logs, on a real uvicorn server and `sounding serve`.

Real uvicorn rather than an in-process client: what is logged for a request, and the 500
after a route raises, are the server's behaviour (a test client re-raises instead).
"""

from __future__ import annotations

import io
import json
import logging
import os
import re
import signal
import subprocess
import sys
import time
from datetime import datetime, timedelta
from pathlib import Path

import httpx
import pytest
from fastapi import FastAPI
from sounding.indexer.build import refresh_index
from sounding.indexer.embedding import HashingEmbedder
from sounding.service.app import INTERNAL_ERROR
from sounding.service.logs import (
    MAX_REQUEST_ID_CHARS,
    JsonFormatter,
    accept_request_id,
    current_request_id,
)
from sounding.service.settings import ServiceSettings

from tests.conftest import ServeIndex
from tests.serving import free_port, write_pages
from tests.unit.test_metrics import PAGES, REQUESTS, scrape, value

GENERATED = re.compile(r"[0-9a-f]{32}")
SECRET_QUERY = "salary of jane doe"  # stands for personal data in a query


class Captured:
    """JSON lines written by the app's loggers while the block runs."""

    def __init__(self) -> None:
        self.stream = io.StringIO()
        self.handler = logging.StreamHandler(self.stream)
        self.handler.setFormatter(JsonFormatter())
        self.logger = logging.getLogger("sounding")

    def __enter__(self) -> Captured:
        self.old_level = self.logger.level
        self.logger.addHandler(self.handler)
        self.logger.setLevel(logging.INFO)
        return self

    def __exit__(self, *exc: object) -> None:
        self.logger.removeHandler(self.handler)
        self.logger.setLevel(self.old_level)

    def lines(self) -> list[dict]:
        """Every line so far."""
        return [json.loads(line) for line in self.stream.getvalue().splitlines()]

    def records(self, *answers: httpx.Response, errors: int = 0) -> list[dict]:
        """The lines of these answers' requests, found by the request id each answer echoes,
        once each has its access line and ``errors`` error lines are in (or after 10 s).

        The server thread writes a request's lines after the answer is sent, so call this
        inside the block; an earlier request's line that lands late is not one of these.
        """
        ids = {r.headers["x-request-id"] for r in answers}
        deadline = time.monotonic() + 10
        while True:
            entries = [e for e in self.lines() if e.get("request_id") in ids]
            if (
                sum(e["logger"] == "sounding.access" for e in entries) >= len(answers)
                and sum(e["level"] == "error" for e in entries) >= errors
            ) or time.monotonic() > deadline:
                return entries
            time.sleep(0.02)


def add_boom(app: FastAPI) -> None:
    """A route with a bug in it, for the 500 test."""

    @app.get("/test-only-boom")
    def boom() -> None:
        raise RuntimeError("a bug in a route")


@pytest.fixture(scope="module")
def wire(serve_index: ServeIndex) -> httpx.Client:
    served = serve_index(
        PAGES,
        embedder=HashingEmbedder(16),
        require_keys=False,
        max_body_bytes=4096,
        socket=True,
        app_hook=add_boom,
    )
    return served.client


@pytest.mark.parametrize(
    "given", ["3f2a9c1e-5b7d-4e8f-9a0b-1c2d3e4f5a6b", "req.42:edge-1", "a", "x" * 128]
)
def test_a_well_formed_request_id_is_kept(given: str) -> None:
    assert accept_request_id(given) == given


@pytest.mark.parametrize(
    "given",
    [
        None,
        "",
        "x" * (MAX_REQUEST_ID_CHARS + 1),
        "two words",
        "line\nbreak",
        'quo"te',
        "<script>",
        "naïve",
        "a,b",
        '{"level": "error"}',
    ],
)
def test_a_bad_request_id_is_replaced(given: str | None) -> None:
    assert GENERATED.fullmatch(accept_request_id(given))


def test_given_request_id_is_echoed_and_logged(wire: httpx.Client) -> None:
    with Captured() as logs:
        r = wire.get("/health", headers={"X-Request-ID": "trace-0001"})
        entries = logs.records(r)
    assert r.headers["x-request-id"] == "trace-0001"
    (access,) = [e for e in entries if e["logger"] == "sounding.access"]
    assert access["request_id"] == "trace-0001"
    assert (access["method"], access["route"], access["status"]) == ("GET", "/health", 200)
    assert access["duration_ms"] >= 0 and access["level"] == "info"


def test_without_an_id_each_request_gets_its_own(wire: httpx.Client) -> None:
    ids = [wire.get("/health").headers["x-request-id"] for _ in range(3)]
    assert all(GENERATED.fullmatch(i) for i in ids) and len(set(ids)) == 3


@pytest.mark.parametrize("bad", ["x" * 200, "two words", "é"])
def test_a_bad_incoming_id_is_replaced_in_the_answer_and_the_log(
    wire: httpx.Client, bad: str
) -> None:
    with Captured() as logs:
        r = wire.get("/health", headers={"X-Request-ID": bad.encode("utf-8")})
        entries = logs.records(r)
    echoed = r.headers["x-request-id"]
    assert GENERATED.fullmatch(echoed)
    # Exactly one access line carries the id the answer echoed: the log and answer agree.
    (access,) = [e for e in entries if e["logger"] == "sounding.access"]
    assert access["request_id"] == echoed


def test_refusals_from_request_limits_carry_the_id(wire: httpx.Client) -> None:
    r = wire.post(
        "/search",
        content=b"x" * 5000,
        headers={"content-type": "application/json", "X-Request-ID": "too-big-1"},
    )
    assert r.status_code == 413 and r.headers["x-request-id"] == "too-big-1"
    r = wire.post(
        "/search",
        content=b'{"query": NaN}',
        headers={"content-type": "application/json", "X-Request-ID": "nan-1"},
    )
    assert r.status_code == 422 and r.headers["x-request-id"] == "nan-1"


def test_access_lines_hold_no_query_text_nor_document_path(wire: httpx.Client) -> None:
    with Captured() as logs:
        search = wire.post("/search", json={"query": SECRET_QUERY, "mode": "dense"})
        document = wire.get("/documents/hr/jane-doe-review.md")
        entries = logs.records(search, document)
        lines = logs.stream.getvalue()
    assert SECRET_QUERY not in lines and "jane" not in lines and "review" not in lines
    routes = [
        (e["route"], e["mode"], e["status"]) for e in entries if e["logger"] == "sounding.access"
    ]
    assert routes == [("/search", "dense", 200), ("/documents/{document_id}", "none", 404)]


def test_an_unexpected_error_is_a_500_whose_id_finds_the_traceback(wire: httpx.Client) -> None:
    before, _ = scrape(wire)
    with Captured() as logs:
        r = wire.get("/test-only-boom", headers={"X-Request-ID": "boom-7"})
        records = logs.records(r, errors=1)
        every = logs.lines()
    assert r.status_code == 500 and r.json() == {"detail": INTERNAL_ERROR}
    assert r.headers["x-request-id"] == "boom-7"
    errors = [e for e in every if e["level"] == "error"]  # all of them, whatever their id
    assert errors and all(e["request_id"] == "boom-7" for e in errors)
    assert any("RuntimeError: a bug in a route" in e.get("exception", "") for e in errors)
    assert any(e["logger"] == "sounding.access" and e["status"] == 500 for e in records)
    # uvicorn closes the connection once an exception escapes the app after the answer
    # (uvicorn/protocols/http/h11_impl.py, run_asgi): scrape on a connection of its own.
    with httpx.Client(base_url=wire.base_url) as fresh:
        after, _ = scrape(fresh)
    labels = {"route": "/test-only-boom", "method": "GET", "mode": "none", "status": "500"}
    assert value(after, REQUESTS, **labels) - value(before, REQUESTS, **labels) == 1


def test_json_formatter_writes_one_parseable_line() -> None:
    try:
        raise ValueError("bad\nvalue")
    except ValueError:
        record = logging.getLogger("sounding.test").makeRecord(
            "sounding.test",
            logging.WARNING,
            __file__,
            1,
            "odd %s",
            ('ünïcode\n"quoted"',),
            sys.exc_info(),
            extra={"generation": 4},
        )
    line = JsonFormatter().format(record)
    assert "\n" not in line
    entry = json.loads(line)
    assert entry["message"] == 'odd ünïcode\n"quoted"' and entry["level"] == "warning"
    assert entry["logger"] == "sounding.test" and entry["generation"] == 4
    assert "ValueError: bad" in entry["exception"]
    assert "request_id" not in entry and current_request_id() is None  # outside a request
    # ISO 8601 in UTC (RFC 3339 "Z" suffix); fromisoformat reads it from Python 3.11.
    stamp = datetime.fromisoformat(entry["timestamp"].replace("Z", "+00:00"))
    assert stamp.utcoffset() == timedelta(0)
    assert abs(stamp.timestamp() - record.created) < 0.001


@pytest.mark.subprocess
@pytest.mark.parametrize("fmt", ["json", "text"])
def test_log_config_is_valid_for_dictconfig(fmt: str) -> None:
    """Applied in a child process: dictConfig changes the whole process's logging."""
    script = (
        "import logging, logging.config, sys\n"
        "from sounding.service.logs import log_config, request_id_var\n"
        f"logging.config.dictConfig(log_config('info', {fmt!r}))\n"
        "request_id_var.set('rid-9')\n"
        "logging.getLogger('sounding.access').info('GET /health 200', extra={'status': 200})\n"
        "logging.getLogger('uvicorn.error').info('started')\n"
        "logging.getLogger('uvicorn.access').info('raw path here')\n"
        "logging.getLogger('sentence_transformers').info('library chatter')\n"
    )
    proc = subprocess.run(
        [sys.executable, "-c", script],
        capture_output=True,
        text=True,
        timeout=60,
        cwd=Path(__file__).parents[2],
    )
    assert proc.returncode == 0, proc.stderr
    lines = proc.stderr.splitlines()
    assert len(lines) == 2, proc.stderr  # uvicorn's access log and library info are off
    if fmt == "json":
        first, second = (json.loads(line) for line in lines)
        assert first["request_id"] == "rid-9" and first["status"] == 200
        assert second["logger"] == "uvicorn.error" and second["message"] == "started"
    else:
        assert "[rid-9] GET /health 200" in lines[0] and lines[1].endswith("started")


@pytest.mark.slow  # seconds each: the fast loop stays under a minute
@pytest.mark.subprocess
def test_sounding_serve_logs_json_lines_with_request_ids(tmp_path: Path) -> None:
    """The real command: every line on stderr is a JSON object, uvicorn's included."""
    settings = ServiceSettings(index_dir=tmp_path / "index")
    write_pages(tmp_path / "wiki", PAGES)
    refresh_index([tmp_path / "wiki"], settings, HashingEmbedder(16))
    port = free_port()
    # The bundled encoder is not what this test is about: serve with the seeded fake.
    script = (
        "import sys\n"
        "from sounding.indexer.embedding import HashingEmbedder\n"
        "from sounding.indexer.settings import IndexSettings\n"
        "IndexSettings.embedder = lambda self: HashingEmbedder(16)\n"
        "from sounding.cli import main\n"
        "sys.exit(main(sys.argv[1:]))\n"
    )
    env = {k: v for k, v in os.environ.items() if not k.startswith("SOUNDING_")}
    env["SOUNDING_REQUIRE_KEYS"] = "false"
    proc = subprocess.Popen(
        [
            sys.executable,
            "-c",
            script,
            "serve",
            "--index",
            str(settings.index_dir),
            "--port",
            str(port),
        ],
        stderr=subprocess.PIPE,
        stdout=subprocess.DEVNULL,
        text=True,
        env=env,
        cwd=Path(__file__).parents[2],
    )
    base = f"http://127.0.0.1:{port}"
    try:
        deadline = time.monotonic() + 60
        while True:
            try:
                httpx.get(f"{base}/health", timeout=2)
                break
            except httpx.TransportError:
                if proc.poll() is not None or time.monotonic() > deadline:
                    raise AssertionError("sounding serve did not start") from None
                time.sleep(0.1)
        r = httpx.post(
            f"{base}/search", json={"query": SECRET_QUERY}, headers={"X-Request-ID": "serve-1"}
        )
        assert r.status_code == 200 and r.headers["x-request-id"] == "serve-1"
    finally:
        proc.send_signal(signal.SIGINT)
        _, stderr = proc.communicate(timeout=30)
    entries = [json.loads(line) for line in stderr.splitlines()]  # each line is JSON
    assert SECRET_QUERY not in stderr
    access = [e for e in entries if e["logger"] == "sounding.access"]
    assert {"route": "/search", "request_id": "serve-1", "status": 200}.items() <= next(
        e for e in access if e["route"] == "/search"
    ).items()
    assert any(e["logger"].startswith("uvicorn") for e in entries)
    assert not any(e["logger"] == "uvicorn.access" for e in entries)
