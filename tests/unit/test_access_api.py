"""No endpoint reveals a restricted document to a caller outside its groups.

Real uvicorn server, real SQLite and FAISS, seeded fake encoder. The
restricted page carries a marker word found nowhere else, so a leak in any
field of any answer (results, snippets, counts, titles, citations, metrics)
shows up as the marker, the title or the id in the response body.
"""

from __future__ import annotations

import json
from pathlib import Path

import httpx
import pytest
from sounding.indexer.build import refresh_index
from sounding.indexer.embedding import HashingEmbedder
from sounding.service.app import create_app
from sounding.service.keys import KeyStore
from sounding.service.settings import ServiceSettings

from tests.serving import running

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


@pytest.fixture(scope="module")
def server(tmp_path_factory: pytest.TempPathFactory):
    root = tmp_path_factory.mktemp("wiki")
    for rel, text in PAGES.items():
        (root / rel).parent.mkdir(parents=True, exist_ok=True)
        (root / rel).write_text(text)
    settings = ServiceSettings(
        index_dir=root.parent / f"{root.name}-index", reload_check_seconds=0, push_wait_seconds=2
    )
    embedder = HashingEmbedder(32, seed=2)
    refresh_index([root], settings, embedder)
    keys = {}
    with KeyStore(settings.keys_file) as store:
        for name, scope, groups, act_for in [
            ("reader", "read", "", False),
            ("ops", "read", "ops", False),
            ("hr", "read", "hr", False),
            ("bot", "read", "ops", True),
            ("writer", "write", "", False),
            ("hr-writer", "write", "hr", False),
            ("admin", "admin", "", False),
        ]:
            keys[name] = store.create(name, scope, groups, act_for)[1]
    with running(create_app(settings, embedder=embedder)) as url:
        yield url, keys, settings


def _auth(keys: dict[str, str], who: str, on_behalf: str | None = None) -> dict[str, str]:
    headers = {"Authorization": f"Bearer {keys[who]}"}
    if on_behalf is not None:
        headers[ON_BEHALF] = on_behalf
    return headers


def _chunk_id(url: str, keys: dict[str, str]) -> int:
    doc = httpx.get(f"{url}/documents/{SECRET_ID}", headers=_auth(keys, "hr")).json()
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


def _requests(url: str, chunk_id: int) -> list[tuple[str, str, dict | None]]:
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
    url, keys, _ = server
    chunk_id = _chunk_id(url, keys)
    for method, path, body in _requests(url, chunk_id):
        r = httpx.request(method, f"{url}{path}", json=body, headers=_auth(keys, who, on_behalf))
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
    m = httpx.get(f"{url}/metrics", headers=_auth(keys, who, on_behalf))
    assert m.status_code == 200
    for leak in (MARKER, SECRET_TITLE, SECRET_ID, "salary-bands"):
        assert leak not in m.text


def test_counts_only_count_what_the_caller_may_read(server) -> None:
    url, keys, _ = server

    def counts(who: str, on_behalf: str | None = None) -> dict[str, int]:
        r = httpx.get(f"{url}/collections", headers=_auth(keys, who, on_behalf))
        return {c["name"]: c["documents"] for c in r.json()["collections"]}

    (name,) = counts("hr")
    assert counts("hr")[name] == 3
    assert counts("reader")[name] == 2
    assert counts("bot", "hr")[name] == 3  # on behalf of a member of hr
    assert counts("bot")[name] == 2
    assert httpx.get(f"{url}/health").json()["documents"] == 2


@pytest.mark.parametrize(
    ("who", "on_behalf"), [("hr", None), ("bot", "hr"), ("bot", "x,hr"), ("hr-writer", None)]
)
def test_members_do_see_it(server, who: str, on_behalf: str | None) -> None:
    url, keys, _ = server
    r = httpx.post(
        f"{url}/search",
        json={"query": QUERY, "k": 5, "mode": "lexical"},
        headers=_auth(keys, who, on_behalf),
    )
    assert r.status_code == 200
    assert r.json()["results"][0]["document_id"] == SECRET_ID
    doc = httpx.get(f"{url}/documents/{SECRET_ID}", headers=_auth(keys, who, on_behalf))
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
    url, _, _ = server
    r = httpx.request(method, f"{url}{path}", json=body)
    assert r.status_code == 401
    assert r.headers["www-authenticate"].startswith("Bearer")  # RFC 6750 section 3
    bad = httpx.request(
        method,
        f"{url}{path}",
        json=body,
        headers={"Authorization": "Bearer snd_000000000000_" + "A" * 43},
    )
    assert bad.status_code == 401
    assert httpx.get(f"{url}/health").status_code == 200


