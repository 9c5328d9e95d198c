"""``/documents/{id}``: read one document; push (``PUT``) or remove (``DELETE``) one.

A document the caller may not read answers 404 exactly like one that does
not exist, so its existence does not leak. Whether a push or a delete may
touch the stored document is decided by the indexer under the index lock
(:mod:`sounding.indexer.write_access`), never from the served generation: a
re-index may restrict the page while the push waits for the lock.
"""

from __future__ import annotations

import re
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import replace
from typing import Annotated, Any

from fastapi import APIRouter, Depends, HTTPException, Path, Query, Request
from pydantic import ValidationError
from sounding.indexer.access import parse_groups, parse_tags
from sounding.indexer.build import PushReport, delete_document, push_document
from sounding.indexer.errors import AccessError, IndexLockedError, LoadError, SettingsError
from sounding.indexer.loaders import SUPPORTED_SUFFIXES, parse_document, upload_kind
from sounding.indexer.reports import warnings_of
from sounding.indexer.write_access import HiddenDocumentError

from ..auth import ReadCaller, WriteCaller
from ..deps import EngineDep, ReaderDep, SettingsDep
from ..filters import caller_filter
from ..schemas import DocumentResponse, ErrorResponse, PushRequest, PushResponse
from ..views import document_view

router = APIRouter(tags=["documents"])

MAX_ID_CHARS = 512
# Path-like ids: segments of letters, digits and a few marks, joined by single slashes.
_SEGMENT = r"[\w.~@:+=,()' -]+"
_ID = re.compile(rf"^{_SEGMENT}(/{_SEGMENT})*$")
_FORM_FIELDS = frozenset({"file", "title", "collection", "source", "modified", "groups", "tags"})
_BLANK_GROUPS = (
    "the form field 'groups' is empty; leave it out to use the document's own groups or "
    'the access rules (a JSON push may send "groups": [] for readable by everyone)'
)
# One push at a time per process; the index lock orders it against `sounding index` runs.
# Both waits together last at most push_wait_seconds.
_push_lock = threading.Lock()
RETRY_AFTER_SECONDS = 30


def check_document_id(document_id: str) -> str:
    """``document_id`` if it is a safe id, else 422 naming the rule it breaks."""
    if len(document_id) > MAX_ID_CHARS:
        raise HTTPException(
            422,
            f"document id is {len(document_id)} characters; at most {MAX_ID_CHARS} are accepted",
        )
    if not _ID.match(document_id) or document_id != document_id.strip():
        raise HTTPException(
            422,
            f"document id {document_id!r} is not accepted: use letters, digits, spaces "
            "and . _ ~ @ : + = , ( ) ' -, with single '/' between parts and none at either end",
        )
    if any(part in (".", "..") or part != part.strip() for part in document_id.split("/")):
        raise HTTPException(
            422,
            f"document id {document_id!r} has a '.' or '..' part, or a "
            "part with spaces at its ends",
        )
    return document_id


DocumentId = Annotated[str, Path(description="The document's id, e.g. runbooks/restart.md.")]
HighlightQuery = Annotated[
    str | None,
    Query(max_length=1000, description="A query whose words to mark in `sections`."),
]


def _not_found(document_id: str) -> HTTPException:
    return HTTPException(404, f"no document with id {document_id!r} in the index")


@router.get(
    "/documents/{document_id:path}",
    response_model=DocumentResponse,
    responses={404: {"model": ErrorResponse}, 503: {"model": ErrorResponse}},
)
def get_document(
    document_id: DocumentId,
    reader: ReaderDep,
    caller: ReadCaller,
    settings: SettingsDep,
    highlight: HighlightQuery = None,
) -> DocumentResponse:
    """A document by id (its path relative to the indexed folder, or its corpus ``_id``).

    ``sections`` has its text once, with each chunk's span; ``highlight`` marks a query's
    words there, as ``/search`` marks them in passages.
    """
    # The caller's rule is in the lookup's query: hidden and unknown ids take one path.
    doc = reader.document(document_id, caller_filter(caller))
    if doc is None:
        raise _not_found(document_id)
    chunks = reader.document_chunks(doc.id)
    overlap = reader.manifest.chunking.get("overlap")
    return document_view(doc, chunks, settings.collection_urls, highlight, overlap)


