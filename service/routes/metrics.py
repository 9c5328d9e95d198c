"""``GET /metrics``: request counts and latencies, index size and the last re-index, for
Prometheus (text exposition format 0.0.4)."""

from __future__ import annotations

from fastapi import APIRouter, Request, Response

from ..metrics import CONTENT_TYPE, ServiceMetrics

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
def metrics(request: Request) -> Response:
    """Request counts and latency histograms per route and mode, index size, last re-index."""
    service_metrics: ServiceMetrics = request.app.state.metrics
    engine = getattr(request.app.state, "engine", None)
    searcher = engine.current() if engine is not None else None
    return Response(service_metrics.render(searcher), media_type=CONTENT_TYPE)
