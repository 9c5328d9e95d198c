"""Judged-query evaluation: BEIR/TREC files in, trec_eval measures out.

Files read here follow BEIR's layout (``queries.jsonl``, ``qrels.tsv``,
``corpus.jsonl``) and TREC's (qrels, run files). Every measure is computed by
``pytrec_eval`` (the trec_eval C code); nothing here re-implements metric math.

A *run* is ``{query id: {document id: score}}``; *qrels* are
``{query id: {document id: grade}}``.
"""

from __future__ import annotations

import gzip
import json
import math
import re
from collections.abc import Iterable, Iterator, Mapping, Sequence
from pathlib import Path
from typing import IO

import pytrec_eval

from .errors import SettingsError

Run = Mapping[str, Mapping[str, float]]
Qrels = Mapping[str, Mapping[str, int]]

DEFAULT_MEASURES: tuple[str, ...] = ("ndcg_cut_10", "recall_100", "recip_rank", "map")

_CUTOFF = re.compile(r"^(?P<base>.+)_(?P<k>\d+)$")


def _open_text(path: Path) -> IO[str]:
    if path.suffix == ".gz":
        return gzip.open(path, "rt", encoding="utf-8")
    return open(path, encoding="utf-8")


def _lines(path: Path, what: str) -> Iterator[tuple[int, str]]:
    """Numbered, stripped, non-empty lines of ``path``; SettingsError if unreadable."""
    path = Path(path)
    if not path.is_file():
        raise SettingsError(f"{what} file not found: {path}")
    try:
        with _open_text(path) as fh:
            for number, line in enumerate(fh, 1):
                line = line.strip()
                if line:
                    yield number, line
    except (OSError, UnicodeDecodeError, EOFError) as exc:
        raise SettingsError(f"cannot read {what} file {path}: {exc}") from exc


def read_queries(path: Path) -> dict[str, str]:
    """Query texts by id from a BEIR ``queries.jsonl`` (one ``{"_id", "text"}`` per line)."""
    queries: dict[str, str] = {}
    for number, line in _lines(path, "queries"):
        try:
            record = json.loads(line)
            qid, text = str(record["_id"]), record["text"]
        except (ValueError, KeyError, TypeError) as exc:
            raise SettingsError(
                f"{path}:{number}: expected a JSON object with '_id' and 'text' "
                f"(BEIR queries.jsonl), got {line[:80]!r}"
            ) from exc
        if not isinstance(text, str):
            raise SettingsError(f"{path}:{number}: 'text' of query {qid} is not a string")
        queries[qid] = text
    if not queries:
        raise SettingsError(f"queries file {path} holds no queries")
    return queries


def read_qrels(path: Path) -> dict[str, dict[str, int]]:
    """Relevance grades from a qrels file.

    Accepted layouts, one judgment per line, tab- or space-separated:
    BEIR ``query-id corpus-id score`` (with or without that header line) and
    TREC ``query-id iteration corpus-id grade``.
    """
    qrels: dict[str, dict[str, int]] = {}
    for seen, (number, line) in enumerate(_lines(path, "qrels")):
        fields = line.split("\t") if "\t" in line else line.split()
        fields = [f.strip() for f in fields]
        if len(fields) == 3:
            qid, docid, grade = fields
        elif len(fields) == 4:
            qid, _, docid, grade = fields
        else:
            grade = ""
        try:
            value = int(grade)
        except ValueError:
            if seen == 0 and len(fields) in (3, 4):
                continue  # a header line such as "query-id corpus-id score"
            raise SettingsError(
                f"{path}:{number}: expected 'query-id corpus-id score' (BEIR) or "
                f"'query-id 0 corpus-id grade' (TREC) with an integer grade, got {line[:80]!r}"
            ) from None
        qrels.setdefault(qid, {})[docid] = value
    if not qrels:
        raise SettingsError(f"qrels file {path} holds no judgments")
    return qrels


def find_corpus(dataset_dir: Path) -> Path:
    """The ``corpus.jsonl`` (or ``corpus.jsonl.gz``) of a BEIR dataset folder."""
    dataset_dir = Path(dataset_dir)
    if not dataset_dir.is_dir():
        raise SettingsError(f"dataset folder not found: {dataset_dir}")
    for name in ("corpus.jsonl", "corpus.jsonl.gz"):
        candidate = dataset_dir / name
        if candidate.is_file():
            return candidate
    raise SettingsError(
        f"dataset folder {dataset_dir} has no corpus.jsonl or corpus.jsonl.gz "
        "(BEIR layout: corpus.jsonl, queries.jsonl, qrels.tsv)"
    )


def ranked(docs: Mapping[str, float]) -> list[tuple[str, float]]:
    """Documents best first, in the order trec_eval ranks them.

    trec_eval ignores the rank column of a run and sorts by score, breaking
    ties by document id in *descending* order; ranking the same way keeps
    written ranks, truncations and the evaluated order in agreement.
    """
    by_id = sorted(docs.items(), key=lambda item: item[0], reverse=True)
    return sorted(by_id, key=lambda item: -float(item[1]))


def truncate(run: Run, depth: int) -> dict[str, dict[str, float]]:
    """The top ``depth`` documents of each query of ``run``."""
    return {qid: dict(ranked(docs)[:depth]) for qid, docs in run.items()}


