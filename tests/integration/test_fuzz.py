"""Hostile HTTP requests: schemathesis fuzzing and hand-made cases, on a real uvicorn server.

Every failure must be a 4xx with a reason, never a 5xx. The fuzzer reads the
service's own OpenAPI schema and sends both valid and invalid requests
(schemathesis' positive and negative generation modes); its budget is small
here (``MAX_EXAMPLES`` per operation) so the test stays quick, and
``tests/bench/fuzz.py`` runs a larger one.
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import httpx
import pytest
import schemathesis
from hypothesis import HealthCheck, given, settings
from schemathesis import GenerationMode
from sounding.indexer.build import refresh_index
from sounding.indexer.embedding import HashingEmbedder
from sounding.service.app import create_app
from sounding.service.limits import MAX_DOCUMENT_ID_CHARS, nesting_depth
from sounding.service.settings import ServiceSettings

from tests.serving import running

MAX_EXAMPLES = 30
# Per example; generous because CI shares two cores with other jobs.
DEADLINE_MS = 5000

PAGES = {
    "runbooks/reservoir-valve.md": (
        "---\ntitle: Reservoir valve replacement\ntags: [runbook]\n---\n"
        "# Reservoir valve replacement\n\n## Isolation\n\nClose the upstream gate before "
        "unbolting the flange.\n\n## Testing\n\nOpen slowly and watch the pressure gauge.\n"
    ),
    "hr/cycling.md": "# Cycling allowance\n\nStaff who cycle to the depot claim an allowance.\n",
    "notes/kiosk.md": "# Kiosk printer\n\nThe kiosk printer jams when the tray is overfilled.\n",
}


def build_wiki(
    tmp: Path, max_body_bytes: int = 64 * 1024
) -> tuple[ServiceSettings, HashingEmbedder]:
    """A few small Markdown pages indexed with the seeded fake encoder."""
    root = tmp / "wiki"
    for rel, text in PAGES.items():
        path = root / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(text)
    settings = ServiceSettings(
        require_keys=False,
        index_dir=tmp / "index",
        reload_check_seconds=0,
        max_k=20,
        max_query_chars=200,
        max_body_bytes=max_body_bytes,
        push_wait_seconds=1,
    )
    embedder = HashingEmbedder(16)
    refresh_index([root], settings, embedder)
    return settings, embedder


@pytest.fixture(scope="module")
def base(tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    settings, embedder = build_wiki(tmp_path_factory.mktemp("fuzz"), max_body_bytes=4096)
    with running(create_app(settings, embedder=embedder)) as url:
        yield url


@pytest.fixture(scope="module")
def api_schema(base: str):
    return schemathesis.openapi.from_url(f"{base}/openapi.json")


# Every operation of the API, fuzzed with valid (positive) and invalid (negative) requests.
# schemathesis.pytest.from_fixture cannot be used here: its lazy loader sets the private
# ``Function._nodeid``, which pytest 9 no longer has; so each operation's strategy
# (schemathesis' documented ``as_strategy``) is run under hypothesis directly.
OPERATIONS = [
    ("/search", "POST"),
    ("/feedback", "POST"),
    ("/documents/{document_id}", "GET"),
    ("/documents/{document_id}", "PUT"),
    ("/documents/{document_id}", "DELETE"),
    ("/collections", "GET"),
    ("/context", "POST"),
    ("/health", "GET"),
    ("/metrics", "GET"),
]
CHECKS = [
    schemathesis.checks.not_a_server_error,
    schemathesis.checks.response_schema_conformance,
]


def test_every_operation_is_fuzzed(api_schema) -> None:
    listed = {(r.ok().path, r.ok().method.upper()) for r in api_schema.get_all_operations()}
    assert listed == set(OPERATIONS)


@pytest.mark.slow  # a campaign: MAX_EXAMPLES cases per operation and mode, over real HTTP
@pytest.mark.parametrize(
    "mode", [GenerationMode.POSITIVE, GenerationMode.NEGATIVE], ids=lambda m: m.value
)
@pytest.mark.parametrize(("path", "method"), OPERATIONS, ids=lambda v: v.strip("/"))
def test_fuzzed_requests_never_get_a_server_error(api_schema, path, method, mode) -> None:
    if mode is GenerationMode.NEGATIVE and method == "GET":
        # /health has no input; a path parameter is any string, so none is invalid.
        # Odd ids are covered by test_odd_document_ids_never_get_a_server_error.
        pytest.skip(f"{method} {path} has no input that can be made invalid")
    strategy = api_schema[path][method].as_strategy(generation_mode=mode)

    @settings(
        max_examples=MAX_EXAMPLES,
        deadline=DEADLINE_MS,
        derandomize=True,  # the same cases every run: a CI failure reproduces locally
        database=None,
        suppress_health_check=list(HealthCheck),
    )
    @given(case=strategy)
    def fuzz(case) -> None:
        case.call_and_validate(checks=CHECKS, timeout=30)

    fuzz()


# Hand-made hostile requests: the cases a generator reaches rarely or never.

JSON = {"content-type": "application/json"}


@pytest.mark.parametrize(
    ("path", "raw", "status", "reason"),
    [
        ("/search", b"[" * 3000, 422, "nested more than 32 levels"),
        ("/search", b'{"query": ' * 40 + b'"a"' + b"}" * 40, 422, "nested more than 32"),
        ("/search", b'{"query": "\\ud800"}', 422, "surrogate"),
        ("/search", b'{"query": "ok", "\\udfff": 1}', 422, "surrogate"),
        ("/search", b'{"query": "valve", "k": 1e400}', 422, "too large for a float"),
        ("/search", b'{"query": "valve", "k": NaN}', 422, "NaN"),
        ("/search", b'{"query": "valve", "k": -Infinity}', 422, "Infinity"),
        ("/search", b'{"query": "valve", "k": ' + b"9" * 30 + b"}", 422, "64-bit"),
        ("/feedback", b'{"query": "q", "chunk_id": ' + b"9" * 30 + b', "grade": 1}', 422, "64-bit"),
        ("/feedback", b'{"query": "q", "document_id": "\\ud83d", "grade": 1}', 422, "surrogate"),
        ("/search", b'{"query": "\xc1&"}', 422, "not text in UTF-8"),
        ("/feedback", b"\x1d\xbb\xccd\xd1\xc2\x0f\xb68", 422, "not text in UTF-8"),
        ("/search", b'"just a string"', 422, "invalid request"),
        ("/search", b"null", 422, "invalid request"),
        ("/feedback", b"[1, 2]", 422, "invalid request"),
        ("/search", b'{"query": "valve"', 422, "invalid request"),
    ],
)
def test_hostile_json_bodies_get_a_422_with_a_reason(base, path, raw, status, reason) -> None:
    r = httpx.post(f"{base}{path}", content=raw, headers=JSON)
    assert r.status_code == status, r.text
    assert reason in r.json()["detail"]


def test_brackets_inside_strings_do_not_count_as_nesting() -> None:
    assert nesting_depth(b'{"query": "[[[[{{{{\\"[[["}') == 1
    assert nesting_depth(b'[[1], {"a": [2]}]') == 3


def test_a_valid_query_with_brackets_and_nul_is_answered(base: str) -> None:
    r = httpx.post(f"{base}/search", json={"query": "[[[[ valve \u0000 ]]]] {{", "k": 2})
    assert r.status_code == 200, r.text


def test_oversized_body_is_a_413_naming_the_limit(base: str) -> None:
    r = httpx.post(f"{base}/search", json={"query": "x" * 5000})
    assert r.status_code == 413
    assert "4096 bytes" in r.json()["detail"] and "max_body_bytes" in r.json()["detail"]


def test_oversized_streamed_body_is_counted_and_refused(base: str) -> None:
    def chunks() -> Iterator[bytes]:  # no Content-Length: sent chunked
        yield b'{"query": "'
        for _ in range(100):
            yield b"x" * 1000
        yield b'"}'

    r = httpx.post(f"{base}/search", content=chunks(), headers=JSON)
    assert r.status_code == 413 and "max_body_bytes" in r.json()["detail"]


def test_small_streamed_body_still_reaches_the_route(base: str) -> None:
    r = httpx.post(f"{base}/search", content=iter([b'{"query": ', b'"valve"}']), headers=JSON)
    assert r.status_code == 200 and r.json()["results"]


@pytest.mark.parametrize(
    ("path", "status"),
    [
        ("/documents/" + "a" * (MAX_DOCUMENT_ID_CHARS + 1), 414),
        ("/documents/" + "a" * MAX_DOCUMENT_ID_CHARS, 404),
        ("/documents/..%2F..%2Fetc%2Fpasswd", 404),
        ("/documents/runbooks/../../../etc/passwd", 404),
        ("/documents/a%00b", 404),
        ("/documents/%ff%fe%ed%a0%80", 404),
        ("/documents/%25%2", 404),
        ("/documents/%", 404),
        ("/documents/", 404),
        ("/documents/runbooks%2Freservoir-valve.md", 200),
    ],
)
def test_odd_document_ids_never_get_a_server_error(base: str, path: str, status: int) -> None:
    r = httpx.get(f"{base}{path}")
    assert r.status_code == status, r.text
    assert r.json()["detail"] if status != 200 else r.json()["id"]


def test_unexpected_errors_are_a_json_500_without_the_traceback(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, caplog: pytest.LogCaptureFixture
) -> None:
    from sounding.indexer.store import IndexReader

    def broken(self: IndexReader, *args: object, **kwargs: object) -> None:
        raise RuntimeError("secret internals")

    settings, embedder = build_wiki(tmp_path)
    monkeypatch.setattr(IndexReader, "document", broken)
    with running(create_app(settings, embedder=embedder)) as url:
        r = httpx.get(f"{url}/documents/hr/cycling.md")
    assert r.status_code == 500
    assert r.json() == {"detail": "internal error; see the service log"}
    assert "secret" not in r.text
    logged = [rec for rec in caplog.records if rec.name == "sounding.service" and rec.exc_info]
    assert logged and logged[0].exc_info
    # The route's template, never the raw path: ids can name restricted documents.
    assert "GET /documents/{document_id}" in logged[0].getMessage()
    assert "cycling" not in logged[0].getMessage()
