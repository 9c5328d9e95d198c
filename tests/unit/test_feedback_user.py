"""POST /feedback records the judgment under the key's name (finding 11).

A ``user`` in the body is accepted (older clients keep working) but ignored: otherwise one
key could stuff the test set with "users", since the export averages grades over users.
"""

from __future__ import annotations

import sqlite3
from pathlib import Path

from sounding.indexer.embedding import HashingEmbedder
from sounding.indexer.judgments import JudgmentStore

from tests.serving import served_index

PAGES = {"rota.md": "# Standby rota\n\nThe standby engineer carries the pager.\n"}


def test_the_judge_is_the_key_not_the_body(tmp_path: Path) -> None:
    with served_index(
        tmp_path, PAGES, embedder=HashingEmbedder(16), keys=[("ann", "read", "", False)]
    ) as served:
        for user, grade in (("ceo", 3), ("someone-else", 3), (None, 0)):
            body = {"query": "pager", "document_id": "rota.md", "grade": grade}
            if user is not None:
                body["user"] = user
            r = served.client.post("/feedback", json=body, headers=served.auth("ann"))
            assert r.status_code == 201, r.text
        conn = sqlite3.connect(served.settings.judgments_file)
        users = [row[0] for row in conn.execute("SELECT user FROM judgments ORDER BY id")]
        conn.close()
        assert users == ["ann", "ann", "ann"]
        assert r.json()["user"] == "ann"  # the answer says whom it was recorded under
        # One judge, so the pair's grade is ann's latest, not a mean over invented users.
        _, qrels = JudgmentStore(served.settings.judgments_file).qrels()
        assert [grades["rota.md"] for grades in qrels.values()] == [0]
