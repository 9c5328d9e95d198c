"""Who may push or delete is decided under the index lock, and a push never waits forever.

In process (FastAPI's TestClient), real SQLite and FAISS, seeded fake encoder. The race of
finding 4 is made deterministic: the test holds the index lock, lets the PUT reach its wait
for it, restricts the page with a direct writer (what a folder run does), then lets go.
"""

from __future__ import annotations

import threading
from collections.abc import Iterator
from pathlib import Path

import httpx
import pytest
from sounding.indexer.embedding import HashingEmbedder, describe
from sounding.indexer.errors import IndexLockedError
from sounding.indexer.lock import IndexLock
from sounding.indexer.store import IndexWriter

from tests.serving import Served, served_index

PUMP = "runbooks/pump.md"
SECRET = "hr/bands.md"
MARKER = "quillwort"
PAGES = {
    PUMP: f"# Pump\n\nOpen the {MARKER} valve slowly.\n",
    SECRET: "---\ngroups: [hr]\n---\n# Bands\n\nBand C pays well.\n",
}
KEYS = [
    ("writer", "write", "", False),
    ("hr", "read", "hr", False),
    ("hr-writer", "write", "hr", False),
]


@pytest.fixture
def served(tmp_path: Path) -> Iterator[Served]:
    with served_index(
        tmp_path, PAGES, embedder=HashingEmbedder(32, seed=3), keys=KEYS, push_wait_seconds=20
    ) as s:
        yield s


def _in_thread(call) -> tuple[threading.Thread, list[httpx.Response]]:
    out: list[httpx.Response] = []
    thread = threading.Thread(target=lambda: out.append(call()), daemon=True)
    thread.start()
    return thread, out


