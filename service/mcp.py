"""sounding's tools for chat assistants over the Model Context Protocol (MCP).

Three tools, each a thin wrapper over the library calls the REST routes make,
so ranking, access and citations have one implementation:

- ``search``: ranked passages (``Searcher.query``/``run``, as ``POST /search``),
  each with the citation line ``/context`` writes;
- ``context``: the numbered, cited block that fits a token budget
  (``routes.context.ground``, as ``POST /context``: continuation of a procedure included);
- ``get_document``: one document's text (``IndexReader.document`` with the
  caller's filter, as ``GET /documents/{id}``; hidden and unknown ids get the
  same answer).

:func:`build_server` gives the SDK's low-level server; the transports
(:mod:`service.mcp_http` in the service, :func:`serve_stdio` for
``sounding mcp``) say who the caller is. A bad argument is a tool result with
``isError`` and the reason, as a 422 would carry it; nothing a tool raises
reaches the client as a traceback.
"""

from __future__ import annotations

import contextlib
import logging
import sys
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import anyio.to_thread
import mcp_types as types
from mcp.server.context import ServerRequestContext
from mcp.server.lowlevel import Server
from mcp.shared.exceptions import MCPError
from pydantic import BaseModel, ValidationError
from sounding.indexer import __version__
from sounding.indexer.errors import AccessError, QueryError, SettingsError, SoundingError
from sounding.indexer.grounding import (
    SEPARATOR,
    TRUNCATION_MARK,
    Citation,
    render_passage,
    token_counter,
)

from .auth import ANONYMOUS, Caller
from .engine import Engine, Generation
from .filters import caller_filter, search_filter
from .keys import KeyStore
from .mcp_schemas import (
    TOOLS,
    CitedPassage,
    ContextArgs,
    ContextResult,
    DocumentArgs,
    DocumentResult,
    SearchArgs,
    SearchResult,
    tool_list,
)
from .routes.context import PER_DOCUMENT_POOL, candidate_pool, check_budget, ground
from .schemas import DocumentResponse
from .settings import ServiceSettings
from .views import context_passages, document_view, passages

log = logging.getLogger("sounding.service")

SERVER_NAME = "sounding"
INTERNAL_ERROR = "internal error; see the service log"  # the words of service.app's 500


# -- calling a tool ---------------------------------------------------------------------


@dataclass(frozen=True)
class Asker:
    """Who calls a tool, and the service they call: the caller decides what is visible."""

    caller: Caller
    engine: Engine
    settings: ServiceSettings
    on_mode: Callable[[str], None] | None = None  # for the metrics' mode label


def _error(text: str) -> types.CallToolResult:
    return types.CallToolResult(content=[types.TextContent(text=text)], is_error=True)


def _result(text: str, structured: BaseModel) -> types.CallToolResult:
    return types.CallToolResult(
        content=[types.TextContent(text=text)], structured_content=structured.model_dump()
    )


def call_tool(asker: Asker, name: str, arguments: dict[str, Any]) -> types.CallToolResult:
    """Run tool ``name`` for ``asker`` on the generation served now, held until done.

    Blocking (encoding, SQLite, FAISS): transports run it in a worker thread.
    """
    if name not in TOOLS:
        known = ", ".join(TOOLS)
        raise MCPError(types.INVALID_PARAMS, f"unknown tool {name!r}; the tools are {known}")
    try:
        args = TOOLS[name][0].model_validate(arguments)
    except ValidationError as exc:
        reasons = "; ".join(
            f"{'.'.join(map(str, e['loc'])) or 'arguments'}: {e['msg']}" for e in exc.errors()
        )
        return _error(f"invalid arguments: {reasons}")
    generation = asker.engine.hold()
    if generation is None:
        reason = asker.engine.error or "unknown reason"
        return _error(f"no index is loaded: {reason}; build one with `sounding index PATH`")
    try:
        if isinstance(args, SearchArgs):
            return _search(asker, generation, args)
        if isinstance(args, ContextArgs):
            return _context(asker, generation, args)
        assert isinstance(args, DocumentArgs)
        return _document(asker, generation, args)
    except QueryError as exc:  # the REST API's 422
        return _error(str(exc))
    except SoundingError as exc:  # the REST API's 503
        return _error(str(exc))
    except Exception:
        # A bug, not a bad call: the traceback goes to the log, never to the assistant.
        log.exception("unexpected error in MCP tool %s", name)
        return _error(INTERNAL_ERROR)
    finally:
        generation.release()


