"""The REST API in process (FastAPI's TestClient), with a seeded fake encoder.

One test runs the app on real uvicorn: a running server picks up a new generation.
"""

from __future__ import annotations

from pathlib import Path

import httpx
import pytest
from sounding.indexer.build import refresh_index
from sounding.indexer.embedding import HashingEmbedder

from tests.conftest import ServeIndex
from tests.serving import served_index, write_pages

PAGES = {
    "runbooks/reservoir-valve.md": (
        "---\ntitle: Reservoir valve replacement\ntags: [runbook, valves]\n---\n"
        "# Reservoir valve replacement\n\n## Isolation\n\nClose the upstream gate before "
        "unbolting the flange.\n\n## Testing\n\nOpen slowly and watch the pressure gauge.\n"
    ),
    "hr/cycling.md": (
        "# Cycling allowance\n\nStaff who cycle to the depot claim a monthly allowance.\n"
    ),
    "notes/kiosk.txt": (
        "Kiosk printer notes\n\nThe kiosk printer jams when the paper tray is overfilled.\n"
    ),
}


@pytest.fixture(scope="module")
def api(serve_index: ServeIndex) -> httpx.Client:
    served = serve_index(
        PAGES,
        embedder=HashingEmbedder(32, seed=1),
        require_keys=False,
        max_k=20,
        max_query_chars=200,
    )
    return served.client


def test_search_returns_ranked_passages_with_their_origin(api: httpx.Client) -> None:
    r = api.post("/search", json={"query": "unbolting the flange gate", "k": 3})
    assert r.status_code == 200
    body = r.json()
    assert body["k"] == 3 and body["generation"] == 1 and body["elapsed_ms"] >= 0
    top = body["results"][0]
    assert top["document_id"] == "runbooks/reservoir-valve.md"
    assert top["title"] == "Reservoir valve replacement"
    assert top["trail"] == ["Isolation"]
    assert "flange" in top["text"] and top["source"].endswith("reservoir-valve.md")
    assert [p["rank"] for p in body["results"]] == list(range(1, len(body["results"]) + 1))
    scores = [p["score"] for p in body["results"]]
    assert scores == sorted(scores, reverse=True) and all(-1.0001 <= s <= 1.0001 for s in scores)


def test_max_per_document_caps_passages_of_one_document(api: httpx.Client) -> None:
    r = api.post("/search", json={"query": "reservoir valve", "k": 10, "max_per_document": 1})
    ids = [p["document_id"] for p in r.json()["results"]]
    assert len(ids) == len(set(ids)) == 3


@pytest.mark.parametrize(
    ("body", "status", "reason"),
    [
        ({"query": ""}, 422, "query"),
        ({"query": "   "}, 422, "empty"),
        ({"query": "valve", "k": 0}, 422, "k"),
        ({"query": "valve", "k": 21}, 422, "max_k"),
        ({"query": "valve", "k": "many"}, 422, "k"),
        ({"query": "x" * 201}, 422, "max_query_chars"),
        ({"query": "valve", "colour": "blue"}, 422, "colour"),
        ({"k": 3}, 422, "query"),
        ({"query": ["a", "b"]}, 422, "query"),
        ([1, 2], 422, "body"),
    ],
)
def test_bad_search_requests_get_a_4xx_with_a_reason(
    api: httpx.Client, body, status, reason
) -> None:
    r = api.post("/search", json=body)
    assert r.status_code == status
    assert reason in r.json()["detail"]


@pytest.mark.parametrize("raw", [b"{not json", b"", b"\xff\xfe", b'{"query": "a"'])
def test_malformed_json_is_a_422(api: httpx.Client, raw: bytes) -> None:
    r = api.post("/search", content=raw, headers={"content-type": "application/json"})
    assert r.status_code == 422
    assert r.json()["detail"].startswith("invalid request")


def test_document_by_id_with_slashes(api: httpx.Client) -> None:
    r = api.get("/documents/runbooks/reservoir-valve.md")
    assert r.status_code == 200
    doc = r.json()
    assert doc["metadata"]["tags"] == ["runbook", "valves"]
    assert doc["kind"] == "markdown" and doc["collection"]
    assert [c["trail"] for c in doc["chunks"]] == [["Isolation"], ["Testing"]]
    assert all(c["tokens"] > 0 for c in doc["chunks"])


def test_unknown_document_is_404(api: httpx.Client) -> None:
    r = api.get("/documents/runbooks/none.md")
    assert r.status_code == 404 and "runbooks/none.md" in r.json()["detail"]


def test_health_reports_index_and_model(api: httpx.Client) -> None:
    h = api.get("/health").json()
    assert h["status"] == "ok" and h["index_loaded"] is True
    assert (h["documents"], h["chunks"]) == (3, 4)
    assert h["model"]["name"] == "hashing-32" and h["model"]["dimension"] == 32


def test_openapi_schema_lists_every_endpoint(api: httpx.Client) -> None:
    """Exactly the service's operations: none missing, none added by accident."""
    paths = api.get("/openapi.json").json()["paths"]
    assert {path: sorted(ops) for path, ops in paths.items()} == {
        "/search": ["post"],
        "/feedback": ["post"],
        "/documents/{document_id}": ["delete", "get", "put"],
        "/collections": ["get"],
        "/context": ["post"],
        "/health": ["get"],
        "/metrics": ["get"],
    }
    for path, ops in paths.items():
        for method, op in ops.items():
            assert op.get("summary") or op.get("description"), (method, path)
            assert "200" in op["responses"] or "201" in op["responses"], (method, path)


def test_service_without_an_index_says_why(tmp_path: Path) -> None:
    with served_index(tmp_path, {}, embedder=HashingEmbedder(32), require_keys=False) as served:
        h = served.client.get("/health").json()
        assert h["status"] == "no-index" and "sounding index" in h["detail"]
        r = served.client.post("/search", json={"query": "valve"})
        assert r.status_code == 503 and "no index" in r.json()["detail"]


def test_running_service_switches_to_a_new_generation(tmp_path: Path) -> None:
    """On real uvicorn: a server that keeps running serves the next generation."""
    with served_index(
        tmp_path, PAGES, embedder=HashingEmbedder(32, seed=1), require_keys=False, socket=True
    ) as served:
        api: httpx.Client = served.client
        assert api.get("/health").json()["documents"] == 3
        write_pages(
            served.root, {"hr/bikes.md": "# Bike shed\n\nThe bike shed code is on the board.\n"}
        )
        refresh_index([served.root], served.settings, served.embedder)
        h = api.get("/health").json()
        assert (h["documents"], h["generation"]) == (4, 2)
        r = api.post("/search", json={"query": "bike shed code", "k": 1})
        assert r.json()["results"][0]["document_id"] == "hr/bikes.md"
