"""``GET /collections``: the collections the caller can search, with document counts."""

from __future__ import annotations

from fastapi import APIRouter

from ..auth import ReadCaller
from ..deps import ReaderDep
from ..filters import caller_filter
from ..schemas import CollectionOut, CollectionsResponse, ErrorResponse

router = APIRouter(tags=["collections"])


@router.get(
    "/collections",
    response_model=CollectionsResponse,
    responses={503: {"model": ErrorResponse}},
)
def collections(reader: ReaderDep, caller: ReadCaller) -> CollectionsResponse:
    """Collection names and how many of their documents the caller may read.

    A collection whose documents are all hidden from the caller is not listed.
    """
    pairs = reader.collections(caller_filter(caller))
    return CollectionsResponse(collections=[CollectionOut(name=n, documents=c) for n, c in pairs])
