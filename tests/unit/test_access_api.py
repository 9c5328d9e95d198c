"""No endpoint reveals a restricted document to a caller outside its groups.

In process (FastAPI's TestClient; real uvicorn where the server decodes the path), real
SQLite and FAISS, seeded fake encoder. The
restricted page carries a marker word found nowhere else, so a leak in any
field of any answer (results, snippets, counts, titles, citations, metrics)
shows up as the marker, the title or the id in the response body.
"""

from __future__ import annotations

import json
import secrets
from pathlib import Path

import httpx
import pytest
from sounding.indexer.embedding import HashingEmbedder
from sounding.service.settings import ServiceSettings

from tests.conftest import ServeIndex
from tests.serving import served_index

SECRET_ID = "hr/salary-bands.md"
SECRET_TITLE = "Confidential salary bands"
MARKER = "zanzibarite"
PAGES = {
    SECRET_ID: f"---\ntitle: {SECRET_TITLE}\ngroups: [hr]\ntags: [pay]\n---\n"
    f"# {SECRET_TITLE}\n\nThe {MARKER} pump engineers earn band C.\n\n"
    f"## Review\n\nBands change each April; {MARKER} review.\n",
    "ops/pump.md": "---\ntags: [pay, runbook]\n---\n# Pump restart\n\nRestart the pump slowly; "
    "engineers watch the gauge.\n",
    "public.txt": "Pump open day\n\nVisitors may see the pump house on Sundays.\n",
}
ON_BEHALF = "X-Sounding-On-Behalf-Of"


KEYS = [
    ("reader", "read", "", False),
    ("ops", "read", "ops", False),
    ("hr", "read", "hr", False),
    ("bot", "read", "ops", True, "hr,ops,it,x"),
    ("writer", "write", "", False),
    ("hr-writer", "write", "hr", False),
    ("ops-writer", "write", "ops", False),
    ("admin", "admin", "", False),
]


@pytest.fixture(scope="module")
def server(serve_index: ServeIndex) -> tuple[httpx.Client, dict[str, str], ServiceSettings]:
    served = serve_index(
        PAGES, embedder=HashingEmbedder(32, seed=2), keys=KEYS, push_wait_seconds=2
    )
    return served.client, served.keys, served.settings


@pytest.fixture(scope="module")
def wire(serve_index: ServeIndex) -> tuple[httpx.Client, dict[str, str], ServiceSettings]:
    """The same pages and keys on real uvicorn."""
    served = serve_index(PAGES, embedder=HashingEmbedder(32, seed=2), keys=KEYS, socket=True)
    return served.client, served.keys, served.settings


def _auth(keys: dict[str, str], who: str, on_behalf: str | None = None) -> dict[str, str]:
    headers = {"Authorization": f"Bearer {keys[who]}"}
    if on_behalf is not None:
        headers[ON_BEHALF] = on_behalf
    return headers


def _chunk_id(client: httpx.Client, keys: dict[str, str]) -> int:
    doc = client.get(f"/documents/{SECRET_ID}", headers=_auth(keys, "hr")).json()
    return doc["chunks"][0]["chunk_id"]


# Callers who may NOT read the restricted page: (key, on-behalf header).
OUTSIDERS = [
    ("reader", None),
    ("ops", None),
    ("bot", None),
    ("bot", ""),
    ("bot", "ops,it"),
    ("writer", None),
    ("admin", None),
]
QUERY = f"{MARKER} salary bands pump engineers"


def _requests(chunk_id: int) -> list[tuple[str, str, dict | None]]:
    """(method, path, json) of every endpoint that could show the restricted page."""
    reqs: list[tuple[str, str, dict | None]] = [
        ("POST", "/search", {"query": QUERY, "k": 50, "mode": mode})
        for mode in ("dense", "lexical", "hybrid")
    ]
    reqs += [
        ("POST", "/search", {"query": QUERY, "k": 50, "tags": ["pay"]}),
        ("POST", "/search", {"query": QUERY, "k": 50, "source_prefix": "hr/"}),
        ("POST", "/search", {"query": QUERY, "k": 50, "max_per_document": 1}),
        ("GET", f"/documents/{SECRET_ID}", None),
        ("GET", "/collections", None),
        ("GET", "/health", None),
        ("POST", "/feedback", {"query": QUERY, "document_id": SECRET_ID, "grade": 3}),
        ("POST", "/feedback", {"query": QUERY, "chunk_id": chunk_id, "grade": 3}),
        ("POST", "/context", {"query": QUERY, "budget": 2000}),
    ]
    return reqs


