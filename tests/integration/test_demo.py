"""The bundled demo wiki, indexed with the real encoder and queried over real HTTP."""

from __future__ import annotations

import email
import json
import os
import re
import sqlite3
from email import policy
from pathlib import Path

import httpx
import numpy as np
import pytest
from sounding.indexer.build import refresh_index
from sounding.indexer.loaders import SUPPORTED_SUFFIXES
from sounding.service.app import create_app
from sounding.service.settings import ServiceSettings

from tests.conftest import DEMO_CORPUS
from tests.integration.stopwords import content_words
from tests.serving import running

pytestmark = pytest.mark.slow

QUESTIONS = json.loads((Path(__file__).parent / "demo_questions.json").read_text("utf-8"))


class CountingEmbedder:
    """Wraps an encoder and counts how often, and on how many texts, it is called."""

    def __init__(self, inner) -> None:
        self.inner = inner
        self.calls = 0
        self.texts = 0

    def __getattr__(self, name: str):
        if name == "inner":  # not set yet (copies, pickling): no recursion
            raise AttributeError(name)
        return getattr(self.inner, name)

    def encode(self, texts) -> np.ndarray:
        self.calls += 1
        self.texts += len(texts)
        return self.inner.encode(texts)


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory, real_embedder):
    settings = ServiceSettings(
        require_keys=False,
        index_dir=tmp_path_factory.mktemp("demo") / "index",
    )
    report = refresh_index([DEMO_CORPUS], settings, real_embedder)
    return settings, report


@pytest.fixture(scope="module")
def base(demo, real_embedder) -> str:
    settings, _ = demo
    with running(create_app(settings, embedder=real_embedder)) as url:
        yield url


def document_text(base: str, doc_id: str) -> str:
    doc = httpx.get(f"{base}/documents/{doc_id}").json()
    meta = " ".join(str(v) for v in doc["metadata"].values())
    trails = " ".join(" ".join(c["trail"]) for c in doc["chunks"])
    return " ".join([doc["title"], meta, trails, *(c["text"] for c in doc["chunks"])])


def test_every_demo_file_is_indexed(demo) -> None:
    _, report = demo
    files = [p for p in DEMO_CORPUS.rglob("*") if p.is_file()]
    assert 40 <= len(files) <= 80
    # A saved mail's attachments of a readable type are documents of their own.
    attached = [
        part.get_filename()
        for p in files
        if p.suffix == ".eml"
        for part in email.message_from_bytes(
            p.read_bytes(), policy=policy.default
        ).iter_attachments()
        if Path(part.get_filename() or "").suffix.lower() in SUPPORTED_SUFFIXES
    ]
    assert attached, "the demo has a mail with an attachment"
    assert report.skipped == [] and report.documents == len(files) + len(attached)
    kinds = {p.suffix for p in files}
    assert {".md", ".html", ".pdf", ".txt"} <= kinds
    assert sum(p.suffix == ".pdf" for p in files) >= 2
    assert sum(p.suffix == ".html" for p in files) >= 2


def test_there_are_enough_questions_and_paraphrases() -> None:
    assert len(QUESTIONS) >= 15
    # The first set: a third at least are paraphrases (no content word shared with the
    # answer). The questions added later for ranking ("set": "new") are reported apart.
    first = [q for q in QUESTIONS if q.get("set") != "new"]
    assert sum(q["paraphrase"] for q in first) * 3 >= len(first)
    assert len(QUESTIONS) - len(first) >= 20


@pytest.mark.parametrize(
    "q", [q for q in QUESTIONS if q["paraphrase"]], ids=lambda q: q["question"][:40]
)
def test_paraphrase_questions_share_no_content_word_with_their_answer(base: str, q) -> None:
    for doc_id in q["expected"]:
        shared = content_words(q["question"]) & content_words(document_text(base, doc_id))
        assert shared == set(), f"{doc_id} shares {shared}"


@pytest.mark.parametrize("q", QUESTIONS, ids=lambda q: q["question"][:40])
def test_expected_document_is_in_the_top_five(base: str, q) -> None:
    r = httpx.post(f"{base}/search", json={"query": q["question"], "k": 5, "max_per_document": 1})
    assert r.status_code == 200
    top = [p["document_id"] for p in r.json()["results"]]
    assert set(q["expected"]) & set(top), f"expected {q['expected']}, got {top}"


def test_the_query_the_demo_prints_finds_its_answer(base: str) -> None:
    # scripts/demo.sh and the README print this curl; a new user's first query.
    r = httpx.post(
        f"{base}/search", json={"query": "can I move unused vacation days to next year?", "k": 3}
    )
    assert "hr/annual-leave.md" in [p["document_id"] for p in r.json()["results"]]


def test_chunks_fit_the_encoder_with_the_real_tokenizer(demo, real_embedder) -> None:
    settings, _ = demo
    conn = sqlite3.connect(settings.index_dir / "sounding.db")
    rows = conn.execute(
        "SELECT c.text, c.trail, c.tokens, d.title FROM chunks c "
        "JOIN documents d ON d.id = c.document_id"
    ).fetchall()
    assert len(rows) > 100
    # all-MiniLM-L6-v2's max_seq_length is 256 word pieces (its sentence_bert_config.json).
    assert max(r[2] for r in rows) <= 256 == real_embedder.max_tokens
    tok = real_embedder.model.tokenizer
    for text, trail, _tokens, title in rows:
        trail_text = " > ".join(json.loads(trail))
        embedded = "\n".join(p for p in (title, trail_text) if p) + "\n" + text
        assert len(tok(embedded)["input_ids"]) <= 256


