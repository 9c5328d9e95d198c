"""``POST /context`` in process (FastAPI's TestClient), with the seeded fake encoder and keys."""

from __future__ import annotations

import httpx
import pytest
from sounding.indexer.embedding import HashingEmbedder, WhitespaceTokenizer
from sounding.indexer.grounding import token_counter

from tests.conftest import ServeIndex

# One long section (several windows at 64 word pieces), short ones, and a restricted page.
IMPELLER = " ".join(
    f"Step {i}: inspect impeller blade {i} for pitting and record wear figure w{i}."
    for i in range(1, 31)
)
PAGES = {
    "runbooks/pump.md": (
        "---\ntitle: Pump overhaul\ntags: [runbook]\n---\n# Pump overhaul\n\n"
        f"## Impeller inspection\n\n{IMPELLER}\n\n"
        "## Reassembly\n\nRefit the impeller with a new gasket and torque the casing bolts.\n"
    ),
    "notes/kiosk.txt": "Kiosk printer notes\n\nThe kiosk printer jams when its tray is full.\n",
    "hr/salaries.md": (
        "---\ngroups: [hr]\n---\n# Salary bands\n\nImpeller technicians are paid on band C7.\n"
    ),
}
COUNT = token_counter(WhitespaceTokenizer())  # HashingEmbedder's tokenizer


@pytest.fixture(scope="module")
def service(serve_index: ServeIndex) -> tuple[httpx.Client, dict[str, str]]:
    served = serve_index(
        PAGES,
        embedder=HashingEmbedder(32, seed=3),
        keys=[
            ("reader", "read", None, False),
            ("hr-reader", "read", "hr", False),
            ("bot", "read", None, True, "staff,hr"),
        ],
        max_query_chars=200,
        chunk_tokens=64,
        chunk_overlap=16,
        max_context_tokens=3000,
        max_context_chars=12000,
    )
    return served.client, served.keys


def ask(service, body, key: str = "reader", **headers: str) -> httpx.Response:
    client, keys = service
    return client.post(
        "/context", json=body, headers={"Authorization": f"Bearer {keys[key]}", **headers}
    )


def test_context_fits_the_budget_and_cites_every_passage(service) -> None:
    r = ask(service, {"query": "impeller blade pitting", "budget": 150})
    assert r.status_code == 200, r.text
    body = r.json()
    assert body["unit"] == "tokens" and body["budget"] == 150 and body["mode"] == "hybrid"
    assert body["generation"] == 1 and body["passages"]
    assert COUNT(body["text"]) == body["used"] <= 150
    for n, p in enumerate(body["passages"], 1):
        assert p["number"] == n and p["chunk_ids"]
        assert p["citation"] and p["document_id"] in p["citation"] + p["source"]
        assert f"[{n}] {p['text']}\nSource: {p['citation']}" in body["text"]
    top = body["passages"][0]
    assert top["document_id"] == "runbooks/pump.md" and top["title"] == "Pump overhaul"
    assert top["trail"] == ["Impeller inspection"] and top["page"] is None
    assert top["citation"].startswith("Pump overhaul > Impeller inspection (")


def test_adjacent_windows_join_without_repeating_their_overlap(service) -> None:
    body = ask(
        service,
        {
            "query": "inspect impeller blade pitting wear figure",
            "budget": 3000,
            "max_per_document": 1,
        },
    ).json()
    pump = [p for p in body["passages"] if p["document_id"] == "runbooks/pump.md"]
    assert len(pump) == 1  # the cap; the other windows joined it
    (p,) = pump
    assert len(p["chunk_ids"]) > 2
    # The joined text is a stretch of the section as written: no overlap repeated.
    assert p["text"] in IMPELLER
    assert all(p["text"].count(f"figure w{i}.") <= 1 for i in range(1, 31))


def test_per_document_cap(service) -> None:
    body = ask(service, {"query": "impeller", "budget": 3000, "max_per_document": 1}).json()
    ids = [p["document_id"] for p in body["passages"]]
    assert len(ids) == len(set(ids))