@pytest.mark.parametrize(("who", "on_behalf"), OUTSIDERS)
def test_no_endpoint_reveals_the_restricted_page(server, who: str, on_behalf: str | None) -> None:
    client, keys, _ = server
    chunk_id = _chunk_id(client, keys)
    for method, path, body in _requests(chunk_id):
        r = client.request(method, path, json=body, headers=_auth(keys, who, on_behalf))
        if path == "/context" and r.status_code == 404 and "Not Found" in r.text:
            continue  # no /context route in this build
        if path.startswith("/documents/") or path == "/feedback":
            # 404 with the very answer a page that does not exist gets: existence does not leak.
            assert r.status_code == 404, (path, r.status_code)
            what = (
                f"chunk with id {chunk_id}"
                if body and "chunk_id" in body
                else f"document with id {SECRET_ID!r}"
            )
            assert r.json() == {"detail": f"no {what} in the index"}
            continue
        assert r.status_code == 200, (path, r.status_code, r.text[:300])
        answer = r.json()
        answer.pop("query", None)  # the caller's own words, echoed
        text = json.dumps(answer)
        for leak in (MARKER, SECRET_TITLE, SECRET_ID, "salary-bands"):
            assert leak not in text, (who, on_behalf, method, path, r.status_code, text[:300])
    # Metrics carry no document ids, titles or text in labels or values.
    m = client.get("/metrics", headers=_auth(keys, who, on_behalf))
    assert m.status_code == 200
    for leak in (MARKER, SECRET_TITLE, SECRET_ID, "salary-bands"):
        assert leak not in m.text


def test_counts_only_count_what_the_caller_may_read(server) -> None:
    client, keys, _ = server

    def counts(who: str, on_behalf: str | None = None) -> dict[str, int]:
        r = client.get("/collections", headers=_auth(keys, who, on_behalf))
        return {c["name"]: c["documents"] for c in r.json()["collections"]}

    (name,) = counts("hr")
    assert counts("hr")[name] == 3
    assert counts("reader")[name] == 2
    assert counts("bot", "hr")[name] == 3  # on behalf of a member of hr
    assert counts("bot")[name] == 2
    assert client.get("/health").json()["documents"] == 2


@pytest.mark.parametrize(
    ("who", "on_behalf"), [("hr", None), ("bot", "hr"), ("bot", "x,hr"), ("hr-writer", None)]
)
def test_members_do_see_it(server, who: str, on_behalf: str | None) -> None:
    client, keys, _ = server
    r = client.post(
        "/search",
        json={"query": QUERY, "k": 5, "mode": "lexical"},
        headers=_auth(keys, who, on_behalf),
    )
    assert r.status_code == 200
    assert r.json()["results"][0]["document_id"] == SECRET_ID
    doc = client.get(f"/documents/{SECRET_ID}", headers=_auth(keys, who, on_behalf))
    assert doc.status_code == 200 and doc.json()["groups"] == ["hr"]


@pytest.mark.parametrize(
    ("method", "path", "body"),
    [
        ("POST", "/search", {"query": "pump"}),
        ("GET", "/documents/public.txt", None),
        ("GET", "/collections", None),
        ("POST", "/feedback", {"query": "x", "document_id": "public.txt", "grade": 1}),
        ("PUT", "/documents/api/x.md", {"text": "# X\n\nx\n"}),
        ("DELETE", "/documents/public.txt", None),
        ("GET", "/metrics", None),
    ],
)
def test_every_endpoint_but_health_needs_a_key(
    server, method: str, path: str, body: dict | None
) -> None:
    client, _, _ = server
    r = client.request(method, path, json=body)
    assert r.status_code == 401
    assert r.headers["www-authenticate"].startswith("Bearer")  # RFC 6750 section 3
    # A fresh unknown id each time: repeated failures of one id are backed off (429).
    bad = client.request(
        method,
        path,
        json=body,
        headers={"Authorization": f"Bearer snd_{secrets.token_hex(6)}_" + "A" * 43},
    )
    assert bad.status_code == 401
    assert client.get("/health").status_code == 200


def test_on_behalf_header_needs_the_act_for_right(server) -> None:
    client, keys, _ = server
    r = client.post("/search", json={"query": QUERY}, headers=_auth(keys, "hr", "hr"))
    assert r.status_code == 403 and "act-for" in r.json()["detail"]


@pytest.mark.parametrize("who", ["reader", "ops", "hr"])
def test_read_keys_cannot_push_or_delete(server, who: str) -> None:
    client, keys, _ = server
    put = client.put(
        "/documents/api/new.md",
        json={"text": "# New\n\nnew page\n"},
        headers=_auth(keys, who),
    )
    assert put.status_code == 403 and "write" in put.json()["detail"]
    gone = client.delete("/documents/public.txt", headers=_auth(keys, who))
    assert gone.status_code == 403