def test_a_page_restricted_while_a_push_waits_for_the_lock_is_not_overwritten(
    served: Served, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Finding 4: the pusher's right is decided from the page as it is under the lock."""
    client, settings = served.client, served.settings
    waiting = threading.Event()
    real_acquire = IndexLock.acquire

    def acquire(self: IndexLock) -> IndexLock:
        try:
            return real_acquire(self)
        except IndexLockedError:
            waiting.set()  # the push has passed every check it makes before the lock
            raise

    held = IndexLock(settings.index_dir).acquire()
    try:
        monkeypatch.setattr(IndexLock, "acquire", acquire)
        thread, answer = _in_thread(
            lambda: client.put(
                f"/documents/{PUMP}",
                json={"text": "# Pump\n\nwriter text\n", "collection": "wiki"},
                headers=served.auth("writer"),
            )
        )
        assert waiting.wait(20), "the push never reached the index lock"
        # A folder run restricts the page to hr while the push waits.
        with IndexWriter(
            settings.index_dir, describe(served.embedder), settings.chunking
        ) as writer:
            writer.relabel(PUMP, ("hr",), ())
            writer.publish()
    finally:
        held.release()
    thread.join(30)
    assert not thread.is_alive()
    [r] = answer
    assert r.status_code == 404, r.text
    assert r.json() == {"detail": f"no document with id {PUMP!r} in the index"}
    doc = client.get(f"/documents/{PUMP}", headers=served.auth("hr")).json()
    assert doc["groups"] == ["hr"] and MARKER in doc["chunks"][0]["text"]
    assert client.get(f"/documents/{PUMP}", headers=served.auth("writer")).status_code == 404


def test_a_delete_of_a_page_restricted_while_it_waits_is_refused(
    served: Served, monkeypatch: pytest.MonkeyPatch
) -> None:
    client, settings = served.client, served.settings
    waiting = threading.Event()
    real_acquire = IndexLock.acquire

    def acquire(self: IndexLock) -> IndexLock:
        try:
            return real_acquire(self)
        except IndexLockedError:
            waiting.set()
            raise

    held = IndexLock(settings.index_dir).acquire()
    try:
        monkeypatch.setattr(IndexLock, "acquire", acquire)
        thread, answer = _in_thread(
            lambda: client.delete(f"/documents/{PUMP}", headers=served.auth("writer"))
        )
        assert waiting.wait(20)
        with IndexWriter(
            settings.index_dir, describe(served.embedder), settings.chunking
        ) as writer:
            writer.relabel(PUMP, ("hr",), ())
            writer.publish()
    finally:
        held.release()
    thread.join(30)
    [r] = answer
    assert r.status_code == 404
    assert r.json() == {"detail": f"no document with id {PUMP!r} in the index"}
    assert client.get(f"/documents/{PUMP}", headers=served.auth("hr")).status_code == 200


def test_a_push_the_writer_could_not_read_is_refused_the_same_for_new_and_hidden_ids(
    served: Served,
) -> None:
    """Related issue: a write key in no group could push an hr page it then could not touch.

    The refusal (403, naming the groups) is decided from the request alone, so an id held by
    a hidden page gets exactly the answer an unknown id gets.
    """
    client = served.client
    body = {"text": "# Mine\n\nmine\n", "groups": ["hr"]}
    new = client.put("/documents/api/new.md", json=body, headers=served.auth("writer"))
    hidden = client.put(f"/documents/{SECRET}", json=body, headers=served.auth("writer"))
    assert new.status_code == 403 and "groups" in new.json()["detail"]
    assert "hr" in new.json()["detail"]
    assert (hidden.status_code, hidden.json()) == (new.status_code, new.json())
    assert client.get("/documents/api/new.md", headers=served.auth("hr")).status_code == 404
    assert "Band C" in client.get(f"/documents/{SECRET}", headers=served.auth("hr")).text
    # A key of the group may push it, and update and delete it afterwards.
    ok = client.put("/documents/api/new.md", json=body, headers=served.auth("hr-writer"))
    assert ok.status_code == 200 and ok.json()["action"] == "added"
    again = {"text": "# Mine\n\nmine, again\n", "groups": ["hr"]}
    ok = client.put("/documents/api/new.md", json=again, headers=served.auth("hr-writer"))
    assert ok.status_code == 200 and ok.json()["action"] == "updated"
    gone = client.delete("/documents/api/new.md", headers=served.auth("hr-writer"))
    assert gone.status_code == 200 and gone.json()["action"] == "removed"


def test_hidden_ids_answer_as_unknown_ones_for_delete_and_replace(served: Served) -> None:
    client, w = served.client, served.auth("writer")
    unknown = "hr/nothing.md"
    assert client.delete(f"/documents/{SECRET}", headers=w).json()["detail"].replace(
        SECRET, "X"
    ) == client.delete(f"/documents/{unknown}", headers=w).json()["detail"].replace(unknown, "X")
    # Unrestricted text over a hidden page, in another collection too: the 404 of an
    # unknown id, never the 409 that would name the hidden page's collection.
    for extra in ({}, {"collection": "wiki"}):
        r = client.put(f"/documents/{SECRET}", json={"text": "# T\n\nt\n", **extra}, headers=w)
        assert r.status_code == 404
        assert r.json() == {"detail": f"no document with id {SECRET!r} in the index"}
    assert "Band C" in client.get(f"/documents/{SECRET}", headers=served.auth("hr")).text


def test_a_second_push_waits_at_most_push_wait_seconds_for_the_first(tmp_path: Path) -> None:
    """Finding 6: the in-process push lock honours push_wait_seconds (503 + Retry-After)."""
    from sounding.service.routes import documents

    with served_index(
        tmp_path,
        PAGES,
        embedder=HashingEmbedder(32, seed=3),
        keys=KEYS[:1],
        push_wait_seconds=0.3,
    ) as served:
        assert documents._push_lock.acquire(timeout=5)  # a first push, still embedding
        try:
            thread, answer = _in_thread(
                lambda: served.client.put(
                    "/documents/api/second.md",
                    json={"text": "# Second\n\nsecond\n"},
                    headers=served.auth("writer"),
                )
            )
            thread.join(10)
            waited_forever = thread.is_alive()
        finally:
            documents._push_lock.release()
        thread.join(30)
        assert not waited_forever, "the second push was still waiting after 10 s"
        [r] = answer
        assert r.status_code == 503 and r.headers["retry-after"].isdigit()
        assert "push_wait_seconds" in r.json()["detail"]
        # Once the first is done, pushes go through again.
        r = served.client.put(
            "/documents/api/second.md",
            json={"text": "# Second\n\nsecond\n"},
            headers=served.auth("writer"),
        )
        assert r.status_code == 200
