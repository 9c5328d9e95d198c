"""The MCP tools at /mcp, through the SDK's own client against a real uvicorn server.

Seeded fake encoder, real SQLite and FAISS. The restricted page carries a marker word
found nowhere else, so a leak in any part of any tool result (text, structured content,
error) shows up as the marker, its title or its id.
"""

from __future__ import annotations

import json
from collections.abc import AsyncIterator, Awaitable, Callable
from contextlib import asynccontextmanager
from pathlib import Path
from typing import Any, TypeVar

import anyio
import httpx
import httpx2
import pytest
from fastapi.testclient import TestClient
from mcp import ClientSession
from mcp.client.streamable_http import streamable_http_client
from mcp.shared.exceptions import MCPError
from prometheus_client.parser import text_string_to_metric_families
from sounding.indexer.embedding import HashingEmbedder
from sounding.service.app import create_app
from sounding.service.auth import ANONYMOUS
from sounding.service.engine import Engine
from sounding.service.mcp import Asker, call_tool, document_text
from sounding.service.mcp_http import loopback_name
from sounding.service.schemas import DocumentResponse, SectionOut

from sounding.cli import main
from tests.conftest import ServeIndex
from tests.serving import Served

SECRET_ID = "hr/salary-bands.md"
SECRET_TITLE = "Confidential salary bands"
MARKER = "zanzibarite"
PAGES = {
    SECRET_ID: f"---\ntitle: {SECRET_TITLE}\ngroups: [hr]\n---\n# {SECRET_TITLE}\n\n"
    f"The {MARKER} pump engineers earn band C.\n\n## Review\n\nBands change each April; "
    f"{MARKER} review.\n",
    "ops/pump.md": "# Pump restart\n\nRestart the pump slowly; engineers watch the gauge.\n\n"
    "## Valves\n\nOpen the inlet valve before the outlet valve.\n",
    "public.txt": "Pump open day\n\nVisitors may see the pump house on Sundays.\n",
}
KEYS = [
    ("reader", "read", "", False),
    ("hr", "read", "hr", False),
    ("bot", "read", "", True, "hr"),
]
ON_BEHALF = "X-Sounding-On-Behalf-Of"
T = TypeVar("T")


@pytest.fixture(scope="module")
def served(serve_index: ServeIndex) -> Served:
    return serve_index(
        PAGES, embedder=HashingEmbedder(32, seed=3), keys=KEYS, socket=True, max_body_bytes=8192
    )


@asynccontextmanager
async def session(url: str, headers: dict[str, str]) -> AsyncIterator[ClientSession]:
    """An initialised SDK client session on ``url``/mcp sending ``headers``."""
    async with (
        httpx2.AsyncClient(headers=headers, timeout=30) as http,
        streamable_http_client(f"{url}/mcp", http_client=http) as (read, write),
        ClientSession(read, write) as client,
    ):
        await client.initialize()
        yield client


def run(
    served: Served, who: str | None, use: Callable[[ClientSession], Awaitable[T]], **h: str
) -> T:
    """``use`` an MCP session of key ``who`` (None: no key), extra headers ``h``."""
    headers = ({"Authorization": f"Bearer {served.keys[who]}"} if who else {}) | h

    async def main() -> T:
        async with session(served.url, headers) as client:
            return await use(client)

    return anyio.run(main)


def call(served: Served, who: str | None, name: str, arguments: dict[str, Any], **h: str) -> Any:
    return run(served, who, lambda c: c.call_tool(name, arguments), **h)


def dump(result: Any) -> str:
    """All a result says, but the query it echoes (which the caller sent)."""
    structured = {k: v for k, v in (result.structured_content or {}).items() if k != "query"}
    return json.dumps([[c.model_dump() for c in result.content], structured])