def test_pdf_passages_keep_their_page(base: str) -> None:
    r = httpx.post(
        f"{base}/search",
        json={"query": "hotel nightly limit on business travel", "k": 10},
    ).json()
    pdf = [p for p in r["results"] if p["document_id"].endswith(".pdf")]
    assert pdf and all(isinstance(p["page"], int) and p["page"] >= 1 for p in pdf)


def test_html_boilerplate_is_not_indexed(base: str) -> None:
    for path in DEMO_CORPUS.rglob("*.html"):
        doc = httpx.get(f"{base}/documents/{path.relative_to(DEMO_CORPUS).as_posix()}").json()
        text = " ".join(c["text"] for c in doc["chunks"])
        assert "<" not in text and "function(" not in text and "{" not in text


def test_reindexing_the_unchanged_corpus_embeds_nothing(demo, real_embedder) -> None:
    settings, first = demo
    counting = CountingEmbedder(real_embedder)
    report = refresh_index([DEMO_CORPUS], settings, counting)
    assert counting.calls == 0 and counting.texts == 0
    assert report.unchanged == first.documents and report.chunks == first.chunks


@pytest.mark.parametrize("mode", ["hybrid", "dense", "lexical"])
def test_the_cli_through_the_server_prints_what_it_prints_in_process(
    demo, base: str, real_embedder, monkeypatch: pytest.MonkeyPatch, mode: str
) -> None:
    from click.testing import CliRunner
    from sounding.indexer.settings import IndexSettings

    from sounding.cli import cli

    settings, _ = demo
    monkeypatch.setattr(IndexSettings, "embedder", lambda self: real_embedder)
    for name in [n for n in os.environ if n.startswith("SOUNDING_")]:
        monkeypatch.delenv(name)
    for q in QUESTIONS[:5]:
        common = ["search", q["question"], "-k", "5", "--mode", mode, "--json"]
        local = CliRunner().invoke(cli, [*common, "--index", str(settings.index_dir)])
        remote = CliRunner().invoke(cli, [*common, "--server", base])
        assert local.exit_code == remote.exit_code == 0, (local.stderr, remote.stderr)
        mine, theirs = json.loads(local.stdout), json.loads(remote.stdout)
        assert [h["chunk_id"] for h in theirs] == [h["chunk_id"] for h in mine]
        assert [h["score"] for h in theirs] == pytest.approx([h["score"] for h in mine], abs=1e-5)


# -- first result and grounding floors (figures from tests/bench/quality.py --demo and
# tests/bench/grounding.py, 2026-12-03, minus a margin of about two questions) ----------

# (question set, mode) -> (top-1 share, MRR@10) measured.
RANK_MEASURED = {
    ("old", "dense"): (0.871, 0.935),
    ("new", "dense"): (0.885, 0.936),
    ("old", "lexical"): (0.452, 0.522),
    ("new", "lexical"): (0.731, 0.831),
    ("old", "hybrid"): (0.774, 0.882),
    ("new", "hybrid"): (0.885, 0.936),
}
RANK_MARGIN = 0.07
# Share of questions whose answer phrase is in the /context block at 400 tokens.
GROUNDING_MEASURED_400 = {"old": 0.742, "new": 1.000}
GROUNDING_MARGIN = 0.07


def _normalized(text: str) -> str:
    return " ".join(text.replace("*", "").replace("`", "").lower().split())


@pytest.mark.parametrize(("group", "mode"), sorted(RANK_MEASURED))
def test_first_result_floors(base: str, group: str, mode: str) -> None:
    ranks = []
    for q in [q for q in QUESTIONS if q.get("set", "old") == group]:
        r = httpx.post(
            f"{base}/search",
            json={"query": q["question"], "k": 10, "max_per_document": 1, "mode": mode},
        ).json()
        docs = [p["document_id"] for p in r["results"]]
        ranks.append(next((i for i, d in enumerate(docs, 1) if d in q["expected"]), 0))
    top1 = sum(r == 1 for r in ranks) / len(ranks)
    mrr = sum(1 / r for r in ranks if r) / len(ranks)
    print(f"{group} {mode}: top-1 {top1:.3f} MRR@10 {mrr:.3f}")
    want_top1, want_mrr = RANK_MEASURED[group, mode]
    assert top1 >= want_top1 - RANK_MARGIN and mrr >= want_mrr - RANK_MARGIN


@pytest.mark.parametrize("group", sorted(GROUNDING_MEASURED_400))
def test_context_holds_the_answer_at_400_tokens(base: str, group: str) -> None:
    judged = [q for q in QUESTIONS if q.get("set", "old") == group and q.get("answer")]
    found = 0
    for q in judged:
        r = httpx.post(f"{base}/context", json={"query": q["question"], "budget": 400}).json()
        found += _normalized(q["answer"]) in _normalized(r["text"])
    share = found / len(judged)
    print(f"{group}: answer phrase within 400 tokens {share:.3f}")
    assert share >= GROUNDING_MEASURED_400[group] - GROUNDING_MARGIN


def test_the_restore_context_at_400_holds_its_steps_in_order(base: str) -> None:
    r = httpx.post(
        f"{base}/context",
        json={"query": "How do I restore the telemetry database from a backup?", "budget": 400},
    ).json()
    steps = [
        int(m)
        for p in r["passages"]
        if p["document_id"] == "runbooks/restore-telemetry-db.md"
        for m in re.findall(r"Step (\d+):", " ".join(p["trail"]))
    ]
    assert len(steps) >= 2 and steps == sorted(steps)
    assert [s - steps[0] for s in steps] == list(range(len(steps)))  # consecutive
