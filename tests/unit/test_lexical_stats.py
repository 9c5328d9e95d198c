"""BM25 over several access classes is FTS5's bm25() over their union; the tables behind it.

Reference: SQLite FTS5 docs (fts5.html, "The bm25() function"): a single FTS5 table holding
every row the caller may read, scored by FTS5's own bm25(), is what the per-class scorer
must give. Real SQLite, no encoder.
"""

from __future__ import annotations

import json
import random
import sqlite3
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sounding.indexer.build import refresh_index
from sounding.indexer.check import check_index, repair_index
from sounding.indexer.embedding import HashingEmbedder
from sounding.indexer.errors import IndexMismatchError
from sounding.indexer.lexical import fts5_match
from sounding.indexer.settings import IndexSettings
from sounding.indexer.store import DATABASE, MANIFEST, IndexReader, IndexWriter, Manifest, lexstore
from sounding.indexer.store.bm25 import class_stats, fts5_tokens, score, varints

# Words with what unicode61 splits on ('_') or folds (diacritics), and stems alike.
VOCAB = ["pump", "pumps", "valve", "café", "cafe", "log_file", "log", "file", "gauge", "a_b"]


def _classes_db(docs: list[tuple[int, str, str]]) -> sqlite3.Connection:
    """An in-memory database with the lexical tables of (rowid, groups, body) rows, and a
    ``union_fts`` table of every row (the reference)."""
    conn = sqlite3.connect(":memory:")
    conn.execute("CREATE TABLE lexical_classes (id INTEGER PRIMARY KEY AUTOINCREMENT, groups TEXT)")
    conn.execute(
        f"CREATE VIRTUAL TABLE union_fts USING fts5(body, tokenize = '{lexstore.TOKENIZE}')"
    )
    for rowid, groups, body in docs:
        lexstore.add_chunks(conn, groups, [(rowid, body)])
        conn.execute("INSERT INTO union_fts (rowid, body) VALUES (?, ?)", [rowid, body])
    conn.commit()  # FTS5 writes its averages record when the transaction ends
    return conn


def _reference(conn: sqlite3.Connection, terms: list[str], k: int) -> dict[int, float]:
    rows = conn.execute(
        "SELECT rowid, -bm25(union_fts) FROM union_fts WHERE union_fts MATCH ? "
        "ORDER BY bm25(union_fts) LIMIT ?",
        [fts5_match(terms), k],
    ).fetchall()
    return {int(r[0]): float(r[1]) for r in rows}


def _scored(conn: sqlite3.Connection, terms: list[str], k: int) -> dict[int, float]:
    visible = [class_stats(conn, i, g) for i, g in lexstore.classes(conn).items()]
    scores, ids = score(conn, visible, [fts5_tokens(t) for t in terms], k)
    return dict(zip(ids.tolist(), scores.tolist(), strict=True))


corpora = st.lists(
    st.tuples(
        st.sampled_from(["[]", '["hr"]', '["ops"]', '["hr","ops"]']),
        st.lists(st.sampled_from(VOCAB), min_size=1, max_size=12),
    ),
    min_size=1,
    max_size=12,
)


@settings(max_examples=60, deadline=None)
@given(corpora, st.lists(st.sampled_from(VOCAB + ["absent"]), min_size=1, max_size=4))
def test_several_classes_score_as_one_fts5_table_of_their_union(corpus, terms) -> None:
    conn = _classes_db([(i + 1, g, " ".join(words)) for i, (g, words) in enumerate(corpus)])
    want, got = _reference(conn, terms, 100), _scored(conn, terms, 100)
    assert want.keys() == got.keys()
    for rowid, value in want.items():
        assert got[rowid] == pytest.approx(value, abs=1e-6)  # float32 of the same double


def test_statistics_come_from_fts5s_own_records() -> None:
    rng = random.Random(3)
    docs = [(i + 1, "[]", " ".join(rng.choices(VOCAB, k=rng.randint(1, 40)))) for i in range(300)]
    conn = _classes_db(docs)
    stats = class_stats(conn, 1, ())
    sizes = [varints(r[0])[0] for r in conn.execute("SELECT sz FROM lexical_1_docsize")]
    assert stats.rows == 300 == len(sizes) and stats.tokens == sum(sizes)
    # Varints past one byte: SQLite's record format (sqlite.org/fileformat2.html, "varint").
    assert varints(bytes([0x81, 0x00])) == [128] and varints(bytes([0xFF] * 8 + [0x01])) == [
        (2**56 - 1) << 8 | 1
    ]


def test_query_words_are_tokenised_as_fts5_does() -> None:
    # unicode61 splits on '_', folds case and diacritics (remove_diacritics 2); porter stems.
    assert fts5_tokens("Log_Files") == ("log", "file")
    assert fts5_tokens("Café") == ("cafe",)
    assert fts5_tokens("___") == ()