def test_the_three_tools_are_listed_with_their_schemas(served: Served) -> None:
    listed = run(served, "reader", lambda c: c.list_tools()).tools
    tools = {t.name: t for t in listed}
    assert set(tools) == {"search", "context", "get_document"}
    search = tools["search"].input_schema
    assert search["required"] == ["query"] and search["properties"]["k"]["minimum"] == 1
    assert search["properties"]["mode"]["enum"] == ["dense", "lexical", "hybrid"]
    assert {"collections", "tags", "modified_after", "source_prefix"} <= set(search["properties"])
    assert tools["context"].input_schema["properties"]["budget"]["default"] == 1000
    assert tools["get_document"].input_schema["required"] == ["id"]
    for tool in listed:
        assert tool.description and tool.output_schema and tool.annotations.read_only_hint


def test_search_gives_passages_with_the_citations_of_context(served: Served) -> None:
    result = call(served, "reader", "search", {"query": "restart the pump", "k": 3})
    assert not result.is_error
    results = result.structured_content["results"]
    assert results and results[0]["rank"] == 1
    top = next(r for r in results if r["document_id"] == "ops/pump.md")
    assert top["citation"].startswith("Pump restart") and "(ops/pump.md)" in top["citation"]
    assert f"Source: {top['citation']}" in result.content[0].text


def test_context_is_the_block_post_context_gives(served: Served) -> None:
    body = {"query": "inlet valve", "budget": 120}
    rest = served.client.post("/context", json=body, headers=served.auth("reader")).json()
    result = call(served, "reader", "context", body)
    assert not result.is_error and rest["text"]
    assert result.content[0].text == rest["text"] == result.structured_content["text"]
    tool_passages = result.structured_content["passages"]
    assert [p["citation"] for p in tool_passages] == [p["citation"] for p in rest["passages"]]
    assert result.structured_content["used"] <= 120


def test_get_document_reads_a_page_as_get_documents_does(served: Served) -> None:
    result = call(served, "reader", "get_document", {"id": "ops/pump.md"})
    rest = served.client.get("/documents/ops/pump.md", headers=served.auth("reader")).json()
    doc = result.structured_content
    assert not result.is_error
    assert (doc["title"], doc["source"]) == (rest["title"], rest["source"])
    assert "## Valves\nOpen the inlet valve" in doc["text"] and not doc["truncated"]


@pytest.mark.parametrize(("who", "on_behalf"), [("reader", None), ("bot", "")])
def test_a_restricted_page_is_never_returned_outside_its_group(
    served: Served, who: str, on_behalf: str | None
) -> None:
    extra = {} if on_behalf is None else {ON_BEHALF: on_behalf}

    async def everything(client: ClientSession) -> list[Any]:
        return [
            await client.call_tool("search", {"query": f"{MARKER} salary bands", "k": 50}),
            await client.call_tool("search", {"query": MARKER, "mode": "lexical"}),
            await client.call_tool("context", {"query": f"{MARKER} band", "budget": 2000}),
            await client.call_tool("get_document", {"id": SECRET_ID}),
            await client.call_tool("search", {"query": "bands", "source_prefix": "hr/"}),
        ]

    results = run(served, who, everything, **extra)
    for result in results:
        text = dump(result)
        assert MARKER not in text and SECRET_TITLE not in text
    *_, lexical, _, document, prefixed = results
    assert lexical.structured_content["results"] == [] and prefixed.content[0].text == (
        "no passages matched"
    )
    # Hidden answers as unknown does, word for word the 404 of GET /documents/{id}.
    rest = served.client.get(f"/documents/{SECRET_ID}", headers=served.auth(who, **extra))
    unknown = call(served, who, "get_document", {"id": "hr/no-such-page.md"}, **extra)
    assert document.is_error and document.content[0].text == rest.json()["detail"]
    assert unknown.content[0].text == document.content[0].text.replace(
        SECRET_ID, "hr/no-such-page.md"
    )


@pytest.mark.parametrize(("who", "on_behalf"), [("hr", None), ("bot", "hr")])
def test_the_group_sees_its_page(served: Served, who: str, on_behalf: str | None) -> None:
    extra = {} if on_behalf is None else {ON_BEHALF: on_behalf}
    found = call(served, who, "search", {"query": MARKER, "mode": "lexical"}, **extra)
    assert {r["document_id"] for r in found.structured_content["results"]} == {SECRET_ID}
    doc = call(served, who, "get_document", {"id": SECRET_ID}, **extra)
    assert not doc.is_error and MARKER in doc.structured_content["text"]


