"""Office loaders: round trips on files built here (headings → trails, tables → rows,
slide numbers and notes, sheet rows and caps, properties → metadata)."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import pytest
from sounding.indexer.documents import Document
from sounding.indexer.embedding import HashingEmbedder
from sounding.indexer.loaders import LoadLimits, parse_document

from tests.unit.loading import walk, write
from tests.unit.office_files import (
    docx_bytes,
    odp_bytes,
    ods_bytes,
    odt_bytes,
    pptx_bytes,
    with_cached_values,
    xlsx_bytes,
)

WORD = [
    ("title", "Lone working procedure"),
    ("p", "Applies to everyone who visits a site alone."),
    ("h1", "Before you go"),
    ("p", "Book the visit in Harkline."),
    ("h2", "Check-in calls"),
    ("p", "Call the control room every two hours."),
    ("table", [["Site", "Check-in"], ["Otterbrook", "2 h"], ["Brackwell", "1 h"]]),
    ("h1", "Afterwards"),
    ("p", "Close the visit."),
]


def parse(data: bytes, kind: str, name: str, **limits: object) -> Document:
    return parse_document(
        data,
        kind,
        doc_id=name,
        name=name,
        source=name,
        modified=0.0,
        limits=LoadLimits(**limits),  # type: ignore[arg-type]
    )


def by_trail(doc: Document) -> dict[tuple[str, ...], str]:
    return {s.trail: s.text for s in doc.sections}


@pytest.mark.parametrize("kind", ["docx", "odt"])
def test_word_processing_headings_become_trails_and_tables_rows(kind: str) -> None:
    if kind == "docx":
        created = dt.datetime(2026, 9, 1, 8, 30)
        data = docx_bytes(WORD, title="Lone working", author="Maren Oduya", created=created)
    else:
        data = odt_bytes(
            [b for b in WORD if b[0] != "title"], title="Lone working", author="Maren Oduya"
        )
    doc = parse(data, kind, f"lone.{kind}")
    sections = by_trail(doc)
    assert doc.title == "Lone working"
    assert doc.metadata["author"] == "Maren Oduya"
    assert sections[("Before you go",)] == "Book the visit in Harkline."
    assert sections[("Before you go", "Check-in calls")].splitlines() == [
        "Call the control room every two hours.",
        "Site | Check-in",
        "Site: Otterbrook; Check-in: 2 h",
        "Site: Brackwell; Check-in: 1 h",
    ]
    assert sections[("Afterwards",)] == "Close the visit."
    if kind == "docx":
        assert sections[()] == "Applies to everyone who visits a site alone."
        assert doc.metadata["created"] == "2026-09-01T08:30:00+00:00"  # docx dates are UTC


def test_docx_title_style_is_the_title_without_core_properties() -> None:
    doc = parse(docx_bytes(WORD), "docx", "lone-working.docx")
    assert doc.title == "Lone working procedure"


@pytest.mark.parametrize("kind", ["pptx", "odp"])
def test_one_section_per_slide_with_its_number_title_and_notes(kind: str) -> None:
    slides = [
        ("Capital plan 2027", ["Mains renewal: 14 km", "Otterbrook pumps"], "Stress the 14 km."),
        ("Risks", ["Chlorine dosing spares"], ""),
        ("Questions", [], ""),
    ]
    data = (
        pptx_bytes(slides, title="Board pack")
        if kind == "pptx"
        else odp_bytes(slides, title="Board pack")
    )
    doc = parse(data, kind, f"board.{kind}")
    assert doc.title == "Board pack"
    assert [(s.page, s.trail) for s in doc.sections] == [
        (1, ("Capital plan 2027",)),
        (2, ("Risks",)),
        (3, ()),
    ]
    first = doc.sections[0].text
    assert "Mains renewal: 14 km" in first and "Speaker notes:\nStress the 14 km." in first
    assert doc.sections[2].text == "Questions"
    assert doc.metadata["slides"] == 3 and doc.metadata["page_label"] == "slide"


def test_xlsx_rows_are_header_value_lines_and_formulas_their_cached_values() -> None:
    rota = [
        ["Week", "Primary", "Secondary", "Pages"],
        [41, "Priya Halden", "Owen Castellan", 3],
        [42, "Dafydd Rook", None, 5],
        ["Total", None, None, "=SUM(D2:D3)"],
    ]
    data = with_cached_values(
        xlsx_bytes({"Rota": rota, "Empty": []}, title="Standby rota"), {"D4": "8"}
    )
    doc = parse(data, "xlsx", "rota.xlsx")
    assert doc.title == "Standby rota"
    assert [s.trail for s in doc.sections] == [("Rota",)]
    assert doc.sections[0].text.splitlines() == [
        "Week | Primary | Secondary | Pages",
        "Week: 41; Primary: Priya Halden; Secondary: Owen Castellan; Pages: 3",
        "Week: 42; Primary: Dafydd Rook; Pages: 5",
        "Week: Total; Pages: 8",
    ]
    assert doc.metadata["sheets"] == ["Rota", "Empty"]


def test_ods_rows_and_the_empty_million_row_tail_costs_nothing() -> None:
    assets = [["Tag", "Site", "Value"], ["P-01", "Otterbrook", 1200.5], ["P-02", "Brackwell", 900]]
    doc = parse(ods_bytes({"Assets": assets}, title="Asset register"), "ods", "assets.ods")
    assert doc.title == "Asset register"
    assert doc.sections[0].text.splitlines()[1:] == [
        "Tag: P-01; Site: Otterbrook; Value: 1200.5",
        "Tag: P-02; Site: Brackwell; Value: 900",
    ]


@pytest.mark.parametrize("kind", ["xlsx", "ods"])
def test_a_sheet_over_the_row_or_cell_cap_is_left_out_with_the_reason(kind: str) -> None:
    big = [["n", "square"], *([i, i * i] for i in range(1, 30))]
    small = [["Site", "Pumps"], ["Otterbrook", 4]]
    build = xlsx_bytes if kind == "xlsx" else ods_bytes
    doc = parse(build({"Big": big, "Small": small}), kind, f"s.{kind}", max_sheet_rows=10)
    assert [s.trail for s in doc.sections] == [("Small",)]
    assert doc.metadata["warnings"] == [
        "sheet 'Big' skipped: over 10 rows (setting max_sheet_rows)"
    ]
    with pytest.raises(Exception, match="max_sheet_cells"):
        parse(build({"Big": big}), kind, f"s.{kind}", max_sheet_cells=20)


@pytest.mark.parametrize("kind", ["docx", "pptx", "xlsx", "odt"])
def test_extraction_stops_at_the_character_cap(kind: str) -> None:
    line = "Quillmere valve exercise schedule, repeated. " * 20
    data = {
        "docx": lambda: docx_bytes([("p", line)] * 40),
        "pptx": lambda: pptx_bytes([(f"Slide {i}", [line], "") for i in range(40)]),
        "xlsx": lambda: xlsx_bytes({"S": [["a", "b"], *([line, line] for _ in range(40))]}),
        "odt": lambda: odt_bytes([("p", line)] * 40),
    }[kind]()
    with pytest.raises(Exception, match="max_document_chars"):
        parse(data, kind, f"big.{kind}", max_chars=5_000)


def test_a_folder_of_office_files_is_indexed_and_searchable(tmp_path: Path) -> None:
    from sounding.indexer.build import refresh_index
    from sounding.indexer.settings import IndexSettings

    root = tmp_path / "wiki"
    write(root, "policies/lone.docx", docx_bytes(WORD))
    write(root, "policies/lone.odt", odt_bytes(WORD[1:]))
    write(root, "decks/board.pptx", pptx_bytes([("Capital plan", ["Mains renewal"], "")]))
    write(root, "decks/board.odp", odp_bytes([("Capital plan", ["Mains renewal"], "")]))
    write(root, "rota/standby.xlsx", xlsx_bytes({"Rota": [["Week", "Primary"], [41, "Priya"]]}))
    write(root, "rota/assets.ods", ods_bytes({"Assets": [["Tag", "Site"], ["P-01", "Otterbrook"]]}))
    docs, skipped = walk(root)
    assert skipped == {}
    assert {d.kind for d in docs.values()} == {"docx", "odt", "pptx", "odp", "xlsx", "ods"}
    settings = IndexSettings(index_dir=tmp_path / "index")
    report = refresh_index([root], settings, HashingEmbedder(16))
    assert report.skipped == [] and report.documents == 6


def test_slide_numbers_reach_search_and_context_citations(serve_index) -> None:
    deck = pptx_bytes(
        [
            ("Welcome", ["Board pack"], ""),
            ("Capital plan", ["Mains renewal: 18 km in Ashgrove"], ""),
        ]
    )
    served = serve_index(
        {"decks/board.pptx": deck}, embedder=HashingEmbedder(16), keys=[("r", "read", "", False)]
    )
    query = {"query": "mains renewal Ashgrove", "mode": "lexical"}
    hits = served.client.post("/search", json={**query, "k": 1}, headers=served.auth("r")).json()
    assert hits["results"][0]["page"] == 2
    context = served.client.post("/context", json=query, headers=served.auth("r")).json()
    assert "page 2" in context["text"]
