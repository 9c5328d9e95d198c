"""Per-document access groups, folder rules, search filters, pushed documents."""

from __future__ import annotations

import itertools
from pathlib import Path

import numpy as np
import pytest
from sounding.indexer.access import AccessRules, may_read, parse_groups, parse_tags
from sounding.indexer.build import delete_document, push_document, refresh_index
from sounding.indexer.embedding import HashingEmbedder
from sounding.indexer.errors import IndexLockedError, LoadError, SettingsError
from sounding.indexer.loaders import parse_document
from sounding.indexer.lock import IndexLock
from sounding.indexer.search import MODES, Searcher, SearchFilter
from sounding.indexer.settings import IndexSettings
from sounding.indexer.store import IndexReader

PAGES = {
    "hr/salaries.md": "---\ntags: [Pay, hr]\n---\n# Salary bands\n\nPump engineers earn band C.\n",
    "hr/leave.md": "# Annual leave\n\nPump engineers take 25 days of leave.\n",
    "ops/pump.md": "---\ntags: [runbook]\n---\n# Pump restart\n\nRestart the pump slowly.\n",
    "ops/secret.md": "---\ngroups: [security]\n---\n# Pump alarm codes\n\nThe pump code is 4471.\n",
    "public.txt": "Pump open day\n\nVisitors may see the pump house on Sundays.\n",
}
RULES = {
    "restrict": [
        {"under": "hr/", "groups": ["hr"]},
        {"under": "hr/leave", "groups": ["hr", "staff"]},
    ]
}


def write(root: Path, pages: dict[str, str]) -> None:
    for rel, text in pages.items():
        (root / rel).parent.mkdir(parents=True, exist_ok=True)
        (root / rel).write_text(text)


@pytest.fixture()
def wiki(tmp_path: Path) -> tuple[Path, IndexSettings, HashingEmbedder]:
    root = tmp_path / "wiki"
    write(root, PAGES)
    rules = tmp_path / "rules.yaml"
    rules.write_text(
        "restrict:\n  - under: hr/\n    groups: [hr]\n"
        "  - under: hr/leave\n    groups: [hr, staff]\n"
    )
    settings = IndexSettings(index_dir=tmp_path / "index", access_rules=rules)
    embedder = HashingEmbedder(32, seed=3)
    refresh_index([root], settings, embedder)
    return root, settings, embedder


# -- pure parts -----------------------------------------------------------------


@pytest.mark.parametrize(
    ("value", "expected"),
    [
        (None, ()),
        ([], ()),
        ("hr", ("hr",)),
        ("hr, finance", ("finance", "hr")),
        (["b", "a", "b"], ("a", "b")),
        (["ops.team-1"], ("ops.team-1",)),
    ],
)
def test_groups_parse_to_sorted_unique_names(value: object, expected: tuple[str, ...]) -> None:
    assert parse_groups(value, "x") == expected


@pytest.mark.parametrize(
    "value", [["../hr"], ["a b"], ["-x"], [""], [None], [{"a": 1}], 3.5, ["x" * 65], ["hr;drop"]]
)
def test_invalid_groups_are_refused_with_the_value(value: object) -> None:
    with pytest.raises(ValueError, match="group|groups must"):
        parse_groups(value, "front matter")


@pytest.mark.parametrize(
    ("value", "expected"),
    [(None, ()), ("A, b", ("a", "b")), (["Pay", "pay", " x "], ("pay", "x")), ("", ())],
)
def test_tags_are_normalised(value: object, expected: tuple[str, ...]) -> None:
    assert parse_tags(value) == expected


@pytest.mark.parametrize(
    ("doc_groups", "caller", "allowed"),
    [
        ((), None, True),
        ((), frozenset(), True),
        (("hr",), None, True),  # unrestricted caller: CLI, evaluation
        (("hr",), frozenset(), False),
        (("hr",), frozenset({"ops"}), False),
        (("hr", "ops"), frozenset({"ops"}), True),
    ],
)
def test_may_read(
    doc_groups: tuple[str, ...], caller: frozenset[str] | None, allowed: bool
) -> None:
    assert may_read(doc_groups, caller) is allowed