def test_an_act_for_key_may_claim_only_its_groups(served: Served) -> None:
    r = httpx.post(
        f"{served.url}/mcp",
        json={"jsonrpc": "2.0", "id": 1, "method": "tools/list"},
        headers=served.auth("bot", **{ON_BEHALF: "finance"}),
    )
    assert r.status_code == 403 and "finance" in r.json()["detail"]


@pytest.mark.parametrize(
    ("name", "arguments", "reason"),
    [
        ("search", {"query": "pump", "k": 0}, "k=0 must be 1 or more"),
        ("search", {"query": "pump", "k": 101}, "k=101 is over the limit of 100 (setting max_k)"),
        ("search", {"query": "   "}, "the query is empty; send some words to search for"),
        ("search", {"query": "pump", "mode": "fuzzy"}, "mode='fuzzy' is not one of dense"),
        ("search", {"query": "pump", "k": "many"}, "invalid arguments: k: "),
        ("search", {"query": "pump", "collection": "x"}, "invalid arguments: collection: "),
        ("search", {}, "invalid arguments: query: Field required"),
        ("context", {"query": "pump", "budget": 10**6}, "over the limit of 8192"),
        ("context", {"query": "pump", "budget": 0}, "budget=0 must be 1 or more"),
        ("get_document", {"id": ""}, "invalid arguments: id: "),
    ],
)
def test_a_bad_argument_is_a_tool_error_not_a_crash(
    served: Served, name: str, arguments: dict[str, Any], reason: str
) -> None:
    async def bad_then_good(client: ClientSession) -> tuple[Any, Any]:
        return await client.call_tool(name, arguments), await client.call_tool(
            "search", {"query": "pump"}
        )

    bad, good = run(served, "reader", bad_then_good)
    assert bad.is_error and reason in bad.content[0].text, bad.content[0].text
    assert not good.is_error  # the same session goes on serving


def test_an_unknown_tool_is_a_protocol_error(served: Served) -> None:
    async def unknown(client: ClientSession) -> MCPError | None:
        try:
            await client.call_tool("delete_everything", {})
        except MCPError as exc:
            return exc
        return None

    error = run(served, "reader", unknown)
    assert error is not None and "unknown tool 'delete_everything'" in error.message


def test_keys_are_required(served: Served) -> None:
    ping = {"jsonrpc": "2.0", "id": 1, "method": "tools/list"}
    bare = httpx.post(f"{served.url}/mcp", json=ping)
    assert bare.status_code == 401 and bare.headers["www-authenticate"].startswith("Bearer")
    wrong = httpx.post(f"{served.url}/mcp", json=ping, headers={"Authorization": "Bearer x"})
    assert wrong.status_code == 401
    # Stateless: no stream to open and no session to end (the 405 the spec allows).
    assert httpx.get(f"{served.url}/mcp", headers=served.auth("reader")).status_code == 405
    # The SDK's client, refused at the HTTP layer, fails without a session.
    with pytest.raises(Exception) as caught:  # noqa: B017 - an exception group, checked below
        run(served, None, lambda c: c.list_tools())
    assert caught.group_contains(MCPError)


def test_the_same_limits_logs_and_metrics_cover_mcp(served: Served) -> None:
    big = {"jsonrpc": "2.0", "id": 1, "method": "tools/call", "params": {"query": "x" * 9000}}
    r = httpx.post(f"{served.url}/mcp", json=big, headers=served.auth("reader"))
    assert r.status_code == 413 and "max_body_bytes" in r.json()["detail"]
    assert r.headers["x-request-id"]  # the observer answered it, as every request
    call(served, "reader", "search", {"query": "pump", "mode": "lexical"})
    metrics = served.client.get("/metrics", headers=served.auth("reader")).text
    counted = {
        (s.labels["route"], s.labels["mode"], s.labels["status"])
        for family in text_string_to_metric_families(metrics)
        for s in family.samples
        if s.name == "sounding_http_requests_total"
    }
    assert ("/mcp", "lexical", "200") in counted and ("/mcp", "none", "413") in counted


