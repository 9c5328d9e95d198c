"""``POST /feedback``: record a relevance judgment, building the team's own test set."""

from __future__ import annotations

from fastapi import APIRouter, HTTPException

from ..auth import ReadCaller
from ..deps import JudgmentsDep, ReaderDep
from ..filters import caller_filter
from ..schemas import ErrorResponse, FeedbackRequest, FeedbackResponse

router = APIRouter(tags=["feedback"])


@router.post(
    "/feedback",
    status_code=201,
    response_model=FeedbackResponse,
    responses={404: {"model": ErrorResponse}, 422: {"model": ErrorResponse}},
)
def feedback(
    body: FeedbackRequest, reader: ReaderDep, judgments: JudgmentsDep, caller: ReadCaller
) -> FeedbackResponse:
    """Store (query, document or passage, grade 0–3, the key's name); export with
    `sounding judgments`."""
    if body.document_id is None and body.chunk_id is None:
        raise HTTPException(422, "name the judged result: document_id or chunk_id")
    document_id = body.document_id
    # The caller's rule is inside each lookup's one query, so an id the caller may not
    # read and one that does not exist take the same path to the same 404.
    where = caller_filter(caller)
    if body.chunk_id is not None:
        chunk = reader.hit_rows([body.chunk_id], where).get(body.chunk_id)
        if chunk is None:
            raise HTTPException(404, f"no chunk with id {body.chunk_id} in the index")
        if document_id is not None and document_id != chunk.document_id:
            raise HTTPException(
                422, f"chunk {body.chunk_id} belongs to {chunk.document_id!r}, not {document_id!r}"
            )
        document_id = chunk.document_id
    assert document_id is not None
    if reader.document(document_id, where) is None:
        raise HTTPException(404, f"no document with id {document_id!r} in the index")
    # The judge is the key that sent it; a `user` in the body is accepted but ignored, so a
    # caller cannot put a judgment under someone else's name.
    user = None if caller.anonymous else caller.name
    j = judgments.record(body.query, document_id, body.grade, chunk_id=body.chunk_id, user=user)
    return FeedbackResponse(
        id=j.id, query_id=j.query_id, document_id=j.document_id, grade=j.grade, user=user
    )
