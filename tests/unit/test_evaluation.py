"""indexer.evaluation: BEIR/TREC parsing, run files, pytrec_eval-backed measures."""

from __future__ import annotations

import gzip
import json
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from sounding.indexer.embedding import HashingEmbedder
from sounding.indexer.errors import SettingsError
from sounding.indexer.evaluation import (
    evaluate,
    find_corpus,
    mean,
    ranked,
    read_qrels,
    read_queries,
    read_run,
    run_from_rankings,
    truncate,
    write_run,
)
from sounding.indexer.experiment import evaluate_collection
from sounding.indexer.indexcache import cache_key, cached_index
from sounding.indexer.settings import IndexSettings

EXPECTED_QRELS = {"1": {"d1": 2, "d2": 0}, "2": {"d3": 1}}


@pytest.mark.parametrize(
    "text",
    [
        pytest.param(
            "query-id\tcorpus-id\tscore\n1\td1\t2\n1\td2\t0\n2\td3\t1\n", id="beir-header"
        ),
        pytest.param("1\td1\t2\n1\td2\t0\n2\td3\t1\n", id="beir-headerless"),
        pytest.param("1 0 d1 2\n1 0 d2 0\n2 0 d3 1\n", id="trec-spaces"),
        pytest.param("1\t0\td1\t2\n\n1\t0\td2\t0\n2\t0\td3\t1\n", id="trec-tabs-blank-line"),
        pytest.param("\nquery-id corpus-id score\r\n1 d1 2\r\n1 d2 0\r\n2 d3 1\r\n", id="crlf"),
    ],
)
def test_read_qrels_layouts(tmp_path: Path, text: str) -> None:
    path = tmp_path / "qrels.tsv"
    path.write_text(text, encoding="utf-8")
    assert read_qrels(path) == EXPECTED_QRELS


@pytest.mark.parametrize(
    ("text", "message"),
    [
        pytest.param("", "no judgments", id="empty"),
        pytest.param("query-id\tcorpus-id\tscore\n", "no judgments", id="header-only"),
        pytest.param("1\td1\t2\n1\td2\tmaybe\n", ":2:", id="bad-grade"),
        pytest.param("1\td1\n", ":1:", id="two-columns"),
        pytest.param("1 0 d1 2 extra\n", ":1:", id="five-columns"),
    ],
)
def test_read_qrels_errors(tmp_path: Path, text: str, message: str) -> None:
    path = tmp_path / "qrels.tsv"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(SettingsError, match=message) as info:
        read_qrels(path)
    assert str(path) in str(info.value)


def test_read_qrels_missing_file(tmp_path: Path) -> None:
    with pytest.raises(SettingsError, match="qrels file not found") as info:
        read_qrels(tmp_path / "nope.tsv")
    assert str(tmp_path / "nope.tsv") in str(info.value)


def test_read_queries(tmp_path: Path) -> None:
    path = tmp_path / "queries.jsonl"
    path.write_text(
        json.dumps({"_id": "1", "text": "first query", "metadata": {}})
        + "\n\n"
        + json.dumps({"_id": 2, "text": "zweite Anfrage"})
        + "\n",
        encoding="utf-8",
    )
    assert read_queries(path) == {"1": "first query", "2": "zweite Anfrage"}


@pytest.mark.parametrize(
    ("text", "message"),
    [
        pytest.param('{"_id": "1", "text": "ok"}\n{"_id": "2"\n', ":2: expected a JSON", id="json"),
        pytest.param('{"_id": "1"}\n', ":1: expected a JSON object with '_id'", id="key"),
        pytest.param('["1", "text"]\n', ":1:", id="not-object"),
        pytest.param('{"_id": "1", "text": 5}\n', "not a string", id="text-type"),
        pytest.param("\n\n", "no queries", id="empty"),
    ],
)
def test_read_queries_errors(tmp_path: Path, text: str, message: str) -> None:
    path = tmp_path / "queries.jsonl"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(SettingsError, match=message) as info:
        read_queries(path)
    assert str(path) in str(info.value)


@pytest.mark.parametrize("name", ["corpus.jsonl", "corpus.jsonl.gz"])
def test_find_corpus(tmp_path: Path, name: str) -> None:
    (tmp_path / name).write_bytes(b"" if name.endswith("jsonl") else gzip.compress(b""))
    assert find_corpus(tmp_path) == tmp_path / name


def test_find_corpus_prefers_plain_file(tmp_path: Path) -> None:
    (tmp_path / "corpus.jsonl").write_text("", encoding="utf-8")
    (tmp_path / "corpus.jsonl.gz").write_bytes(gzip.compress(b""))
    assert find_corpus(tmp_path) == tmp_path / "corpus.jsonl"