@pytest.mark.parametrize(
    ("collection", "doc_id", "metadata", "expected"),
    [
        ("wiki", "ops/pump.md", {}, ()),
        ("wiki", "hr/pay.md", {}, ("hr",)),
        ("wiki", "hr/leave.md", {}, ("hr", "staff")),  # the last matching rule wins
        ("wiki", "hr/pay.md", {"groups": ["board"]}, ("board",)),  # front matter wins
        ("wiki", "hrx.md", {}, ()),
        ("other", "fin/a.md", {}, ()),
        ("books", "fin/a.md", {}, ("finance",)),
    ],
)
def test_rules_and_front_matter_decide_groups(
    collection: str, doc_id: str, metadata: dict, expected: tuple[str, ...]
) -> None:
    rules = AccessRules.from_data(
        {
            "restrict": [
                *RULES["restrict"],
                {"under": "fin/", "collection": "books", "groups": ["finance"]},
            ]
        }
    )
    assert rules.groups_for(collection, doc_id, metadata) == expected


def test_invalid_front_matter_groups_fail_closed() -> None:
    with pytest.raises(LoadError, match="not indexed"):
        AccessRules().groups_for("wiki", "a.md", {"groups": ["no spaces allowed"]})


@pytest.mark.parametrize(
    "data",
    [
        ["under"],
        {"rules": []},
        {"restrict": {"under": "x"}},
        {"restrict": [{"under": 1}]},
        {"restrict": [{"under": "x", "groups": []}]},
        {"restrict": [{"under": "x", "groups": ["a"], "extra": 1}]},
        {"restrict": [{"under": "x", "groups": ["bad name"]}]},
    ],
)
def test_bad_rules_are_a_settings_error(data: object) -> None:
    with pytest.raises(SettingsError):
        AccessRules.from_data(data)


def test_unreadable_rules_file_is_one_line(tmp_path: Path) -> None:
    bad = tmp_path / "r.yaml"
    bad.write_text("restrict: [\n")
    with pytest.raises(SettingsError, match="not valid YAML"):
        AccessRules.load(bad)
    with pytest.raises(SettingsError, match="cannot read"):
        AccessRules.load(tmp_path / "missing.yaml")


# -- the index and the searcher ----------------------------------------------------


def test_documents_carry_groups_and_tags(wiki) -> None:
    _, settings, embedder = wiki
    reader = IndexReader(settings.index_dir)
    docs = reader.documents(PAGES)
    assert docs["hr/salaries.md"].groups == ("hr",)
    assert docs["hr/salaries.md"].tags == ("hr", "pay")
    assert docs["hr/leave.md"].groups == ("hr", "staff")
    assert docs["ops/secret.md"].groups == ("security",)
    assert docs["ops/pump.md"].groups == () and docs["public.txt"].groups == ()
    assert reader.restricted


CALLERS = [
    None,
    frozenset(),
    frozenset({"hr"}),
    frozenset({"staff"}),
    frozenset({"security", "staff"}),
    frozenset({"nobody"}),
]


@pytest.mark.parametrize(("groups", "mode"), list(itertools.product(CALLERS, MODES)))
def test_search_never_returns_what_the_caller_may_not_read(wiki, groups, mode) -> None:
    _, settings, embedder = wiki
    reader = IndexReader(settings.index_dir)
    searcher = Searcher(reader, embedder)
    where = SearchFilter(groups=groups)
    readable = {d for d, rec in reader.documents(PAGES).items() if may_read(rec.groups, groups)}
    hits = searcher.search("pump engineers leave code band", 20, mode=mode, where=where)
    got = {h.document_id for h in hits}
    assert got <= readable
    if mode != "lexical":  # dense ranks every admitted chunk: the filter is before the cut
        assert got == readable
    # Counts and collections only count what the caller may read.
    assert reader.visible_counts(where)[0] == len(readable)
    assert sum(n for _, n in reader.collections(where)) == len(readable)


def test_filter_applies_before_the_top_k_cut(tmp_path: Path) -> None:
    """Many restricted near-duplicates must not crowd out the one readable answer."""
    root = tmp_path / "w"
    pages = {
        f"hr/p{i}.md": "---\ngroups: [hr]\n---\n# Pump\n\npump pump pump valve\n" for i in range(60)
    }
    pages["open.md"] = "# Pump\n\npump valve\n"
    write(root, pages)
    settings = IndexSettings(index_dir=tmp_path / "i")
    embedder = HashingEmbedder(32, seed=5)
    refresh_index([root], settings, embedder)
    searcher = Searcher(IndexReader(settings.index_dir), embedder)
    for mode in MODES:
        hits = searcher.search("pump valve", 1, mode=mode, where=SearchFilter(groups=frozenset()))
        assert [h.document_id for h in hits] == ["open.md"], mode


