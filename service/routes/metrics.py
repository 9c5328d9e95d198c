"""``GET /metrics``: request counts and latencies, index size and the last re-index, for
Prometheus (text exposition format 0.0.4)."""

from __future__ import annotations

from fastapi import APIRouter, Response

from ..deps import MaybeGenerationDep, MetricsDep
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
def metrics(service_metrics: MetricsDep, generation: MaybeGenerationDep) -> Response:
    """Request counts and latency histograms per route and mode, index size, last re-index."""
    reader = generation.reader if generation is not None else None
    return Response(service_metrics.render(reader), media_type=CONTENT_TYPE)