def test_find_corpus_errors(tmp_path: Path) -> None:
    with pytest.raises(SettingsError, match=r"has no corpus\.jsonl or corpus\.jsonl\.gz") as info:
        find_corpus(tmp_path)
    assert str(tmp_path) in str(info.value)
    with pytest.raises(SettingsError, match="dataset folder not found"):
        find_corpus(tmp_path / "missing")


def test_gzipped_queries_are_read(tmp_path: Path) -> None:
    path = tmp_path / "queries.jsonl.gz"
    path.write_bytes(gzip.compress(b'{"_id": "q", "text": "packed"}\n'))
    assert read_queries(path) == {"q": "packed"}


RUN = {
    "q2": {"b": 0.5, "a": 0.5, "c": 0.75},
    "q1": {"x": 1.0, "y": -0.125, "z": 0.1 + 0.2},
}


def test_run_file_round_trip(tmp_path: Path) -> None:
    path = tmp_path / "run.txt"
    write_run(RUN, path, tag="test-run")
    assert read_run(path) == RUN  # scores survive exactly (shortest round-trip repr)
    lines = [line.split() for line in path.read_text(encoding="utf-8").splitlines()]
    assert all(
        len(fields) == 6 and fields[1] == "Q0" and fields[5] == "test-run" for fields in lines
    )
    assert [(f[0], f[2], f[3]) for f in lines] == [
        ("q1", "x", "1"),
        ("q1", "z", "2"),
        ("q1", "y", "3"),
        # Tie between a and b: trec_eval's order, document id descending.
        ("q2", "c", "1"),
        ("q2", "b", "2"),
        ("q2", "a", "3"),
    ]


def test_write_run_rejects_bad_tag(tmp_path: Path) -> None:
    with pytest.raises(SettingsError, match="one word"):
        write_run(RUN, tmp_path / "run.txt", tag="two words")


@pytest.mark.parametrize(
    "text",
    ["q1 Q0 d1 1 0.5\n", "q1 Q0 d1 1 high tag\n", "q1 Q0 d1 1 0.5 t\nq1 Q0 d1 2 0.4 t\n"],
    ids=["five-columns", "bad-score", "duplicate"],
)
def test_read_run_errors(tmp_path: Path, text: str) -> None:
    path = tmp_path / "run.txt"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(SettingsError) as info:
        read_run(path)
    assert str(path) in str(info.value)


def test_ranked_breaks_ties_as_trec_eval_does() -> None:
    # trec_eval sorts equal scores by document id, descending.
    assert [d for d, _ in ranked({"d1": 1.0, "d2": 1.0, "d0": 2.0})] == ["d0", "d2", "d1"]
    tie = evaluate({"q": {"d1": 1.0, "d2": 1.0}}, {"q": {"d1": 1}}, ("recip_rank",))
    assert tie["q"]["recip_rank"] == pytest.approx(0.5)


def _ndcg_at(ranking: list[str], grades: dict[str, int], k: int) -> float:
    """nDCG@k as in Järvelin & Kekäläinen (2002), "Cumulated gain-based evaluation of IR
    techniques", computed the way trec_eval's ndcg_cut does: gain = relevance grade,
    discount log2(rank + 1) for 1-based ranks, ideal DCG from the qrels' grades sorted
    descending, both cut at k."""
    dcg = sum(grades.get(d, 0) / math.log2(r + 1) for r, d in enumerate(ranking[:k], 1))
    ideal = sorted((g for g in grades.values() if g > 0), reverse=True)[:k]
    idcg = sum(g / math.log2(r + 1) for r, g in enumerate(ideal, 1))
    return dcg / idcg


QRELS = {
    "q1": {"d1": 2, "d2": 1, "d4": 3, "d5": 0},
    "q2": {"d9": 1},  # judged, but the run does not answer it
}
HAND_RUN = {
    "q1": {"d3": 0.9, "d1": 0.8, "d5": 0.7, "d2": 0.6},
    "q3": {"d1": 1.0},  # answered, but not judged: ignored
}


def test_evaluate_ndcg_matches_the_formula() -> None:
    per_query = evaluate(HAND_RUN, QRELS)
    assert set(per_query) == {"q1", "q2"}
    # Written out: DCG = 0/log2 2 + 2/log2 3 + 0/log2 4 + 1/log2 5,
    # ideal = 3/log2 2 + 2/log2 3 + 1/log2 4 (Järvelin & Kekäläinen 2002, trec_eval gains).
    dcg = 2 / math.log2(3) + 1 / math.log2(5)
    idcg = 3 + 2 / math.log2(3) + 1 / 2
    assert _ndcg_at(["d3", "d1", "d5", "d2"], QRELS["q1"], 10) == pytest.approx(dcg / idcg)
    assert per_query["q1"]["ndcg_cut_10"] == pytest.approx(dcg / idcg)
    # Other measures by their textbook definitions: first relevant document at rank 2;
    # two of the three relevant (grade > 0) documents retrieved; AP = (1/2 + 2/4) / 3.
    assert per_query["q1"]["recip_rank"] == pytest.approx(1 / 2)
    assert per_query["q1"]["recall_100"] == pytest.approx(2 / 3)
    assert per_query["q1"]["map"] == pytest.approx(1 / 3)


