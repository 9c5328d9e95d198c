"""Judgments from use: POST /feedback, then export as a BEIR-layout test set."""

from __future__ import annotations

import json
from collections.abc import Iterator
from pathlib import Path

import httpx
import pytest
from sounding.indexer.embedding import HashingEmbedder
from sounding.indexer.errors import SettingsError
from sounding.indexer.evaluation import read_qrels, read_queries
from sounding.indexer.judgments import JudgmentStore, query_id
from sounding.service.settings import ServiceSettings

from tests.serving import served_index


@pytest.mark.parametrize(
    ("a", "b", "same"),
    [("Who is on call?", "  who IS on   call? ", True), ("on call", "on-call", False)],
)
def test_query_ids_are_stable_under_spacing_and_case(a: str, b: str, same: bool) -> None:
    assert (query_id(a) == query_id(b)) is same


def test_export_keeps_latest_grade_per_user_and_averages_users(tmp_path: Path) -> None:
    store = JudgmentStore(tmp_path / "j.db")
    store.record("Who is on call?", "rota.md", 1, user="ann")
    store.record("who is on call?", "rota.md", 3, user="ann")  # ann changed her mind
    store.record("Who is on call?", "rota.md", 2, user="bo")  # (3 + 2) / 2 rounds to 3
    store.record("Who is on call?", "canteen.md", 0)
    store.record("Lunch hours", "canteen.md", 2)
    assert store.export(tmp_path / "set") == (2, 3)
    queries = read_queries(tmp_path / "set" / "queries.jsonl")
    qrels = read_qrels(tmp_path / "set" / "qrels.tsv")
    q1, q2 = query_id("who is on call?"), query_id("lunch hours")
    assert queries == {q1: "Who is on call?", q2: "Lunch hours"}
    assert qrels == {q1: {"rota.md": 3, "canteen.md": 0}, q2: {"canteen.md": 2}}
    header = (tmp_path / "set" / "qrels.tsv").read_text().splitlines()[0]
    assert header == "query-id\tcorpus-id\tscore"


@pytest.mark.parametrize("grade", [-1, 4])
def test_grades_outside_zero_to_three_are_refused(tmp_path: Path, grade: int) -> None:
    with pytest.raises(SettingsError, match="grade"):
        JudgmentStore(tmp_path / "j.db").record("q", "d", grade)


def test_nothing_to_export_is_an_error(tmp_path: Path) -> None:
    with pytest.raises(SettingsError, match="POST /feedback"):
        JudgmentStore(tmp_path / "j.db").export(tmp_path / "out")


@pytest.fixture
def served(tmp_path: Path) -> Iterator[tuple[httpx.Client, ServiceSettings]]:
    pages = {
        "rota.md": "# Standby rota\n\nThe standby engineer carries the pager.\n",
        "canteen.md": "# Canteen\n\nLunch from noon.\n",
    }
    with served_index(tmp_path, pages, embedder=HashingEmbedder(16), require_keys=False) as s:
        yield s.client, s.settings


def test_feedback_is_recorded_and_exported(served, tmp_path: Path) -> None:
    client, settings = served
    hit = client.post("/search", json={"query": "pager standby"}).json()["results"][0]
    r = client.post(
        "/feedback",
        json={"query": "pager standby", "chunk_id": hit["chunk_id"], "grade": 3, "user": "ann"},
    )
    assert r.status_code == 201
    assert r.json()["document_id"] == hit["document_id"] == "rota.md"
    r = client.post(
        "/feedback", json={"query": "pager standby", "document_id": "canteen.md", "grade": 0}
    )
    assert r.status_code == 201
    store = JudgmentStore(settings.judgments_file)
    assert store.export(tmp_path / "set") == (1, 2)
    lines = (tmp_path / "set" / "queries.jsonl").read_text().splitlines()
    assert [json.loads(x)["text"] for x in lines] == ["pager standby"]


@pytest.mark.parametrize(
    ("body", "status", "reason"),
    [
        ({"query": "x", "grade": 2}, 422, "document_id or chunk_id"),
        ({"query": "x", "document_id": "nope.md", "grade": 2}, 404, "nope.md"),
        ({"query": "x", "chunk_id": 99999, "grade": 2}, 404, "99999"),
        ({"query": "x", "document_id": "rota.md", "grade": 5}, 422, "grade"),
        ({"query": "", "document_id": "rota.md", "grade": 1}, 422, "query"),
        ({"query": "x", "document_id": "rota.md", "grade": 1, "extra": 1}, 422, "extra"),
    ],
)
def test_bad_feedback_gets_a_reason(served, body, status, reason) -> None:
    client, _ = served
    r = client.post("/feedback", json=body)
    assert r.status_code == status and reason in r.json()["detail"]