@pytest.mark.parametrize(
    ("where", "expected"),
    [
        (SearchFilter(tags=("runbook",)), {"ops/pump.md"}),
        (SearchFilter(tags=("PAY", "runbook")), {"ops/pump.md", "hr/salaries.md"}),
        (SearchFilter(source_prefix="hr/"), {"hr/salaries.md", "hr/leave.md"}),
        (SearchFilter(source_prefix="HR/"), set()),  # exact, case-sensitive prefix
        (SearchFilter(collections=("wiki",)), set(PAGES)),
        (SearchFilter(collections=("nope",)), set()),
        (SearchFilter(groups=frozenset({"hr"}), source_prefix="ops/"), {"ops/pump.md"}),
        (SearchFilter(modified_after=4e9), set()),
        (SearchFilter(modified_after=0), set(PAGES)),
    ],
)
def test_filters(wiki, where: SearchFilter, expected: set[str]) -> None:
    _, settings, embedder = wiki
    reader = IndexReader(settings.index_dir)
    searcher = Searcher(reader, embedder)
    for mode in ("dense", "hybrid"):
        hits = searcher.search("pump", 20, mode=mode, where=where)
        assert {h.document_id for h in hits} == expected
    # The SQL condition and the Python check agree on every document.
    docs = reader.documents(PAGES).values()
    assert {d.id for d in docs if where.admits(d)} == expected


def test_source_prefix_matches_the_source_path_too(wiki) -> None:
    root, settings, embedder = wiki
    searcher = Searcher(IndexReader(settings.index_dir), embedder)
    hits = searcher.search(
        "pump", 20, mode="dense", where=SearchFilter(source_prefix=str(root / "ops"))
    )
    assert {h.document_id for h in hits} == {"ops/pump.md", "ops/secret.md"}


def test_dense_filter_equals_brute_force_over_the_admitted_chunks(wiki) -> None:
    _, settings, embedder = wiki
    reader = IndexReader(settings.index_dir)
    where = SearchFilter(groups=frozenset({"staff"}))
    allowed = reader.allowed_chunks(where)
    assert allowed is not None and len(allowed)
    q = embedder.encode(["pump leave"])
    D, I = reader.nearest(q, 3, selector=reader.selector(where))
    ids, matrix = reader.chunk_vectors(allowed.tolist())
    assert sorted(ids.tolist()) == allowed.tolist()
    order_by_id = np.argsort(ids, kind="stable")  # the admitted ids' order, as before
    ids, matrix = ids[order_by_id].tolist(), matrix[order_by_id]
    scores = matrix @ q[0]
    order = np.argsort(-scores, kind="stable")[:3]
    assert list(I[0][: len(order)]) == [ids[i] for i in order]
    np.testing.assert_allclose(D[0][: len(order)], scores[order], rtol=1e-5)


def test_unrestricted_filter_costs_nothing(wiki) -> None:
    _, settings, _ = wiki
    reader = IndexReader(settings.index_dir)
    assert reader.allowed_chunks(SearchFilter()) is None
    assert reader.allowed_chunks(None) is None


def test_changed_rules_relabel_without_re_embedding(wiki, tmp_path: Path) -> None:
    root, settings, _ = wiki
    rules = tmp_path / "rules2.yaml"
    rules.write_text("restrict:\n  - under: ops/\n    groups: [ops]\n")
    counting = HashingEmbedder(32, seed=3)
    report = refresh_index([root], settings.model_copy(update={"access_rules": rules}), counting)
    assert counting.texts_encoded == 0
    assert set(report.updated) == {"hr/salaries.md", "hr/leave.md", "ops/pump.md"}
    docs = IndexReader(settings.index_dir).documents(PAGES)
    assert docs["hr/salaries.md"].groups == ()
    assert docs["ops/pump.md"].groups == ("ops",)
    assert docs["ops/secret.md"].groups == ("security",)  # front matter still wins


def test_bad_groups_skip_the_file_with_a_reason(tmp_path: Path) -> None:
    root = tmp_path / "w"
    write(root, {"a.md": "---\ngroups: [not ok]\n---\n# A\n\ntext\n", "b.md": "# B\n\nbody\n"})
    report = refresh_index([root], IndexSettings(index_dir=tmp_path / "i"), HashingEmbedder(8))
    assert [s.path for s in report.skipped] == ["a.md"]
    assert "not a valid group name" in report.skipped[0].reason
    assert report.added == ["b.md"]


# -- pushed documents --------------------------------------------------------------------


def _doc(doc_id: str, text: str, kind: str = "markdown"):
    return parse_document(
        text.encode(), kind, doc_id=doc_id, name=doc_id, source=f"api:{doc_id}", modified=1.7e9
    )


