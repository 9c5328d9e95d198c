"""No side channel shows a restricted page: lexical scores, Server-Timing, the 404 path.

In process (FastAPI's TestClient), real SQLite and FAISS, seeded fake encoder.
"""

from __future__ import annotations

import inspect
import sqlite3
import sys
from collections.abc import Callable
from pathlib import Path
from types import FrameType
from typing import Any

import pytest
from fastapi import HTTPException
from sounding.indexer.build import refresh_index
from sounding.indexer.embedding import HashingEmbedder
from sounding.indexer.judgments import JudgmentStore
from sounding.indexer.selection import SearchFilter
from sounding.indexer.settings import IndexSettings
from sounding.indexer.store import IndexReader
from sounding.service.auth import Caller
from sounding.service.routes.documents import get_document
from sounding.service.routes.feedback import feedback
from sounding.service.schemas import FeedbackRequest
from sounding.service.settings import ServiceSettings

from tests.conftest import ServeIndex

PUBLIC = {
    "pump.md": "# Pump\n\nRestart the alpha pump slowly.\n",
    "valve.md": "# Valve\n\nThe valve sits beside the gauge.\n",
}
HIDDEN = {
    f"hr/h{i}.md": f"---\ngroups: [hr]\n---\n# Secret {i}\n\nalpha zulu band {i}.\n"
    for i in range(6)
}
KEYS = [("reader", "read", "", False), ("admin", "admin", "", False)]
REPO = str(Path(__file__).resolve().parents[2])


def _lexical(client: Any, key: str, query: str) -> list[tuple[str, float]]:
    r = client.post(
        "/search",
        json={"query": query, "mode": "lexical", "k": 10},
        headers={"Authorization": f"Bearer {key}"},
    )
    assert r.status_code == 200, r.text
    return [(h["document_id"], h["score"]) for h in r.json()["results"]]


def test_lexical_scores_do_not_count_hidden_chunks(serve_index: ServeIndex) -> None:
    # Finding 2: with statistics of the whole index, the hidden pages holding "alpha"
    # lowered its idf, and the score told how many there were.
    with_hidden = serve_index({**PUBLIC, **HIDDEN}, keys=KEYS)
    without = serve_index(PUBLIC, keys=KEYS)
    for query in ("alpha", "alpha pump", "zulu", "valve gauge"):
        a = _lexical(with_hidden.client, with_hidden.keys["reader"], query)
        b = _lexical(without.client, without.keys["reader"], query)
        assert [d for d, _ in a] == [d for d, _ in b], query
        assert [s for _, s in a] == pytest.approx([s for _, s in b], abs=1e-6), query


def test_server_timing_goes_to_admin_keys_only(serve_index: ServeIndex) -> None:
    # Finding 3: the lexical stage's time told whether a word was in hidden pages.
    served = serve_index({**PUBLIC, **HIDDEN}, keys=KEYS)
    body = {"query": "zulu", "mode": "lexical"}
    r = served.client.post("/search", json=body, headers=served.auth("reader"))
    assert r.status_code == 200 and "server-timing" not in r.headers
    r = served.client.post("/search", json=body, headers=served.auth("admin"))
    assert "lexical;dur=" in r.headers["server-timing"]
    opted_in = serve_index(PUBLIC, keys=KEYS, timing_header=True)
    r = opted_in.client.post("/search", json=body, headers=opted_in.auth("reader"))
    assert "lexical;dur=" in r.headers["server-timing"]


@pytest.fixture(scope="module")
def index(tmp_path_factory: pytest.TempPathFactory) -> Path:
    tmp = tmp_path_factory.mktemp("channels")
    for rel, text in {**PUBLIC, **HIDDEN}.items():
        (tmp / "wiki" / rel).parent.mkdir(parents=True, exist_ok=True)
        (tmp / "wiki" / rel).write_text(text)
    settings = IndexSettings(index_dir=tmp / "index")
    refresh_index([tmp / "wiki"], settings, HashingEmbedder(32, seed=7))
    return settings.index_dir


def test_a_lexical_search_reads_only_the_callers_tables(index: Path) -> None:
    # The work does not grow with hidden postings: no statement touches a hidden class.
    reader = IndexReader(index)
    with reader._connection() as conn:
        hidden = [
            f"lexical_{r[0]}"
            for r in conn.execute("SELECT id FROM lexical_classes WHERE groups != '[]'")
        ]
        # The classes' sizes are read once per generation (one row each); then the work
        # of a query is the caller's tables only.
        reader.bm25(["valve"], 10, SearchFilter(groups=frozenset()))
        statements: list[str] = []
        conn.set_trace_callback(statements.append)
        try:
            reader.bm25(["zulu", "alpha"], 10, SearchFilter(groups=frozenset()))
        finally:
            conn.set_trace_callback(None)
    assert hidden and statements
    assert not [s for s in statements for h in hidden if h in s], statements
    reader.close()


def _path(call: Callable[[], object]) -> tuple[list[tuple[str, str]], str]:
    """The project's functions ``call`` runs, in order, and the 404's detail it raises."""
    seen: list[tuple[str, str]] = []

    def profile(frame: FrameType, event: str, arg: object) -> None:
        if event == "call" and frame.f_code.co_filename.startswith(REPO):
            seen.append((Path(frame.f_code.co_filename).name, frame.f_code.co_name))

    sys.setprofile(profile)
    try:
        call()
    except HTTPException as exc:
        detail = (exc.status_code, str(exc.detail))
    else:
        raise AssertionError("no 404")
    finally:
        sys.setprofile(None)
    return seen, f"{detail}"


def test_hidden_and_unknown_ids_take_one_path(index: Path, tmp_path: Path) -> None:
    reader = IndexReader(index)
    judgments = JudgmentStore(tmp_path / "judgments.db")
    caller = Caller(name="reader", scope="read", groups=frozenset(), key_id="k1")
    # The route's other dependencies, as FastAPI would give them (defaults for the rest).
    wanted = inspect.signature(get_document).parameters
    extra: dict[str, Any] = (
        {"settings": ServiceSettings(index_dir=index)} if "settings" in wanted else {}
    )
    extra.update(
        {n: p.default for n, p in wanted.items() if n not in extra and p.default is not p.empty}
    )
    conn = sqlite3.connect(index / "sounding.db")
    hidden_chunk = conn.execute(
        "SELECT min(id) FROM chunks WHERE document_id LIKE 'hr/%'"
    ).fetchone()[0]
    unknown_chunk = conn.execute("SELECT max(id) + 1000 FROM chunks").fetchone()[0]
    conn.close()
    cases: list[tuple[Callable[[str], object], str, str]] = [
        (lambda d: get_document(d, reader, caller, **extra), "hr/h0.md", "hr/h9.md"),
        (
            lambda d: feedback(
                FeedbackRequest(query="q", document_id=d, grade=1), reader, judgments, caller
            ),
            "hr/h0.md",
            "hr/h9.md",
        ),
        (
            lambda c: feedback(
                FeedbackRequest(query="q", chunk_id=int(c), grade=1), reader, judgments, caller
            ),
            str(hidden_chunk),
            str(unknown_chunk),
        ),
    ]
    for run, hidden, unknown in cases:
        _path(lambda r=run, u=unknown: r(u))  # warm caches alike
        hidden_path, hidden_404 = _path(lambda r=run, h=hidden: r(h))
        unknown_path, unknown_404 = _path(lambda r=run, u=unknown: r(u))
        assert hidden_path == unknown_path
        assert hidden_404.replace(hidden, "ID") == unknown_404.replace(unknown, "ID")
    judgments.close()
    reader.close()
