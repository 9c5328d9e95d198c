"""Relevance judgments collected from use, and their export as a test set.

Judgments live in their own SQLite file (``judgments.db`` in the index
folder by default), apart from the index, so rebuilding an index never
loses them. ``export`` writes BEIR-layout ``queries.jsonl`` and
``qrels.tsv``, which ``sounding eval`` reads.
"""

from __future__ import annotations

import hashlib
import json
import time
from dataclasses import dataclass
from pathlib import Path

from .errors import SettingsError
from .store import open_side_database
from .store.modes import FOLDER_MODE, open_owner_only

FILENAME = "judgments.db"
GRADES = range(0, 4)  # 0 not relevant … 3 perfectly relevant (TREC-style graded judgments)

_SCHEMA = """
CREATE TABLE IF NOT EXISTS judgments (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    query_id TEXT NOT NULL,
    query TEXT NOT NULL,
    document_id TEXT NOT NULL,
    chunk_id INTEGER,
    grade INTEGER NOT NULL CHECK (grade BETWEEN 0 AND 3),
    user TEXT,
    created_at REAL NOT NULL
);
CREATE INDEX IF NOT EXISTS judgments_pair ON judgments(query_id, document_id);
"""


def normalise_query(text: str) -> str:
    """The form under which two typings of one question count as the same query."""
    return " ".join(text.lower().split())


def query_id(text: str) -> str:
    """A stable id for a query: equal after normalising means equal id."""
    return "q" + hashlib.sha256(normalise_query(text).encode()).hexdigest()[:12]


@dataclass(frozen=True)
class Judgment:
    id: int
    query_id: str
    query: str
    document_id: str
    chunk_id: int | None
    grade: int
    user: str | None
    created_at: float


class JudgmentStore:
    """Append-only log of (query, document, grade) judgments."""

    def __init__(self, path: Path) -> None:
        self.path = Path(path)
        self.conn = open_side_database(self.path, _SCHEMA, "judgments file")

    def close(self) -> None:
        self.conn.close()

    def record(
        self,
        query: str,
        document_id: str,
        grade: int,
        *,
        chunk_id: int | None = None,
        user: str | None = None,
    ) -> Judgment:
        """Store one judgment and return it."""
        if grade not in GRADES:
            raise SettingsError(f"grade={grade} must be 0, 1, 2 or 3")
        if not normalise_query(query):
            raise SettingsError("the judged query is empty")
        qid, now = query_id(query), time.time()
        cur = self.conn.execute(
            "INSERT INTO judgments (query_id, query, document_id, chunk_id, grade, user, "
            "created_at) VALUES (?, ?, ?, ?, ?, ?, ?)",
            [qid, query.strip(), document_id, chunk_id, grade, user, now],
        )
        row_id = cur.lastrowid
        assert row_id is not None  # every INSERT sets it
        return Judgment(row_id, qid, query.strip(), document_id, chunk_id, grade, user, now)

    def count(self) -> int:
        return int(self.conn.execute("SELECT count(*) FROM judgments").fetchone()[0])

    def qrels(self) -> tuple[dict[str, str], dict[str, dict[str, int]]]:
        """(queries, qrels): for each (query, document) pair the latest grade of each
        user, and the pair's grade is the mean of those, rounded half up."""
        rows = self.conn.execute(
            "SELECT query_id, query, document_id, coalesce(user, ''), grade FROM judgments "
            "ORDER BY id"
        ).fetchall()
        queries: dict[str, str] = {}
        latest: dict[tuple[str, str, str], int] = {}
        for qid, text, doc, user, grade in rows:
            queries.setdefault(qid, text)
            latest[(qid, doc, user)] = grade
        pairs: dict[tuple[str, str], list[int]] = {}
        for (qid, doc, _), grade in latest.items():
            pairs.setdefault((qid, doc), []).append(grade)
        qrels: dict[str, dict[str, int]] = {}
        for (qid, doc), grades in pairs.items():
            qrels.setdefault(qid, {})[doc] = int(sum(grades) / len(grades) + 0.5)
        return queries, qrels

    def export(self, out_dir: Path) -> tuple[int, int]:
        """Write ``queries.jsonl`` and ``qrels.tsv`` (BEIR layout) into ``out_dir``.

        Returns (queries, judged pairs). Raises SettingsError when there is nothing to export.
        """
        queries, qrels = self.qrels()
        if not qrels:
            raise SettingsError(f"no judgments in {self.path} yet; send some with POST /feedback")
        out_dir = Path(out_dir)
        # People's queries and restricted ids: owner-only files; a folder made here is
        # owner-only too (an existing one is the user's and keeps its mode).
        out_dir.mkdir(parents=True, exist_ok=True, mode=FOLDER_MODE)
        with open(open_owner_only(out_dir / "queries.jsonl"), "w", encoding="utf-8") as fh:
            for qid in sorted(qrels):
                fh.write(json.dumps({"_id": qid, "text": queries[qid]}, ensure_ascii=False) + "\n")
        with open(open_owner_only(out_dir / "qrels.tsv"), "w", encoding="utf-8") as fh:
            fh.write("query-id\tcorpus-id\tscore\n")
            for qid in sorted(qrels):
                for doc, grade in sorted(qrels[qid].items()):
                    fh.write(f"{qid}\t{doc}\t{grade}\n")
        return len(qrels), sum(len(d) for d in qrels.values())