async def _push_body(request: Request) -> tuple[PushRequest, bytes, str]:
    """The pushed document from JSON, or from a multipart upload (field ``file``)."""
    content_type = request.headers.get("content-type", "")
    if content_type.startswith("multipart/form-data"):
        form = await request.form()
        upload = form.get("file")
        if upload is None or isinstance(upload, str):
            raise HTTPException(422, "a multipart push needs the document in a field 'file'")
        data = await upload.read()
        name = upload.filename or "upload"
        kind = upload_kind(name)  # the loaders' registry: every format a folder run reads
        if kind is None:
            accepted = ", ".join(sorted(s for s in SUPPORTED_SUFFIXES if upload_kind(f"file{s}")))
            raise HTTPException(422, f"uploaded file {name!r} is not one of {accepted}")
        unknown = sorted(set(form) - _FORM_FIELDS)
        if unknown:  # a misspelt "group" would otherwise publish the page to everyone
            raise HTTPException(422, f"unknown form fields {unknown}; use {sorted(_FORM_FIELDS)}")
        fields: dict[str, Any] = {"text": "-", "format": "text"}
        for key in ("title", "collection", "source", "modified"):
            if form.get(key):
                fields[key] = form.get(key)
        for key in ("groups", "tags"):
            if key in form:
                raw = str(form.get(key) or "")
                fields[key] = [v.strip() for v in raw.split(",") if v.strip()]
        if "groups" in fields and not fields["groups"]:
            raise HTTPException(422, _BLANK_GROUPS)
        try:
            meta = PushRequest(**fields)
        except ValidationError as exc:
            reasons = "; ".join(f"{'.'.join(map(str, e['loc']))}: {e['msg']}" for e in exc.errors())
            raise HTTPException(422, f"invalid request: {reasons}") from None
        return meta, data, kind
    if not content_type.startswith("application/json"):
        raise HTTPException(
            415,
            "send the document as application/json "
            '({"text": ..., "format": "markdown"}) or as '
            "multipart/form-data with a field 'file'",
        )
    try:
        meta = PushRequest.model_validate_json(await request.body())
    except ValidationError as exc:
        reasons = "; ".join(
            f"{'.'.join(map(str, e['loc'])) or 'body'}: {e['msg']}" for e in exc.errors()
        )
        raise HTTPException(422, f"invalid request: {reasons}") from None
    return meta, meta.text.encode("utf-8"), meta.format


def _locked(exc: IndexLockedError) -> HTTPException:
    return HTTPException(503, f"{exc}", headers={"Retry-After": str(RETRY_AFTER_SECONDS)})


@contextmanager
def _one_push(wait_seconds: float) -> Iterator[float]:
    """Hold this process's push lock, waiting at most ``wait_seconds``; yields the time left
    for the index lock. 503 with Retry-After when another push holds it that long."""
    deadline = time.monotonic() + wait_seconds
    if not _push_lock.acquire(timeout=wait_seconds):
        raise HTTPException(
            503,
            f"another push to this service is still running after {wait_seconds:g} s "
            "(push_wait_seconds); try again shortly",
            headers={"Retry-After": str(RETRY_AFTER_SECONDS)},
        )
    try:
        yield max(0.0, deadline - time.monotonic())
    finally:
        _push_lock.release()