@pytest.mark.parametrize("unit", ["tokens", "chars"])
@pytest.mark.parametrize("budget", [1, 12, 40, 90, 333, 2500])
def test_never_over_budget(service, unit: str, budget: int) -> None:
    r = ask(service, {"query": "impeller gasket kiosk printer", "budget": budget, "unit": unit})
    assert r.status_code == 200
    body = r.json()
    count = COUNT if unit == "tokens" else len
    assert count(body["text"]) == body["used"] <= budget
    assert (body["text"] == "") == (body["passages"] == [])


def test_best_passage_is_cut_to_fit_a_small_budget(service) -> None:
    body = ask(service, {"query": "inspect impeller blade pitting", "budget": 60}).json()
    (p,) = body["passages"]
    assert p["truncated"] and p["text"].endswith(" …") and body["used"] <= 60


def test_characters_on_request(service) -> None:
    body = ask(service, {"query": "kiosk printer jams", "budget": 400, "unit": "chars"}).json()
    assert len(body["text"]) == body["used"] <= 400
    assert body["passages"][0]["document_id"] == "notes/kiosk.txt"


def test_filters_narrow_the_passages(service) -> None:
    body = ask(
        service, {"query": "impeller printer", "budget": 2000, "source_prefix": "notes/"}
    ).json()
    assert {p["document_id"] for p in body["passages"]} == {"notes/kiosk.txt"}


def _documents(r: httpx.Response) -> set[str]:
    assert r.status_code == 200, r.text
    return {p["document_id"] for p in r.json()["passages"]}


def test_restricted_document_only_for_its_group_and_on_behalf_of_its_members(service) -> None:
    q = {"query": "impeller technicians salary band", "budget": 2000}
    assert "hr/salaries.md" not in _documents(ask(service, q))
    assert "hr/salaries.md" not in ask(service, q).json()["text"]
    assert "hr/salaries.md" in _documents(ask(service, q, "hr-reader"))
    on_behalf = "X-Sounding-On-Behalf-Of"
    assert "hr/salaries.md" in _documents(ask(service, q, "bot", **{on_behalf: "staff,hr"}))
    assert "hr/salaries.md" not in _documents(ask(service, q, "bot", **{on_behalf: ""}))
    # Only an act-for key may speak for someone.
    assert ask(service, q, "reader", **{on_behalf: "hr"}).status_code == 403


def test_a_key_is_required(service) -> None:
    client, _ = service
    r = client.post("/context", json={"query": "impeller", "budget": 100})
    assert r.status_code == 401


@pytest.mark.parametrize(
    ("body", "reason"),
    [
        ({"query": ""}, "query"),
        ({"query": "   "}, "empty"),
        ({"query": "x" * 201}, "max_query_chars"),
        ({"query": "pump", "budget": 0}, "budget"),
        ({"query": "pump", "budget": 3001}, "max_context_tokens"),
        ({"query": "pump", "budget": 12001, "unit": "chars"}, "max_context_chars"),
        ({"query": "pump", "unit": "words"}, "unit"),
        ({"query": "pump", "max_per_document": 0}, "max_per_document"),
        ({"query": "pump", "mode": "fuzzy"}, "mode"),
        ({"query": "pump", "colour": "blue"}, "colour"),
        ({"budget": 10}, "query"),
    ],
)
def test_bad_requests_get_a_422_with_a_reason(service, body, reason: str) -> None:
    r = ask(service, body)
    assert r.status_code == 422
    assert reason in r.json()["detail"]


def test_openapi_lists_context_with_its_request_fields(service) -> None:
    client, _ = service
    schema = client.get("/openapi.json").json()
    body = schema["paths"]["/context"]["post"]["requestBody"]["content"]["application/json"]
    name = body["schema"]["$ref"].rsplit("/", 1)[-1]
    request = schema["components"]["schemas"][name]
    assert request["required"] == ["query"]
    fields = {"query", "budget", "unit", "max_per_document", "mode", "source_prefix"}
    assert fields <= set(request["properties"])