def test_keyless_mcp_only_on_loopback_for_this_machine(serve_index: ServeIndex) -> None:
    keyless = serve_index(
        PAGES, embedder=HashingEmbedder(32, seed=3), require_keys=False, socket=True
    )
    result = call(keyless, None, "search", {"query": f"{MARKER} pump", "k": 50})
    assert not result.is_error and MARKER not in dump(result)  # anonymous: public only
    ping = {"jsonrpc": "2.0", "id": 1, "method": "tools/list"}
    evil = {"Origin": "http://evil.example", "Host": "evil.example:8757"}
    r = httpx.post(f"{keyless.url}/mcp", json=ping, headers=evil)
    assert r.status_code == 403 and "require_keys=false" in r.json()["detail"]
    # The same app seen from another machine's address: a key is needed.
    app = create_app(keyless.settings, embedder=HashingEmbedder(32, seed=3))
    with TestClient(app, client=("10.1.2.3", 50123)) as remote:
        r = remote.post(
            "/mcp", content=json.dumps(ping), headers={"content-type": "application/json"}
        )
        assert r.status_code == 401 and "loopback" in r.json()["detail"]


@pytest.mark.parametrize(
    ("host", "ok"),
    [
        ("127.0.0.1:8757", True),
        ("localhost", True),
        ("[::1]:80", True),
        ("http://localhost:3000", True),
        ("evil.example:8757", False),
        ("127.0.0.1.evil.example", False),
        ("", False),
        (None, False),
    ],
)
def test_loopback_names(host: str | None, ok: bool) -> None:
    assert loopback_name(host) is ok


def test_a_long_document_is_cut_at_a_word() -> None:
    view = DocumentResponse(
        id="a.md",
        collection="c",
        title="A",
        source="a.md",
        kind="markdown",
        modified=0,
        content_hash="h",
        indexed_at=0,
        metadata={},
        groups=[],
        tags=[],
        chunks=[],
        sections=[SectionOut(trail=["Intro"], page=None, text="alpha beta gamma " * 50, chunks=[])],
    )
    full, cut = document_text(view, 10_000)
    assert full.startswith("## Intro\nalpha beta") and not cut
    short, cut = document_text(view, 40)
    assert cut and len(short) <= 40 and short.endswith(" …") and "gam …" not in short


def test_sounding_mcp_without_a_key_refuses_to_start(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    """Fail closed: no key and no --anonymous is exit 2 before anything loads."""
    for name in ("SOUNDING_API_KEY", "SOUNDING_API_KEY_FILE"):
        monkeypatch.delenv(name, raising=False)
    assert main(["mcp", "--index", str(tmp_path / "index")]) == 2
    out, err = capsys.readouterr()
    assert out == "" and "needs a key" in err and "--anonymous" in err
    key = tmp_path / "k"
    key.write_text("snd_x_y\n")
    assert main(["mcp", "--index", str(tmp_path), "--key-file", str(key), "--anonymous"]) == 2
    assert "exclude each other" in capsys.readouterr().err


def test_each_tool_call_lets_go_of_its_generation(served: Served) -> None:
    """Held for the call, released after it, errors included: none outlives the engine."""
    embedder = HashingEmbedder(32, seed=3)
    settings = served.settings
    engine = Engine(settings.index_dir, embedder, settings.searcher_factory(embedder), 0)
    generation = engine.hold()
    assert generation is not None
    generation.release()
    asker = Asker(caller=ANONYMOUS, engine=engine, settings=settings)
    for name, arguments in [
        ("search", {"query": "pump"}),
        ("search", {"query": "pump", "k": 0}),
        ("context", {"query": "pump", "budget": 10**6}),
        ("get_document", {"id": SECRET_ID}),
        ("get_document", {"id": "ops/pump.md"}),
    ]:
        call_tool(asker, name, arguments)
    engine.close()
    assert generation.closed