def _index(tmp: Path, pages: dict[str, str]) -> IndexSettings:
    root = tmp / "wiki"
    for rel, text in pages.items():
        (root / rel).parent.mkdir(parents=True, exist_ok=True)
        (root / rel).write_text(text)
    settings = IndexSettings(index_dir=tmp / "index", vector_index="exact")
    refresh_index([root], settings, HashingEmbedder(16, seed=1))
    return settings


PAGES = {
    "a.md": "# Pump\n\nRestart the pump slowly.\n",
    "b.md": "---\ngroups: [hr]\n---\n# Pay\n\nPump engineers earn band C.\n",
    "c.md": "# Valve\n\nThe valve beside the pump.\n",
}


def _lexical(index_dir: Path, terms: list[str], groups: frozenset[str] | None) -> dict:
    from sounding.indexer.selection import SearchFilter

    reader = IndexReader(index_dir)
    try:
        scores, ids = reader.bm25(terms, 10, SearchFilter(groups=groups))
        docs = reader.chunk_documents()
        return {docs[int(i)]: float(s) for s, i in zip(scores, ids, strict=True)}
    finally:
        reader.close()


def test_a_schema_2_index_is_upgraded_without_re_embedding(tmp_path: Path) -> None:
    settings = _index(tmp_path, PAGES)
    idx = settings.index_dir
    want = _lexical(idx, ["pump"], None)
    # Make it a schema-2 index: one FTS5 table of every chunk, no classes.
    conn = sqlite3.connect(idx / DATABASE)
    conn.execute(
        "CREATE VIRTUAL TABLE chunks_fts USING fts5(body, "
        "tokenize = 'porter unicode61 remove_diacritics 2')"
    )
    for _, rowid, body in lexstore.document_rows(conn, "1", []):
        conn.execute("INSERT INTO chunks_fts (rowid, body) VALUES (?, ?)", [rowid, body])
    for class_id in lexstore.classes(conn):
        lexstore.drop_class(conn, class_id)
    conn.commit()
    vectors = conn.execute("SELECT count(*) FROM chunks").fetchone()[0]
    conn.close()
    manifest = json.loads((idx / MANIFEST).read_text())
    manifest["schema_version"] = 2
    (idx / MANIFEST).write_text(json.dumps(manifest))
    with pytest.raises(IndexMismatchError, match="sounding check --repair"):
        Manifest.read(idx)
    assert not check_index(idx).ok
    report = repair_index(idx)
    assert report.ok, report.problems
    assert Manifest.read(idx).chunks == vectors
    assert _lexical(idx, ["pump"], None) == want
    conn = sqlite3.connect(idx / DATABASE)
    assert not conn.execute("SELECT 1 FROM sqlite_master WHERE name = 'chunks_fts'").fetchall()


def test_relabel_moves_rows_between_classes_and_check_sees_misplaced_rows(tmp_path) -> None:
    settings = _index(tmp_path, PAGES)
    idx = settings.index_dir
    assert _lexical(idx, ["engineers"], frozenset()) == {}
    model = Manifest.read(idx).model
    with IndexWriter(idx, model, settings.chunking) as writer:
        writer.relabel("b.md", (), ())
        writer.publish()
    assert set(_lexical(idx, ["engineers"], frozenset())) == {"b.md"}
    assert check_index(idx).ok
    conn = sqlite3.connect(idx / DATABASE)
    # Only one class is left (the hr one had no document any more and was dropped).
    assert [r[0] for r in conn.execute("SELECT groups FROM lexical_classes")] == ["[]"]
    # Damage: a row moved into a class its document is not in.
    conn.execute("UPDATE documents SET groups = '[\"hr\"]' WHERE id = 'b.md'")
    conn.commit()
    conn.close()
    report = check_index(idx)
    assert any("another access class" in p for p in report.problems), report.problems
    assert repair_index(idx).ok
    assert _lexical(idx, ["engineers"], frozenset()) == {}
    assert set(_lexical(idx, ["engineers"], frozenset({"hr"}))) == {"b.md"}


def test_one_class_is_fts5s_bm25_bit_for_bit(tmp_path: Path) -> None:
    # An index of one access class answers from FTS5's bm25() over its table, as before
    # the per-class tables: same scores, same order (the quality figures cannot move).
    settings = _index(tmp_path, {k: v for k, v in PAGES.items() if k != "b.md"})
    conn = sqlite3.connect(settings.index_dir / DATABASE)
    rows = conn.execute(
        "SELECT rowid, bm25(lexical_1) FROM lexical_1 WHERE lexical_1 MATCH ? "
        "ORDER BY bm25(lexical_1)",
        ['"pump" OR "valve"'],
    ).fetchall()
    reader = IndexReader(settings.index_dir)
    scores, ids = reader.bm25(["pump", "valve"], 10)
    assert ids.tolist() == [r[0] for r in rows]
    assert scores.tolist() == np.array([-r[1] for r in rows], dtype=np.float32).tolist()