def _search(asker: Asker, generation: Generation, args: SearchArgs) -> types.CallToolResult:
    if asker.on_mode is not None:
        asker.on_mode(args.mode)
    searcher, settings = generation.searcher, asker.settings
    query = searcher.query(
        args.query,
        args.k,
        mode=args.mode,
        max_per_document=args.max_per_document,
        where=search_filter(asker.caller, args),
        max_k=settings.max_k,
        max_query_chars=settings.max_query_chars,
    )
    hits = searcher.run(query)
    # The rows of POST /search (links, highlights), each with the citation /context writes.
    rows = passages(hits, args.query, settings.collection_urls)
    cited = [(p, Citation(p.document_id, p.title, p.source, tuple(p.trail), p.page)) for p in rows]
    results = [CitedPassage(**p.model_dump(), citation=c.line()) for p, c in cited]
    text = SEPARATOR.join(render_passage(p.rank, p.text, c) for p, c in cited)
    structured = SearchResult(
        query=args.query, mode=query.mode, generation=generation.number, results=results
    )
    return _result(text or "no passages matched", structured)


def _context(asker: Asker, generation: Generation, args: ContextArgs) -> types.CallToolResult:
    if asker.on_mode is not None:
        asker.on_mode(args.mode)
    searcher, settings = generation.searcher, asker.settings
    # The same pool and per-document looseness as POST /context (routes/context.py).
    query = searcher.query(
        args.query,
        candidate_pool(max(args.budget, 1), "tokens"),
        mode=args.mode,
        max_per_document=max(PER_DOCUMENT_POOL, 4 * args.max_per_document),
        where=search_filter(asker.caller, args),
        max_query_chars=settings.max_query_chars,
    )
    check_budget(args.budget, "tokens", settings)
    if args.budget < 1:
        raise QueryError(f"budget={args.budget} must be 1 or more")
    # The route's own grounding: same hits, same continuation of a procedure, same budget rule.
    chosen = ground(
        searcher,
        query,
        args.budget,
        token_counter(searcher.embedder.tokenizer),
        args.max_per_document,
    )
    chosen_passages = context_passages(chosen)
    structured = ContextResult(
        query=args.query,
        budget=args.budget,
        used=chosen.used,
        mode=query.mode,
        generation=generation.number,
        passages=chosen_passages,
        text=chosen.text,
    )
    return _result(chosen.text or "no passages matched", structured)


def _not_found(document_id: str) -> str:
    # Word for word the 404 of GET /documents/{id} (routes/documents.py).
    return f"no document with id {document_id!r} in the index"


def _document(asker: Asker, generation: Generation, args: DocumentArgs) -> types.CallToolResult:
    reader = generation.reader
    # The caller's rule is in the lookup's query: hidden and unknown ids take one path.
    doc = reader.document(args.id, caller_filter(asker.caller))
    if doc is None:
        return _error(_not_found(args.id))
    # What GET /documents/{id} shows: the source as readers see it, the text once.
    view = document_view(
        doc,
        reader.document_chunks(doc.id),
        asker.settings.collection_urls,
        overlap_tokens=reader.manifest.chunking.get("overlap"),
    )
    text, truncated = document_text(view, args.max_chars)
    structured = DocumentResult(
        id=view.id,
        collection=view.collection,
        title=view.title,
        source=view.source,
        url=view.url,
        kind=view.kind,
        modified=view.modified,
        tags=view.tags,
        citation=Citation(view.id, view.title, view.source).line(),
        text=text,
        truncated=truncated,
    )
    return _result(f"{view.title}\nSource: {structured.citation}\n\n{text}", structured)


def document_text(view: DocumentResponse, max_chars: int) -> tuple[str, bool]:
    """A document's sections, each under a line of its headings (and page); cut at a
    word to ``max_chars`` with the grounding's truncation mark. True when cut."""
    parts = []
    for section in view.sections:
        heading = " > ".join(section.trail)
        if section.page is not None:
            heading = f"{heading}, page {section.page}" if heading else f"page {section.page}"
        parts.append(f"## {heading}\n{section.text}" if heading else section.text)
    text = SEPARATOR.join(parts)
    if len(text) <= max_chars:
        return text, False
    cut = text[: max(0, max_chars - len(TRUNCATION_MARK))]
    if " " in cut.strip():
        cut = cut[: cut.rstrip().rfind(" ")]
    return cut.rstrip() + TRUNCATION_MARK, True