@router.put(
    "/documents/{document_id:path}",
    response_model=PushResponse,
    responses={
        403: {"model": ErrorResponse},
        404: {"model": ErrorResponse},
        409: {"model": ErrorResponse},
        413: {"model": ErrorResponse},
        415: {"model": ErrorResponse},
        422: {"model": ErrorResponse},
        503: {"model": ErrorResponse},
    },
    openapi_extra={
        "requestBody": {
            "required": True,
            "content": {
                "application/json": {"schema": PushRequest.model_json_schema()},
                "multipart/form-data": {
                    "schema": {
                        "type": "object",
                        "required": ["file"],
                        "properties": {
                            "file": {"type": "string", "format": "binary"},
                            "collection": {"type": "string"},
                            "groups": {"type": "string"},
                            "tags": {"type": "string"},
                            "title": {"type": "string"},
                            "source": {"type": "string"},
                        },
                    }
                },
            },
        }
    },
)
def put_document(
    document_id: DocumentId,
    caller: WriteCaller,
    settings: SettingsDep,
    engine: EngineDep,
    pushed: Annotated[tuple[PushRequest, bytes, str], Depends(_push_body)],
) -> PushResponse:
    """Add or replace a document; searchable when this returns (needs scope write).

    JSON (`text` with a `format`) or a multipart upload (`file`, for PDFs too). A key
    may replace only documents it may read (else 404, as for an unknown id), and may
    not push one restricted to groups it is not in (403: it could not change it again).
    """
    check_document_id(document_id)
    meta, data, kind = pushed
    collection = meta.collection or settings.push_collection
    try:
        doc = parse_document(
            data,
            kind,
            doc_id=document_id,
            name=meta.title or document_id.rsplit("/", 1)[-1],
            source=meta.source or f"pushed:{document_id}",
            modified=meta.modified if meta.modified is not None else time.time(),
            limits=settings.load_limits,
        )
    except LoadError as exc:
        raise HTTPException(422, f"cannot index document {document_id!r}: {exc}") from None
    if meta.title:
        doc = replace(doc, title=meta.title)
    try:
        groups = None if meta.groups is None else parse_groups(meta.groups, "groups")
        tags = None if meta.tags is None else parse_tags(meta.tags)
    except ValueError as exc:
        raise HTTPException(422, str(exc)) from None
    with _one_push(settings.push_wait_seconds) as wait_seconds:
        try:
            report: PushReport = push_document(
                settings,
                engine.embedder,
                doc,
                collection,
                groups=groups,
                tags=tags,
                wait_seconds=wait_seconds,
                caller_groups=caller.groups,
            )
        except IndexLockedError as exc:
            raise _locked(exc) from None
        except HiddenDocumentError:
            raise _not_found(document_id) from None  # not yours to see, so not yours to replace
        except AccessError as exc:
            raise HTTPException(403, str(exc)) from None
        except SettingsError as exc:
            raise HTTPException(409, str(exc)) from None
        except LoadError as exc:
            raise HTTPException(422, f"cannot index document {document_id!r}: {exc}") from None
        engine.reload()
    return PushResponse(
        document_id=document_id,
        action=report.action,
        chunks=report.chunks,
        chunks_embedded=report.chunks_embedded,
        generation=report.generation,
        warnings=warnings_of(doc),
    )


@router.delete(
    "/documents/{document_id:path}",
    response_model=PushResponse,
    responses={
        404: {"model": ErrorResponse},
        422: {"model": ErrorResponse},
        503: {"model": ErrorResponse},
    },
)
def remove_document(
    document_id: DocumentId,
    caller: WriteCaller,
    settings: SettingsDep,
    engine: EngineDep,
    _loaded: ReaderDep,  # 503 when no index is loaded; who may delete is decided below
) -> PushResponse:
    """Remove a document from the index (needs scope write); 404 when there is none, or
    when the key may not read it."""
    check_document_id(document_id)
    with _one_push(settings.push_wait_seconds) as wait_seconds:
        try:
            report = delete_document(
                settings,
                engine.embedder,
                document_id,
                wait_seconds=wait_seconds,
                caller_groups=caller.groups,
            )
        except IndexLockedError as exc:
            raise _locked(exc) from None
        engine.reload()
    if report is None:
        raise _not_found(document_id)
    return PushResponse(
        document_id=document_id,
        action=report.action,
        chunks=0,
        chunks_embedded=0,
        generation=report.generation,
    )
