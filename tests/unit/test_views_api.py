"""What /search and GET /documents/{id} give a reader: dates, tags, relative sources,
links to the originals, highlights, and a document's text once."""

from __future__ import annotations

import httpx
import pytest
from sounding.indexer.embedding import HashingEmbedder
from sounding.indexer.errors import SettingsError
from sounding.service.settings import ServiceSettings

from tests.conftest import ServeIndex

LONG = " ".join(f"Step {i}: turn the spindle of valve {i} a quarter turn." for i in range(40))
PAGES = {
    "runbooks/valve.md": (
        "---\ntitle: Valve\ntags: [runbook, valves]\n---\n# Valve\n\n## Isolation\n\n"
        "Close *the* gate for ERR-4472 before **unbolting**.\n\n| Record type | TTL |\n"
        "|---|---|\n| A | 300 |\n"
    ),
    "runbooks/long.md": f"# Long\n\n## Steps\n\n{LONG}\n",
}


@pytest.fixture(scope="module")
def api(serve_index: ServeIndex) -> httpx.Client:
    served = serve_index(
        PAGES,
        embedder=HashingEmbedder(32, seed=1),
        require_keys=False,
        chunk_tokens=48,
        chunk_overlap=12,
        collection_urls={"wiki": "https://wiki.example.org/{stem}"},
    )
    return served.client


def test_passages_carry_date_tags_link_and_highlights(api: httpx.Client) -> None:
    r = api.post("/search", json={"query": "ERR-4472 unbolting", "mode": "lexical"})
    top = r.json()["results"][0]
    assert top["document_id"] == "runbooks/valve.md"
    assert top["source"] == "runbooks/valve.md"  # not the server's path
    assert top["url"] == "https://wiki.example.org/runbooks/valve"
    assert top["tags"] == ["runbook", "valves"] and top["modified"] > 1e9
    assert isinstance(top["score"], float)  # raw scores stay in the API
    assert "*" not in top["text"] and "|" not in top["text"]
    assert [top["text"][a:b] for a, b in top["highlights"]] == ["ERR-4472", "unbolting"]


def test_context_citations_have_no_server_path(api: httpx.Client) -> None:
    r = api.post("/context", json={"query": "spindle valve quarter turn", "budget": 300})
    assert r.status_code == 200
    body = r.json()
    assert body["passages"] and all(not p["source"].startswith("/") for p in body["passages"])
    assert "/tmp" not in body["text"]


def test_document_view_gives_the_text_once_with_spans(api: httpx.Client) -> None:
    doc = api.get("/documents/runbooks/long.md", params={"highlight": "spindle"}).json()
    assert doc["source"] == "runbooks/long.md"
    assert len(doc["chunks"]) > 2  # overlapping windows...
    (section,) = doc["sections"]
    assert section["trail"] == ["Steps"] and section["text"] == LONG  # ...shown once
    for span, chunk in zip(section["chunks"], doc["chunks"], strict=True):
        assert span["chunk_id"] == chunk["chunk_id"]
        assert section["text"][span["start"] : span["end"]] == chunk["text"]
    marked = {section["text"][a:b] for a, b in section["highlights"]}
    assert marked == {"spindle"} and len(section["highlights"]) == 40


def test_document_view_without_a_highlight(api: httpx.Client) -> None:
    doc = api.get("/documents/runbooks/valve.md").json()
    assert doc["url"] == "https://wiki.example.org/runbooks/valve"
    assert all(s["highlights"] == [] for s in doc["sections"])
    assert doc["sections"][0]["text"].endswith("Record type\tTTL\nA\t300")


def test_collection_urls_must_be_web_addresses() -> None:
    with pytest.raises((ValueError, SettingsError)):
        ServiceSettings(collection_urls={"wiki": "javascript:alert(1)"})