# -- the server -------------------------------------------------------------------------

AskerOf = Callable[[ServerRequestContext[Any, Any]], Asker | None]


def build_server(asker_of: AskerOf) -> Server[Any]:
    """The SDK's low-level server with sounding's tools; ``asker_of`` says who calls,
    from the request context (None: refuse, so a mistake in wiring fails closed)."""

    async def list_tools(
        ctx: ServerRequestContext[Any, Any], params: types.PaginatedRequestParams | None
    ) -> types.ListToolsResult:
        return types.ListToolsResult(tools=tool_list())

    async def on_call_tool(
        ctx: ServerRequestContext[Any, Any], params: types.CallToolRequestParams
    ) -> types.CallToolResult:
        try:  # off the event loop: stdio re-checks its key (a SQLite read) on every call
            asker = await anyio.to_thread.run_sync(asker_of, ctx)
        except AccessError as exc:  # revoked since the start, say
            return _error(str(exc))
        if asker is None:
            log.error("MCP tool call without a caller: refused (a wiring bug)")
            return _error("not authenticated; send 'Authorization: Bearer <key>'")
        arguments = dict(params.arguments or {})
        return await anyio.to_thread.run_sync(call_tool, asker, params.name, arguments)

    return Server(
        SERVER_NAME,
        version=__version__,
        title="sounding",
        description="Search over a team's documents, with cited passages.",
        instructions="Search the team's documents with `search`; get cited grounding for an "
        "answer with `context`; read a whole document with `get_document`. Cite the "
        "'Source:' lines you use.",
        on_list_tools=list_tools,
        on_call_tool=on_call_tool,
    )


# -- stdio ------------------------------------------------------------------------------


def key_caller(store: KeyStore, secret: str) -> Caller:
    """The caller a key is, with its own groups (an act-for key acts for nobody here:
    there is no end user to name); AccessError when the key is unknown or revoked."""
    key = store.authenticate(secret)
    return Caller(name=key.name, scope=key.scope, groups=key.groups, key_id=key.id)


async def serve_stdio(settings: ServiceSettings, secret: str | None, embedder: Any = None) -> None:
    """Serve the tools on stdin/stdout until the client closes them.

    ``secret`` is the key whose groups every call gets, checked again on each call
    (a revoked key stops working at once); None serves the unrestricted documents
    only. ``embedder`` lets tests pass a seeded fake instead of the real encoder.
    """
    import faiss
    from mcp.server.stdio import stdio_server

    store: KeyStore | None = None
    if secret is not None:
        if not settings.keys_file.is_file():
            raise SettingsError(
                f"no keys file at {settings.keys_file}; create a key with "
                "`sounding keys create --name NAME --scope read`"
            )
        store = KeyStore(settings.keys_file)
    try:
        caller = ANONYMOUS if store is None or secret is None else key_caller(store, secret)
        faiss.omp_set_num_threads(settings.search_threads)
        # stdout is the protocol's wire: whatever a library prints while loading goes to stderr.
        with contextlib.redirect_stdout(sys.stderr):
            if embedder is None:
                embedder = settings.model_copy(
                    update={"threads": settings.query_threads}
                ).embedder()
            embedder.encode(["warm-up"])  # load the weights now, not during the first call
            engine = Engine(
                settings.index_dir,
                embedder,
                settings.searcher_factory(embedder),
                settings.reload_check_seconds,
            )
        try:
            loaded = engine.hold()
            if loaded is None:  # fail at start, where the assistant's log shows why
                raise SettingsError(
                    f"no index is loaded from {settings.index_dir}: {engine.error}; build one "
                    "with `sounding index PATH`"
                )
            loaded.release()

            def asker_of(ctx: ServerRequestContext[Any, Any]) -> Asker:
                who = caller if store is None or secret is None else key_caller(store, secret)
                return Asker(caller=who, engine=engine, settings=settings)

            server = build_server(asker_of)
            async with stdio_server() as (read, write):
                await server.run(read, write, server.create_initialization_options())
        finally:
            engine.close()
    finally:
        if store is not None:
            store.close()
