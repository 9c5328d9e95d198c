"""``GET /metrics`` in process (FastAPI's TestClient), parsed with prometheus_client's parser."""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import AbstractContextManager
from pathlib import Path

import httpx
import pytest
from prometheus_client.parser import text_string_to_metric_families
from sounding.indexer.build import refresh_index
from sounding.indexer.embedding import HashingEmbedder
from sounding.indexer.errors import IndexMismatchError
from sounding.indexer.store import read_last_run
from sounding.service.limits import DEFAULT_MAX_JSON_DEPTH
from sounding.service.metrics import BUCKETS, ServiceMetrics

from tests.serving import Served, served_index

PAGES = {
    "runbooks/valve.md": "# Valve\n\n## Isolation\n\nClose the upstream gate first.\n",
    "notes/kiosk.md": "# Kiosk\n\nThe kiosk printer jams when the tray is overfilled.\n",
}
Samples = dict[tuple[str, frozenset], float]


def serve(tmp: Path, pages: dict[str, str] = PAGES, **options) -> AbstractContextManager[Served]:
    """These pages served in process; keys are not what these tests are about."""
    options.setdefault("embedder", HashingEmbedder(16))
    return served_index(tmp, pages, require_keys=False, max_body_bytes=4096, **options)


def scrape(client: httpx.Client) -> tuple[Samples, str]:
    r = client.get("/metrics")
    assert r.status_code == 200
    # The classic text format, version 0.0.4 (Prometheus "Exposition formats" docs).
    assert r.headers["content-type"].startswith("text/plain; version=0.0.4")
    samples: Samples = {}
    for family in text_string_to_metric_families(r.text):
        for s in family.samples:
            samples[(s.name, frozenset(s.labels.items()))] = s.value
    return samples, r.text


def value(samples: Samples, name: str, **labels: str) -> float:
    return samples.get((name, frozenset(labels.items())), 0.0)


REQUESTS = "sounding_http_requests_total"
LATENCY = "sounding_http_request_duration_seconds"


@pytest.fixture(scope="module")
def api(tmp_path_factory: pytest.TempPathFactory) -> Iterator[httpx.Client]:
    with serve(tmp_path_factory.mktemp("metrics")) as served:
        yield served.client


def test_search_counts_and_latency_move_per_mode(api: httpx.Client) -> None:
    before, _ = scrape(api)
    for mode in ("lexical", "lexical", "hybrid"):
        r = api.post("/search", json={"query": "upstream gate", "mode": mode})
        assert r.status_code == 200
    after, _ = scrape(api)
    ok = {"route": "/search", "method": "POST", "status": "200"}
    assert (
        value(after, REQUESTS, mode="lexical", **ok) - value(before, REQUESTS, mode="lexical", **ok)
        == 2
    )
    assert (
        value(after, REQUESTS, mode="hybrid", **ok) - value(before, REQUESTS, mode="hybrid", **ok)
        == 1
    )
    assert value(after, REQUESTS, mode="dense", **ok) == value(before, REQUESTS, mode="dense", **ok)
    timed = {"route": "/search", "method": "POST", "mode": "lexical"}
    count = value(after, f"{LATENCY}_count", **timed)
    assert count - value(before, f"{LATENCY}_count", **timed) == 2
    assert value(after, f"{LATENCY}_sum", **timed) > 0


def test_histogram_buckets_are_cumulative_up_to_the_count(api: httpx.Client) -> None:
    api.get("/health")
    samples, _ = scrape(api)
    labels = {"route": "/health", "method": "GET", "mode": "none"}
    bounds = [*(str(b) for b in BUCKETS), "+Inf"]
    counts = [value(samples, f"{LATENCY}_bucket", le=le, **labels) for le in bounds]
    assert counts == sorted(counts)  # a histogram's buckets count "at most le" (cumulative)
    assert counts[-1] == value(samples, f"{LATENCY}_count", **labels) >= 1


def test_a_request_refused_by_validation_is_counted_without_a_mode(api: httpx.Client) -> None:
    before, _ = scrape(api)
    assert api.post("/search", json={"query": ""}).status_code == 422
    after, _ = scrape(api)
    bad = {"route": "/search", "method": "POST", "mode": "none", "status": "422"}
    assert value(after, REQUESTS, **bad) - value(before, REQUESTS, **bad) == 1


def test_labels_are_route_templates_never_ids_or_paths(api: httpx.Client) -> None:
    assert api.get("/documents/some-secret-id").status_code == 404
    assert api.get("/documents/runbooks/valve.md").status_code == 200
    assert api.get("/no/such/secret-place").status_code == 404
    samples, text = scrape(api)
    for leaked in ("some-secret-id", "runbooks", "valve.md", "secret-place"):
        assert leaked not in text
    doc = {"route": "/documents/{document_id}", "method": "GET", "mode": "none"}
    assert value(samples, REQUESTS, status="404", **doc) >= 1
    assert value(samples, REQUESTS, status="200", **doc) >= 1
    assert value(samples, REQUESTS, route="unmatched", method="GET", mode="none", status="404") >= 1