def test_on_behalf_header_needs_the_act_for_right(server) -> None:
    url, keys, _ = server
    r = httpx.post(f"{url}/search", json={"query": QUERY}, headers=_auth(keys, "hr", "hr"))
    assert r.status_code == 403 and "act-for" in r.json()["detail"]


@pytest.mark.parametrize("who", ["reader", "ops", "hr"])
def test_read_keys_cannot_push_or_delete(server, who: str) -> None:
    url, keys, _ = server
    put = httpx.put(
        f"{url}/documents/api/new.md",
        json={"text": "# New\n\nnew page\n"},
        headers=_auth(keys, who),
    )
    assert put.status_code == 403 and "write" in put.json()["detail"]
    gone = httpx.delete(f"{url}/documents/public.txt", headers=_auth(keys, who))
    assert gone.status_code == 403


def test_a_writer_outside_the_group_cannot_touch_the_restricted_page(server) -> None:
    url, keys, _ = server
    for r in (
        httpx.put(
            f"{url}/documents/{SECRET_ID}",
            json={"text": "# Taken over\n\nmine\n"},
            headers=_auth(keys, "writer"),
        ),
        httpx.delete(f"{url}/documents/{SECRET_ID}", headers=_auth(keys, "writer")),
    ):
        assert r.status_code == 404 and MARKER not in r.text
    doc = httpx.get(f"{url}/documents/{SECRET_ID}", headers=_auth(keys, "hr")).json()
    assert MARKER in doc["chunks"][0]["text"]


