"""Property: hidden documents change nothing a caller gets, from any endpoint, in any mode.

For seeded random corpora, an index holding extra documents the caller may not read must
answer exactly as an index without them: same documents and passages in the same order,
same scores (to 1e-6), same counts; only chunk ids, generation numbers, timings and
request ids may differ. Exact vector index, seeded fake encoder, in process.
"""

from __future__ import annotations

import json
import os
import sqlite3
import tempfile
from contextlib import ExitStack
from pathlib import Path
from typing import Any

import pytest
from hypothesis import HealthCheck, Phase, given, settings
from hypothesis import strategies as st
from sounding.indexer.build import refresh_index
from sounding.indexer.embedding import HashingEmbedder
from sounding.indexer.store import DATABASE
from sounding.service.settings import ServiceSettings

from tests.serving import Served, served_index, write_pages

VOCAB = ["pump", "valve", "gauge", "restart", "band", "salary", "log_file", "café", "weir"]
KEYS = [("plain", "read", "", False), ("ops", "read", "ops", False)]
IGNORED = {
    "chunk_id",
    "chunk_ids",
    "generation",
    "took_ms",
    "elapsed_ms",
    "indexed_at",
    "request_id",
}
MTIME = 1_700_000_000

words = st.lists(st.sampled_from(VOCAB), min_size=1, max_size=25)
visible_docs = st.lists(st.tuples(st.sampled_from([(), ("ops",)]), words), min_size=1, max_size=4)
hidden_docs = st.lists(
    st.tuples(st.sampled_from([("hr",), ("hr", "it")]), words), min_size=1, max_size=3
)


def _page(title: str, groups: tuple[str, ...], body: list[str]) -> str:
    front = f"---\ngroups: [{', '.join(groups)}]\n---\n" if groups else ""
    return f"{front}# {title}\n\n{' '.join(body)}.\n"


def _norm(value: Any) -> Any:
    if isinstance(value, dict):
        return {k: _norm(v) for k, v in sorted(value.items()) if k not in IGNORED}
    if isinstance(value, list):
        return [_norm(v) for v in value]
    return value


def _same(a: Any, b: Any, where: str) -> None:
    if isinstance(a, float) or isinstance(b, float):
        assert a == pytest.approx(b, abs=1e-6), where
    elif isinstance(a, dict):
        assert a.keys() == b.keys(), where
        for k in a:
            _same(a[k], b[k], f"{where}.{k}")
    elif isinstance(a, list):
        assert len(a) == len(b), where
        for i, (x, y) in enumerate(zip(a, b, strict=True)):
            _same(x, y, f"{where}[{i}]")
    else:
        assert a == b, where


def _answer(served: Served, who: str, method: str, path: str, body: Any = None) -> Any:
    r = served.client.request(method, path, json=body, headers=served.auth(who))
    text = r.text.replace(str(served.root), "ROOT")  # each index has its own folder
    return r.status_code, _norm(json.loads(text))


def _serve(stack: ExitStack, pages: dict[str, str]) -> Served:
    """Index and serve ``pages``, all with one modification time (a document's ``modified``)."""
    tmp = Path(stack.enter_context(tempfile.TemporaryDirectory()))
    settings = ServiceSettings(
        index_dir=tmp / "index", reload_check_seconds=0, vector_index="exact"
    )
    write_pages(tmp / "wiki", pages)
    for rel in pages:
        os.utime(tmp / "wiki" / rel, (MTIME, MTIME))
    refresh_index([tmp / "wiki"], settings, HashingEmbedder(32, seed=7))
    # served_index with no pages serves the index already in its folder.
    return stack.enter_context(
        served_index(tmp, {}, keys=KEYS, index_dir=settings.index_dir, vector_index="exact")
    )


def _requests(texts: list[str], ids: list[str]) -> list[tuple[str, str, Any]]:
    out: list[tuple[str, str, Any]] = []
    for text in texts:
        for mode in ("dense", "lexical", "hybrid"):
            out.append(("POST", "/search", {"query": text, "k": 20, "mode": mode}))
            out.append(("POST", "/context", {"query": text, "mode": mode, "budget": 400}))
        out.append(("POST", "/search", {"query": text, "max_per_document": 1}))
    for doc_id in ids:
        out.append(("GET", f"/documents/{doc_id}", None))
        out.append(("POST", "/feedback", {"query": "q", "document_id": doc_id, "grade": 2}))
    return out + [("GET", "/collections", None), ("GET", "/health", None)]


def _chunk_feedback(served: Served, who: str, chunk_id: int) -> Any:
    status, answer = _answer(
        served, who, "POST", "/feedback", {"query": "q", "chunk_id": chunk_id, "grade": 1}
    )
    if status == 404:  # the id is in the message; the rest must match
        answer["detail"] = answer["detail"].replace(str(chunk_id), "ID")
    return status, answer


def _hidden_chunk(served: Served) -> int:
    """A chunk of a hidden document (read behind the service's back)."""
    conn = sqlite3.connect(served.settings.index_dir / DATABASE)
    try:
        return int(
            conn.execute("SELECT min(id) FROM chunks WHERE document_id LIKE 's%'").fetchone()[0]
        )
    finally:
        conn.close()


@settings(
    max_examples=4,
    deadline=None,
    derandomize=True,  # seeded: the same corpora on every run
    suppress_health_check=[HealthCheck.too_slow],
    phases=[Phase.explicit, Phase.generate],  # no shrinking: each example builds two indexes
)
@pytest.mark.slow  # seconds each: the fast loop stays under a minute
@given(visible_docs, hidden_docs, st.lists(words, min_size=1, max_size=2))
def test_hidden_documents_change_no_answer(visible, hidden, queries) -> None:
    pages = {f"v{i}.md": _page(f"Visible {i}", g, w) for i, (g, w) in enumerate(visible)}
    secret = {f"s{i}.md": _page(f"Secret {i}", g, w) for i, (g, w) in enumerate(hidden)}
    texts = [" ".join(q[:6]) for q in queries]
    with ExitStack() as stack:
        with_hidden = _serve(stack, {**pages, **secret})
        without = _serve(stack, pages)
        for who in ("plain", "ops"):
            for method, path, body in _requests(texts, [*pages, *secret, "nowhere.md"]):
                a = _answer(with_hidden, who, method, path, body)
                b = _answer(without, who, method, path, body)
                _same(a, b, f"{who} {method} {path} {body}")
            # Feedback on the same visible passage, each by its own index's chunk id.
            hits = [
                _answer(s, who, "POST", "/search", {"query": texts[0], "mode": "lexical"})
                for s in (with_hidden, without)
            ]
            first = [
                s.client.post(
                    "/search", json={"query": texts[0], "k": 1}, headers=s.auth(who)
                ).json()["results"]
                for s in (with_hidden, without)
            ]
            _same(hits[0], hits[1], f"{who} passage")
            if first[0]:
                _same(
                    _chunk_feedback(with_hidden, who, first[0][0]["chunk_id"]),
                    _chunk_feedback(without, who, first[1][0]["chunk_id"]),
                    f"{who} passage feedback",
                )
            # A hidden chunk's id, against one no chunk has: the same 404.
            _same(
                _chunk_feedback(with_hidden, who, _hidden_chunk(with_hidden)),
                _chunk_feedback(without, who, 10**9),
                f"{who} hidden passage feedback",
            )