def test_a_writer_outside_the_group_cannot_touch_the_restricted_page(server) -> None:
    client, keys, _ = server
    for r in (
        client.put(
            f"/documents/{SECRET_ID}",
            json={"text": "# Taken over\n\nmine\n"},
            headers=_auth(keys, "writer"),
        ),
        client.delete(f"/documents/{SECRET_ID}", headers=_auth(keys, "writer")),
    ):
        assert r.status_code == 404 and MARKER not in r.text
    doc = client.get(f"/documents/{SECRET_ID}", headers=_auth(keys, "hr")).json()
    assert MARKER in doc["chunks"][0]["text"]


def test_push_is_searchable_when_the_call_returns_then_delete(server) -> None:
    client, keys, _ = server
    w = _auth(keys, "writer")
    r = client.put(
        "/documents/api/sluice.md",
        headers=w,
        json={
            "text": "# Sluice gates\n\nThe quernstone sluice opens at dawn.\n",
            "tags": ["Gates"],
            "source": "https://wiki.example/sluice",
        },
    )
    assert r.status_code == 200, r.text
    body = r.json()
    assert body["action"] == "added" and body["chunks_embedded"] == body["chunks"] >= 1
    hits = client.post(
        "/search",
        headers=_auth(keys, "reader"),
        json={"query": "quernstone sluice", "mode": "lexical", "k": 1},
    ).json()
    assert hits["results"][0]["document_id"] == "api/sluice.md"
    assert hits["generation"] == body["generation"]
    assert hits["results"][0]["collection"] == "pushed"
    assert hits["results"][0]["source"] == "https://wiki.example/sluice"
    doc = client.get("/documents/api/sluice.md", headers=_auth(keys, "reader")).json()
    assert doc["tags"] == ["gates"]
    # Same content again: nothing to do, no new generation.
    again = client.put(
        "/documents/api/sluice.md",
        headers=w,
        json={
            "text": "# Sluice gates\n\nThe quernstone sluice opens at dawn.\n",
            "tags": ["Gates"],
            "source": "https://wiki.example/sluice",
        },
    ).json()
    assert again["action"] == "unchanged" and again["generation"] == body["generation"]
    # Restrict it (a key of the group does: a writer outside it may not): readers outside
    # the group lose it at once.
    client.put(
        "/documents/api/sluice.md",
        headers=_auth(keys, "hr-writer"),
        json={
            "text": "# Sluice gates\n\nThe quernstone sluice opens at dawn.\n",
            "groups": ["hr"],
            "source": "https://wiki.example/sluice",
        },
    ).raise_for_status()
    assert client.get("/documents/api/sluice.md", headers=_auth(keys, "reader")).status_code == 404
    assert client.get("/documents/api/sluice.md", headers=_auth(keys, "hr")).status_code == 200
    # Writers outside the group can no longer see it, so cannot change or delete it.
    for who in ("writer", "admin"):
        assert (
            client.delete("/documents/api/sluice.md", headers=_auth(keys, who)).status_code == 404
        )
        assert (
            client.put(
                "/documents/api/sluice.md",
                headers=_auth(keys, who),
                json={"text": "# Mine\n\nmine\n"},
            ).status_code
            == 404
        )
    d = client.delete("/documents/api/sluice.md", headers=_auth(keys, "hr-writer"))
    assert d.status_code == 200 and d.json()["action"] == "removed"
    hits = client.post(
        "/search",
        headers=_auth(keys, "reader"),
        json={"query": "quernstone", "mode": "lexical"},
    ).json()
    assert hits["results"] == []


def test_upload_a_file_with_metadata(server) -> None:
    client, keys, _ = server
    page = (
        b"<html><head><title>Weir log</title></head><body><p>Weir level logged hourly by "
        b"the bargeman.</p></body></html>"
    )
    r = client.put(
        "/documents/api/weir.html",
        headers=_auth(keys, "ops-writer"),  # a key may push only what it may read
        files={"file": ("weir.html", page, "text/html")},
        data={"collection": "uploads", "tags": "weir, logs", "groups": "ops"},
    )
    assert r.status_code == 200, r.text
    doc = client.get("/documents/api/weir.html", headers=_auth(keys, "ops")).json()
    assert doc["title"] == "Weir log" and doc["collection"] == "uploads"
    assert doc["groups"] == ["ops"] and doc["tags"] == ["logs", "weir"]
    assert doc["kind"] == "html"
    bad = client.put(
        "/documents/api/x.exe",
        headers=_auth(keys, "writer"),
        files={"file": ("x.exe", b"MZ", "application/octet-stream")},
    )
    # The refusal names the file and the formats a push takes (no ``or``: both must hold).
    assert bad.status_code == 422 and "'x.exe'" in bad.json()["detail"]
    assert ".md" in bad.json()["detail"] and ".pdf" in bad.json()["detail"]