def test_missing_queries_count_as_zero() -> None:
    per_query = evaluate(HAND_RUN, QRELS)
    assert per_query["q2"] == {"ndcg_cut_10": 0.0, "recall_100": 0.0, "recip_rank": 0.0, "map": 0.0}
    means = mean(per_query)
    assert means["ndcg_cut_10"] == pytest.approx(per_query["q1"]["ndcg_cut_10"] / 2)
    assert means["recall_100"] == pytest.approx(1 / 3)
    empty = evaluate({}, QRELS, ("ndcg_cut_10",))
    assert empty == {"q1": {"ndcg_cut_10": 0.0}, "q2": {"ndcg_cut_10": 0.0}}


def test_mrr_at_10_uses_the_truncated_run() -> None:
    # The only relevant document is at rank 11: recip_rank (no cutoff) is 1/11, MRR@10 is 0.
    run = {"q": {f"n{i:02d}": 1.0 - i / 100 for i in range(10)} | {"rel": 0.5}}
    per_query = evaluate(run, {"q": {"rel": 1}}, ("recip_rank", "recip_rank_10", "recip_rank_20"))
    assert per_query["q"] == {
        "recip_rank": pytest.approx(1 / 11),
        "recip_rank_10": 0.0,
        "recip_rank_20": pytest.approx(1 / 11),
    }


def test_truncate() -> None:
    assert truncate(RUN, 2) == {"q2": {"c": 0.75, "b": 0.5}, "q1": {"x": 1.0, "z": 0.1 + 0.2}}


@pytest.mark.parametrize(
    ("measure", "message"), [("bogus", "unknown measure"), ("ndcg_cut", "name one cutoff")]
)
def test_evaluate_rejects_bad_measures(measure: str, message: str) -> None:
    with pytest.raises(SettingsError, match=message):
        evaluate(HAND_RUN, QRELS, (measure,))


def test_mean_of_nothing_is_empty_and_a_missing_measure_counts_as_zero() -> None:
    assert mean({}) == {}  # no queries: no division by zero
    assert mean({"q1": {}, "q2": {}}) == {}
    assert mean({"q1": {"map": 0.5}, "q2": {}}) == {"map": 0.25}


def test_run_from_rankings() -> None:
    rankings = [[("d1", 0.5), ("d2", 0.25)], []]
    assert run_from_rankings(["a", "b"], rankings) == {"a": {"d1": 0.5, "d2": 0.25}, "b": {}}


# --- evaluate_collection and the index cache -----------------------------------------


def tiny_collection(folder: Path, words: str = "pump valve boiler canteen") -> Path:
    """A BEIR-layout folder: one document per word, one judged query per document."""
    folder.mkdir(parents=True, exist_ok=True)
    names = words.split()
    with open(folder / "corpus.jsonl", "w", encoding="utf-8") as fh:
        for i, w in enumerate(names):
            text = f"the {w} sits in hall {i}; the {w} is checked daily"
            fh.write(json.dumps({"_id": f"d{i}", "title": w.title(), "text": text}) + "\n")
    with open(folder / "queries.jsonl", "w", encoding="utf-8") as fh:
        for i, w in enumerate(names):
            fh.write(json.dumps({"_id": f"q{i}", "text": f"{w} hall"}) + "\n")
    (folder / "qrels.tsv").write_text(
        "query-id\tcorpus-id\tscore\n" + "".join(f"q{i}\td{i}\t1\n" for i in range(len(names))),
        encoding="utf-8",
    )
    return folder


@pytest.fixture
def collection(tmp_path: Path) -> Path:
    return tiny_collection(tmp_path / "tiny")


def settings_for(tmp_path: Path, **overrides) -> IndexSettings:
    return IndexSettings(index_dir=tmp_path / "unused", **overrides)


@pytest.mark.parametrize("mode", ["dense", "lexical", "hybrid"])
def test_evaluate_collection_scores_every_judged_query(tmp_path, collection, mode) -> None:
    result = evaluate_collection(collection, mode, settings_for(tmp_path), HashingEmbedder(16))
    assert result.mode == mode and set(result.per_query) == {"q0", "q1", "q2", "q3"}
    assert result.means["ndcg@10"] == pytest.approx(1.0)  # each query names its document
    assert set(result.to_json()) == {"ndcg@10", "recall@100", "mrr@10", "map", "queries"}
    assert result.index is None  # a scratch index, removed