def _pytrec_name(measure: str) -> str:
    """``ndcg_cut_10`` (how results are keyed) -> ``ndcg_cut.10`` (how pytrec_eval asks)."""
    if measure in pytrec_eval.supported_measures:
        return measure
    match = _CUTOFF.match(measure)
    if match and match["base"] in pytrec_eval.supported_measures:
        return f"{match['base']}.{match['k']}"
    supported = ", ".join(sorted(pytrec_eval.supported_measures))
    raise SettingsError(
        f"unknown measure {measure!r}; use trec_eval names such as "
        f"{', '.join(DEFAULT_MEASURES)} (supported: {supported}, with _K for a cutoff)"
    )


def evaluate(
    run: Run, qrels: Qrels, measures: Sequence[str] = DEFAULT_MEASURES
) -> dict[str, dict[str, float]]:
    """Per-query values of ``measures`` for ``run``, by ``pytrec_eval.RelevanceEvaluator``.

    Measures are named as trec_eval reports them (``ndcg_cut_10``, ``recall_100``,
    ``map``). ``recip_rank_K`` is MRR@K: trec_eval's ``recip_rank`` has no cutoff
    (and pytrec_eval silently drops one if asked), so it is computed as
    ``recip_rank`` on the run truncated to its top K per query.

    The result has one entry per judged query (every query in ``qrels``).
    pytrec_eval leaves out judged queries the run does not answer; they are
    added here with every measure 0, so means are over all judged queries
    (as ``trec_eval -c`` does). Run queries without judgments are ignored.
    """
    plain: list[str] = []
    mrr_depths: dict[str, int] = {}
    for measure in dict.fromkeys(measures):
        match = _CUTOFF.match(measure)
        if match and match["base"] == "recip_rank":
            mrr_depths[measure] = int(match["k"])
        else:
            plain.append(measure)
    grades = {q: {d: int(g) for d, g in docs.items()} for q, docs in qrels.items()}
    scores = {q: {d: float(s) for d, s in docs.items()} for q, docs in run.items()}

    out: dict[str, dict[str, float]] = {q: dict.fromkeys(measures, 0.0) for q in grades}
    if plain:
        evaluator = pytrec_eval.RelevanceEvaluator(grades, {_pytrec_name(m) for m in plain})
        results = evaluator.evaluate(scores)
        for measure in plain:
            if results and all(measure not in values for values in results.values()):
                raise SettingsError(
                    f"measure {measure!r} gives several values; name one cutoff, e.g. {measure}_10"
                )
        for qid, values in results.items():
            for measure in plain:
                out[qid][measure] = float(values.get(measure, 0.0))
    for measure, depth in mrr_depths.items():
        evaluator = pytrec_eval.RelevanceEvaluator(grades, {"recip_rank"})
        for qid, values in evaluator.evaluate(truncate(scores, depth)).items():
            out[qid][measure] = float(values["recip_rank"])
    return out


def mean(per_query: Mapping[str, Mapping[str, float]]) -> dict[str, float]:
    """Mean of each measure over the queries of ``per_query`` (empty if there are none)."""
    measures = dict.fromkeys(m for values in per_query.values() for m in values)
    return {
        m: math.fsum(values.get(m, 0.0) for values in per_query.values()) / len(per_query)
        for m in measures
    }


def write_run(run: Run, path: Path, tag: str = "sounding") -> None:
    """Write ``run`` as a TREC run file: ``qid Q0 docid rank score tag``.

    Ranks start at 1 and follow :func:`ranked` (score descending, ties by
    document id as trec_eval breaks them); queries are written in id order.
    """
    if not tag or any(c.isspace() for c in tag):
        raise SettingsError(f"run tag {tag!r} must be one word without spaces")
    lines: list[str] = []
    for qid in sorted(run):
        for rank, (docid, score) in enumerate(ranked(run[qid]), 1):
            lines.append(f"{qid} Q0 {docid} {rank} {float(score)!r} {tag}\n")
    Path(path).write_text("".join(lines), encoding="utf-8")


def read_run(path: Path) -> dict[str, dict[str, float]]:
    """Read a TREC run file (``qid Q0 docid rank score tag``); the rank column is ignored."""
    run: dict[str, dict[str, float]] = {}
    for number, line in _lines(path, "run"):
        fields = line.split()
        try:
            if len(fields) != 6:
                raise ValueError
            qid, _, docid, _, score, _ = fields
            value = float(score)
        except ValueError:
            raise SettingsError(
                f"{path}:{number}: expected 'qid Q0 docid rank score tag' (TREC run), "
                f"got {line[:80]!r}"
            ) from None
        docs = run.setdefault(qid, {})
        if docid in docs:
            raise SettingsError(f"{path}:{number}: document {docid} listed twice for query {qid}")
        docs[docid] = value
    return run


def run_from_rankings(
    query_ids: Iterable[str], rankings: Iterable[Iterable[tuple[str, float]]]
) -> dict[str, dict[str, float]]:
    """A run from query ids and, in the same order, their ranked ``(doc id, score)`` lists."""
    return {
        qid: {docid: float(score) for docid, score in ranking}
        for qid, ranking in zip(query_ids, rankings, strict=True)
    }
