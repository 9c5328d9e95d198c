"""``GET /metrics``: request counts and latencies, index size and the last re-index, for
Prometheus (text exposition format 0.0.4)."""

from __future__ import annotations

from fastapi import APIRouter, Response

from ..auth import ReadCaller
from ..deps import MaybeGenerationDep, MetricsDep
from ..filters import caller_filter
from ..metrics import CONTENT_TYPE

# A read key is required: create_app includes this router with the dependency.
router = APIRouter(tags=["operations"])


@router.get(
    "/metrics",
    response_class=Response,
    responses={
        200: {
            "content": {CONTENT_TYPE: {"schema": {"type": "string"}}},
            "description": "Metrics in the Prometheus text format.",
        }
    },
)
def metrics(
    service_metrics: MetricsDep, generation: MaybeGenerationDep, caller: ReadCaller
) -> Response:
    """Request counts and latency histograms per route and mode, the size of what the key
    may read, last re-index."""
    reader = generation.reader if generation is not None else None
    body = service_metrics.render(reader, caller_filter(caller))
    return Response(body, media_type=CONTENT_TYPE)