def test_cache_builds_once_and_reuses_the_index(tmp_path, collection) -> None:
    cache, embedder = tmp_path / "cache", HashingEmbedder(16)
    first = evaluate_collection(
        collection, "dense", settings_for(tmp_path), embedder, cache_dir=cache
    )
    encoded = embedder.texts_encoded
    again = evaluate_collection(
        collection, "hybrid", settings_for(tmp_path), embedder, cache_dir=cache
    )
    assert not first.index.reused and again.index.reused
    assert again.index.index_dir == first.index.index_dir
    assert again.index.report.to_json() == first.index.report.to_json()
    assert embedder.texts_encoded - encoded == 4  # the queries only, no document
    assert [p.name for p in cache.iterdir()] == [first.index.index_dir.parent.name]


def test_cache_key_follows_corpus_model_and_chunking(tmp_path, collection) -> None:
    base = cache_key(collection / "corpus.jsonl", settings_for(tmp_path), HashingEmbedder(16))
    assert base == cache_key(
        collection / "corpus.jsonl", settings_for(tmp_path, batch_size=64), HashingEmbedder(16)
    )
    other_model = cache_key(
        collection / "corpus.jsonl", settings_for(tmp_path), HashingEmbedder(16, seed=1)
    )
    other_chunks = cache_key(
        collection / "corpus.jsonl", settings_for(tmp_path, chunk_tokens=64), HashingEmbedder(16)
    )
    changed = tiny_collection(tmp_path / "changed", "pump valve boiler kettle")
    other_corpus = cache_key(changed / "corpus.jsonl", settings_for(tmp_path), HashingEmbedder(16))
    assert len({base, other_model, other_chunks, other_corpus}) == 4


def test_an_interrupted_build_leaves_no_entry(tmp_path, collection, monkeypatch) -> None:
    from sounding.indexer import indexcache

    def killed(*args, **kwargs):
        raise KeyboardInterrupt

    monkeypatch.setattr(indexcache, "refresh_index", killed)
    cache = tmp_path / "cache"
    with pytest.raises(KeyboardInterrupt):
        cached_index(
            collection / "corpus.jsonl", settings_for(tmp_path), HashingEmbedder(16), cache
        )
    assert list(cache.iterdir()) == []
    monkeypatch.undo()
    built = cached_index(
        collection / "corpus.jsonl", settings_for(tmp_path), HashingEmbedder(16), cache
    )
    assert not built.reused and built.report.documents == 4


def test_a_killed_builders_folder_is_swept(tmp_path, collection) -> None:
    cache = tmp_path / "cache"
    embedder = HashingEmbedder(16)
    key = cache_key(collection / "corpus.jsonl", settings_for(tmp_path), embedder)
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    stale = cache / f".building-tiny-{key}-{dead.pid}-x"
    stale.mkdir(parents=True)
    cached_index(collection / "corpus.jsonl", settings_for(tmp_path), embedder, cache)
    assert not stale.exists()


def test_index_folder_of_judgments_alone(tmp_path, collection) -> None:
    # `sounding judgments export` writes no corpus: an existing index is ranked as it is.
    index = tmp_path / "index"
    embedder = HashingEmbedder(16)
    built = evaluate_collection(
        collection, "lexical", settings_for(tmp_path), embedder, index_dir=index
    )
    assert not built.index.reused
    (collection / "corpus.jsonl").unlink()
    again = evaluate_collection(
        collection, "lexical", settings_for(tmp_path), embedder, index_dir=index
    )
    assert again.index.reused and again.means == built.means


def test_index_and_cache_together_are_refused(tmp_path, collection) -> None:
    with pytest.raises(SettingsError, match="not both"):
        evaluate_collection(
            collection,
            "dense",
            settings_for(tmp_path),
            HashingEmbedder(16),
            index_dir=tmp_path / "i",
            cache_dir=tmp_path / "c",
        )


class ReversingReranker:
    """Scores passages so that the first-ranked one comes last."""

    name = "reversing"

    def __init__(self) -> None:
        self.calls = 0

    def score(self, query: str, passages):
        self.calls += 1
        return np.arange(len(passages), dtype=np.float32)


def test_evaluation_honours_a_configured_reranker(tmp_path, collection, monkeypatch) -> None:
    reranker = ReversingReranker()
    monkeypatch.setattr(IndexSettings, "reranker", lambda self: reranker)
    result = evaluate_collection(collection, "lexical", settings_for(tmp_path), HashingEmbedder(16))
    assert reranker.calls == 4
    # Each query's one relevant document is ranked first by BM25, then last by the reranker.
    assert result.means["ndcg@10"] < 1.0 and result.means["recall@100"] == 1.0
