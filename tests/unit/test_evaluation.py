"""indexer.evaluation: BEIR/TREC parsing, run files, pytrec_eval-backed measures."""

from __future__ import annotations

import gzip
import json
import math
from pathlib import Path

import pytest
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


def test_mean_of_nothing_is_empty() -> None:
    assert mean({}) == {}


def test_run_from_rankings() -> None:
    rankings = [[("d1", 0.5), ("d2", 0.25)], []]
    assert run_from_rankings(["a", "b"], rankings) == {"a": {"d1": 0.5, "d2": 0.25}, "b": {}}