def test_push_is_searchable_when_the_call_returns_then_delete(server) -> None:
    url, keys, _ = server
    w = _auth(keys, "writer")
    r = httpx.put(
        f"{url}/documents/api/sluice.md",
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
    hits = httpx.post(
        f"{url}/search",
        headers=_auth(keys, "reader"),
        json={"query": "quernstone sluice", "mode": "lexical", "k": 1},
    ).json()
    assert hits["results"][0]["document_id"] == "api/sluice.md"
    assert hits["generation"] == body["generation"]
    assert hits["results"][0]["collection"] == "pushed"
    assert hits["results"][0]["source"] == "https://wiki.example/sluice"
    doc = httpx.get(f"{url}/documents/api/sluice.md", headers=_auth(keys, "reader")).json()
    assert doc["tags"] == ["gates"]
    # Same content again: nothing to do, no new generation.
    again = httpx.put(
        f"{url}/documents/api/sluice.md",
        headers=w,
        json={
            "text": "# Sluice gates\n\nThe quernstone sluice opens at dawn.\n",
            "tags": ["Gates"],
            "source": "https://wiki.example/sluice",
        },
    ).json()
    assert again["action"] == "unchanged" and again["generation"] == body["generation"]
    # Restrict it: readers outside the group lose it at once.
    httpx.put(
        f"{url}/documents/api/sluice.md",
        headers=w,
        json={
            "text": "# Sluice gates\n\nThe quernstone sluice opens at dawn.\n",
            "groups": ["hr"],
            "source": "https://wiki.example/sluice",
        },
    ).raise_for_status()
    assert (
        httpx.get(f"{url}/documents/api/sluice.md", headers=_auth(keys, "reader")).status_code
        == 404
    )
    assert httpx.get(f"{url}/documents/api/sluice.md", headers=_auth(keys, "hr")).status_code == 200
    # Writers outside the group can no longer see it, so cannot change or delete it.
    for who in ("writer", "admin"):
        assert (
            httpx.delete(f"{url}/documents/api/sluice.md", headers=_auth(keys, who)).status_code
            == 404
        )
        assert (
            httpx.put(
                f"{url}/documents/api/sluice.md",
                headers=_auth(keys, who),
                json={"text": "# Mine\n\nmine\n"},
            ).status_code
            == 404
        )
    d = httpx.delete(f"{url}/documents/api/sluice.md", headers=_auth(keys, "hr-writer"))
    assert d.status_code == 200 and d.json()["action"] == "removed"
    hits = httpx.post(
        f"{url}/search",
        headers=_auth(keys, "reader"),
        json={"query": "quernstone", "mode": "lexical"},
    ).json()
    assert hits["results"] == []


def test_upload_a_file_with_metadata(server) -> None:
    url, keys, _ = server
    page = (
        b"<html><head><title>Weir log</title></head><body><p>Weir level logged hourly by "
        b"the bargeman.</p></body></html>"
    )
    r = httpx.put(
        f"{url}/documents/api/weir.html",
        headers=_auth(keys, "writer"),
        files={"file": ("weir.html", page, "text/html")},
        data={"collection": "uploads", "tags": "weir, logs", "groups": "ops"},
    )
    assert r.status_code == 200, r.text
    doc = httpx.get(f"{url}/documents/api/weir.html", headers=_auth(keys, "ops")).json()
    assert doc["title"] == "Weir log" and doc["collection"] == "uploads"
    assert doc["groups"] == ["ops"] and doc["tags"] == ["logs", "weir"]
    assert doc["kind"] == "html"
    bad = httpx.put(
        f"{url}/documents/api/x.exe",
        headers=_auth(keys, "writer"),
        files={"file": ("x.exe", b"MZ", "application/octet-stream")},
    )
    assert bad.status_code == 422 and ".exe" in bad.json()["detail"] or "x.exe" in bad.text


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
def test_unsafe_ids_are_refused(server, doc_id: str) -> None:
    url, keys, _ = server
    # Every byte percent-encoded, so the client cannot normalise "a/../b" away before sending.
    raw = "".join(f"%{b:02X}" for b in doc_id.encode())
    r = httpx.put(
        f"{url}/documents/{raw}", json={"text": "# T\n\nt\n"}, headers=_auth(keys, "writer")
    )
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
    url, keys, _ = server
    r = httpx.put(f"{url}/documents/api/bad.md", json=body, headers=_auth(keys, "writer"))
    assert r.status_code == 422 and fragment in r.json()["detail"], r.text


def test_push_into_a_folder_collection_conflicts(server) -> None:
    url, keys, _ = server
    r = httpx.put(
        f"{url}/documents/ops/pump.md", json={"text": "# P\n\np\n"}, headers=_auth(keys, "writer")
    )
    assert r.status_code == 409 and "belongs to collection" in r.json()["detail"]


def test_push_while_a_reindex_holds_the_lock_is_503_with_retry_after(server) -> None:
    from sounding.indexer.lock import IndexLock

    url, keys, settings = server
    with IndexLock(settings.index_dir):
        r = httpx.put(
            f"{url}/documents/api/later.md",
            json={"text": "# L\n\nlater\n"},
            headers=_auth(keys, "writer"),
        )
    assert r.status_code == 503 and r.headers["retry-after"] == "30"
    assert "being updated" in r.json()["detail"]


def test_filters_narrow_search(server) -> None:
    url, keys, _ = server
    h = _auth(keys, "hr")

    def ids(**extra) -> set[str]:
        r = httpx.post(f"{url}/search", headers=h, json={"query": "pump", "k": 20, **extra})
        assert r.status_code == 200, r.text
        return {p["document_id"] for p in r.json()["results"]}

    assert ids(tags=["RUNBOOK"]) == {"ops/pump.md"}
    assert ids(source_prefix="hr/") == {SECRET_ID}
    assert ids(collections=["nothing"]) == set()
    assert ids(modified_after="2999-01-01T00:00:00Z") == set()
    assert ids(modified_after=0) == set(PAGES)
    bad = httpx.post(f"{url}/search", headers=h, json={"query": "pump", "modified_after": "soon"})
    assert bad.status_code == 422 and "modified_after" in bad.json()["detail"]


def test_anonymous_on_loopback_sees_only_unrestricted(tmp_path: Path) -> None:
    root = tmp_path / "w"
    for rel, text in PAGES.items():
        (root / rel).parent.mkdir(parents=True, exist_ok=True)
        (root / rel).write_text(text)
    settings = ServiceSettings(index_dir=tmp_path / "i", require_keys=False)
    embedder = HashingEmbedder(32, seed=2)
    refresh_index([root], settings, embedder)
    with running(create_app(settings, embedder=embedder)) as url:
        r = httpx.post(f"{url}/search", json={"query": QUERY, "k": 50})
        assert r.status_code == 200 and r.json()["results"]
        assert MARKER not in json.dumps(r.json()["results"])
        assert httpx.get(f"{url}/documents/{SECRET_ID}").status_code == 404
        r = httpx.post(f"{url}/search", json={"query": QUERY}, headers={ON_BEHALF: "hr"})
        assert r.status_code == 403  # anonymous callers cannot claim groups
        assert json.loads(httpx.get(f"{url}/collections").text)["collections"][0]["documents"] == 2