def test_push_then_delete(wiki) -> None:
    _, settings, embedder = wiki
    before = IndexReader(settings.index_dir).generation
    r = push_document(
        settings,
        embedder,
        _doc("api/new.md", "# Sluice\n\nSluice gate notes.\n"),
        "api",
        tags=("gates",),
    )
    assert r.action == "added" and r.generation == before + 1 and r.chunks_embedded == r.chunks
    reader = IndexReader(settings.index_dir)
    hits = Searcher(reader, embedder).search("sluice gate", 1, mode="lexical")
    assert hits[0].document_id == "api/new.md"
    assert reader.document("api/new.md").tags == ("gates",)
    again = push_document(
        settings,
        embedder,
        _doc("api/new.md", "# Sluice\n\nSluice gate notes.\n"),
        "api",
        tags=("gates",),
    )
    assert again.action == "unchanged" and again.generation == r.generation
    relabel = push_document(
        settings,
        embedder,
        _doc("api/new.md", "# Sluice\n\nSluice gate notes.\n"),
        "api",
        groups=("ops",),
        tags=("gates",),
    )
    assert relabel.action == "updated" and relabel.chunks_embedded == 0
    assert IndexReader(settings.index_dir).document("api/new.md").groups == ("ops",)
    gone = delete_document(settings, embedder, "api/new.md")
    assert gone is not None and gone.action == "removed"
    assert IndexReader(settings.index_dir).document("api/new.md") is None
    assert delete_document(settings, embedder, "api/new.md") is None


def test_push_into_another_collection_is_refused(wiki) -> None:
    _, settings, embedder = wiki
    with pytest.raises(SettingsError, match="belongs to collection 'wiki'"):
        push_document(settings, embedder, _doc("ops/pump.md", "# x\n\ny\n"), "api")


def test_push_waits_for_the_lock_then_gives_up(wiki) -> None:
    _, settings, embedder = wiki
    with IndexLock(settings.index_dir), pytest.raises(IndexLockedError):
        push_document(settings, embedder, _doc("api/x.md", "# x\n\ny\n"), "api", wait_seconds=0.2)
    assert IndexReader(settings.index_dir).document("api/x.md") is None


@pytest.mark.parametrize(("kind", "data"), [("markdown", "   "), ("exe", "MZ"), ("text", "")])
def test_unusable_pushed_bytes(kind: str, data: str) -> None:
    with pytest.raises(LoadError):
        _doc("x", data, kind)


def test_filter_cache_is_bounded_by_ids_held(wiki, monkeypatch: pytest.MonkeyPatch) -> None:
    import sounding.indexer.store.reader as store_reader

    _, settings, _ = wiki
    monkeypatch.setattr(store_reader, "FILTER_CACHE_IDS", 3)
    reader = IndexReader(settings.index_dir)
    for t in range(10):  # filters with a time in them: each one different
        assert reader.allowed_chunks(SearchFilter(modified_after=float(t))) is not None
    held = reader.cached_filter_sizes()
    assert len(held) == 1 or sum(held) <= 3
    # An evicted filter is simply computed again, with the same answer.
    again = reader.allowed_chunks(SearchFilter(modified_after=0.0))
    assert again is not None and len(again) == reader.counts()[1]


def test_filtered_dense_search_on_an_ivf_index_fills_k_with_admitted_chunks(
    tmp_path: Path,
) -> None:
    """A narrow filter on an approximate index still returns k admitted passages."""
    root = tmp_path / "w"
    words = [f"w{i}" for i in range(200)]
    pages = {}
    for i in range(600):
        body = " ".join(words[(i * p) % 200] for p in (3, 7, 11, 13, 17))
        head = "" if i % 20 == 0 else "---\ngroups: [hr]\n---\n"  # 30 of 600 readable
        pages[f"p{i:03d}.md"] = f"{head}# Page {i}\n\npump {body}\n"
    write(root, pages)
    settings = IndexSettings(index_dir=tmp_path / "i", vector_index="ivf")
    embedder = HashingEmbedder(32, seed=9)
    refresh_index([root], settings, embedder)
    reader = IndexReader(settings.index_dir)
    assert reader.manifest.vectors["kind"] == "ivf"
    hits = Searcher(reader, embedder).search(
        "pump w3 w7", 10, mode="dense", where=SearchFilter(groups=frozenset())
    )
    assert len(hits) == 10
    assert all(int(h.document_id[1:4]) % 20 == 0 for h in hits)