def test_an_unusual_method_does_not_make_a_new_label(api: httpx.Client) -> None:
    assert api.request("BREW", "/health").status_code == 405
    samples, text = scrape(api)
    assert "BREW" not in text
    assert value(samples, REQUESTS, route="/health", method="other", mode="none", status="405") >= 1


def test_refusals_before_any_route_are_counted(api: httpx.Client) -> None:
    """RequestLimits answers 413 and 422 itself; they are still counted, under the route."""
    before, _ = scrape(api)
    big = api.post("/search", content=b"x" * 5000, headers={"content-type": "application/json"})
    deep = "[" * (DEFAULT_MAX_JSON_DEPTH + 1) + "]" * (DEFAULT_MAX_JSON_DEPTH + 1)
    nested = api.post("/search", content=deep, headers={"content-type": "application/json"})
    assert (big.status_code, nested.status_code) == (413, 422)
    after, _ = scrape(api)
    for status in ("413", "422"):
        labels = {"route": "/search", "method": "POST", "mode": "none", "status": status}
        assert value(after, REQUESTS, **labels) - value(before, REQUESTS, **labels) == 1


def test_index_gauges_match_health(api: httpx.Client) -> None:
    health = api.get("/health").json()
    samples, _ = scrape(api)
    assert value(samples, "sounding_index_loaded") == 1
    assert value(samples, "sounding_index_documents") == health["documents"] == 2
    assert value(samples, "sounding_index_chunks") == health["chunks"]
    assert value(samples, "sounding_index_generation") == health["generation"]
    assert value(samples, "sounding_index_updated_timestamp_seconds") > 0
    assert (
        value(
            samples,
            "sounding_build_info",
            version=api.get("/openapi.json").json()["info"]["version"],
        )
        == 1
    )


def test_last_run_gauges_follow_an_ok_then_a_failed_run(tmp_path: Path) -> None:
    with serve(tmp_path) as served:
        root, settings, api = served.root, served.settings, served.client
        first = read_last_run(settings.index_dir)
        assert first is not None and first["result"] == "ok"
        samples, _ = scrape(api)
        assert value(samples, "sounding_last_index_run_success") == 1
        assert value(samples, "sounding_last_index_run_timestamp_seconds") == pytest.approx(
            first["finished_at"]
        )
        assert value(samples, "sounding_last_index_run_duration_seconds") == first["seconds"]

        # Another encoder than the one that built the index: the run fails and says so.
        with pytest.raises(IndexMismatchError):
            refresh_index([root], settings, HashingEmbedder(32))
        failed = read_last_run(settings.index_dir)
        assert failed is not None and failed["result"] == "failed"
        samples, text = scrape(api)
        assert value(samples, "sounding_last_index_run_success") == 0
        assert value(samples, "sounding_last_index_run_timestamp_seconds") == pytest.approx(
            failed["finished_at"]
        )
        assert ("sounding_last_index_run_duration_seconds", frozenset()) not in samples
        assert str(settings.index_dir) not in text  # the run's detail names paths: not exposed
        assert value(samples, "sounding_index_loaded") == 1  # the last generation is served


def test_without_an_index_the_gauges_say_so(tmp_path: Path) -> None:
    with serve(tmp_path, {}) as served:
        samples, _ = scrape(served.client)
    assert value(samples, "sounding_index_loaded") == 0
    assert not any(
        name.startswith(("sounding_index_documents", "sounding_last_index_run"))
        for name, _ in samples
    )


def test_each_app_counts_on_its_own(tmp_path: Path) -> None:
    """Two apps in one process: a per-app registry, not prometheus_client's global one."""
    one, two = ServiceMetrics(tmp_path), ServiceMetrics(tmp_path)
    one.observe("/health", "GET", "none", 200, 0.01)
    assert b'route="/health"' in one.render(None)
    assert b'route="/health"' not in two.render(None)


@pytest.mark.parametrize(
    ("method", "mode", "status", "labels"),
    [
        ("GET", "dense", 200, ("GET", "dense", "200")),
        ("BREW", "none", 200, ("other", "none", "200")),
        ("POST", "lexical", 999, ("POST", "lexical", "other")),
        ("POST", "'; drop table", 200, ("POST", "none", "200")),
    ],
)
def test_label_values_come_from_fixed_sets(
    tmp_path: Path, method: str, mode: str, status: int, labels: tuple[str, str, str]
) -> None:
    metrics = ServiceMetrics(tmp_path)
    metrics.observe("/search", method, mode, status, 0.02)
    families = {f.name: f for f in text_string_to_metric_families(metrics.render(None).decode())}
    (sample,) = [s for s in families["sounding_http_requests"].samples if s.name.endswith("_total")]
    assert (sample.labels["method"], sample.labels["mode"], sample.labels["status"]) == labels


def test_metrics_is_listed_in_the_openapi_schema_as_prometheus_text(api: httpx.Client) -> None:
    paths = api.get("/openapi.json").json()["paths"]
    assert list(paths["/metrics"]) == ["get"]
    ok = paths["/metrics"]["get"]["responses"]["200"]["content"]
    # The content type the endpoint answers with (checked in scrape), as documented.
    assert list(ok) == ["text/plain; version=0.0.4; charset=utf-8"]