@pytest.mark.parametrize(
    "doc_id",
    [
        "../etc/passwd",
        "a/../b",
        "a//b",
        "/abs",
        "a/",
        "./a",
        "a\\b",
        "a\x00b",
        "a\nb",
        "x" * 600,
        " lead",
        "a/ b",
    ],
)
def test_unsafe_ids_are_refused(wire, doc_id: str) -> None:
    """On real uvicorn: the server, not the test client, decodes the path."""
    client, keys, _ = wire
    # Every byte percent-encoded, so the client cannot normalise "a/../b" away before sending.
    raw = "".join(f"%{b:02X}" for b in doc_id.encode())
    r = client.put(f"/documents/{raw}", json={"text": "# T\n\nt\n"}, headers=_auth(keys, "writer"))
    assert r.status_code in (404, 414, 422), (doc_id, r.status_code)
    assert r.status_code != 200


@pytest.mark.parametrize(
    ("body", "fragment"),
    [
        ({"text": ""}, "text"),
        ({"text": "x", "format": "exe"}, "format"),
        ({"text": "x", "groups": ["not ok"]}, "group"),
        ({"text": "x", "extra": 1}, "extra"),
        ({"text": "   "}, "no text"),
    ],
)
def test_bad_pushes_are_422_with_a_reason(server, body: dict, fragment: str) -> None:
    client, keys, _ = server
    r = client.put("/documents/api/bad.md", json=body, headers=_auth(keys, "writer"))
    assert r.status_code == 422 and fragment in r.json()["detail"], r.text


def test_push_into_a_folder_collection_conflicts(server) -> None:
    client, keys, _ = server
    r = client.put(
        "/documents/ops/pump.md", json={"text": "# P\n\np\n"}, headers=_auth(keys, "writer")
    )
    assert r.status_code == 409 and "belongs to collection" in r.json()["detail"]


def test_push_while_a_reindex_holds_the_lock_is_503_with_retry_after(
    serve_index: ServeIndex,
) -> None:
    from sounding.indexer.lock import IndexLock

    # Its own service, with a short wait for the lock: the answer is the same, sooner.
    served = serve_index(
        PAGES, embedder=HashingEmbedder(32, seed=2), keys=KEYS, push_wait_seconds=0.2
    )
    client, keys, settings = served.client, served.keys, served.settings
    with IndexLock(settings.index_dir):
        r = client.put(
            "/documents/api/later.md",
            json={"text": "# L\n\nlater\n"},
            headers=_auth(keys, "writer"),
        )
    assert r.status_code == 503 and r.headers["retry-after"] == "30"
    assert "being updated" in r.json()["detail"]


def test_filters_narrow_search(server) -> None:
    client, keys, _ = server
    h = _auth(keys, "hr")

    def ids(**extra) -> set[str]:
        r = client.post("/search", headers=h, json={"query": "pump", "k": 20, **extra})
        assert r.status_code == 200, r.text
        return {p["document_id"] for p in r.json()["results"]}

    assert ids(tags=["RUNBOOK"]) == {"ops/pump.md"}
    assert ids(source_prefix="hr/") == {SECRET_ID}
    assert ids(collections=["nothing"]) == set()
    assert ids(modified_after="2999-01-01T00:00:00Z") == set()
    assert ids(modified_after=0) == set(PAGES)
    bad = client.post("/search", headers=h, json={"query": "pump", "modified_after": "soon"})
    assert bad.status_code == 422 and "modified_after" in bad.json()["detail"]


def test_anonymous_on_loopback_sees_only_unrestricted(tmp_path: Path) -> None:
    embedder = HashingEmbedder(32, seed=2)
    with served_index(tmp_path, PAGES, embedder=embedder, require_keys=False) as served:
        client = served.client
        r = client.post("/search", json={"query": QUERY, "k": 50})
        assert r.status_code == 200 and r.json()["results"]
        assert MARKER not in json.dumps(r.json()["results"])
        assert client.get(f"/documents/{SECRET_ID}").status_code == 404
        r = client.post("/search", json={"query": QUERY}, headers={ON_BEHALF: "hr"})
        assert r.status_code == 403  # anonymous callers cannot claim groups
        assert json.loads(client.get("/collections").text)["collections"][0]["documents"] == 2
