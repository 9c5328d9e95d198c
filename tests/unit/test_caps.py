"""Small inputs cannot cost unbounded work: caps on characters and chunks per document.

A document over max_document_chars or max_document_chunks is skipped in a folder run and
refused with a 422 on push, the reason naming the setting. PDFs stop extracting as soon as
the cap is passed. Seeded fake encoder; hostile PDFs are written here, by hand.
"""

from __future__ import annotations

import json
import zlib
from pathlib import Path

import pytest
from sounding.indexer.build import refresh_index
from sounding.indexer.embedding import HashingEmbedder
from sounding.indexer.errors import LoadError
from sounding.indexer.loaders import LoadLimits, parse_document
from sounding.indexer.settings import IndexSettings

from tests.conftest import ServeIndex
from tests.unit.loading import serialise_pdf

LONG = "\n\n".join(f"Paragraph {i} about sluice gates and tide tables." for i in range(200))


def bomb_pdf(pages: int, repeats: int) -> bytes:
    """A PDF whose pages share one Flate-compressed content stream showing one line
    ``repeats`` times: a few KB that extract to ``pages * repeats * 28`` characters."""
    stream = b"BT /F1 12 Tf 72 720 Td " + b"(Pay review lorem ipsum dolor) Tj 0 -1 Td " * repeats
    packed = zlib.compress(stream + b"ET", 9)
    objects = [b"", b"", b"<< /Type /Font /Subtype /Type1 /BaseFont /Helvetica >>"]
    objects.append(b"<< /Length %d /Filter /FlateDecode >>\nstream\n" % len(packed))
    objects[-1] += packed + b"\nendstream"
    page = b"<< /Type /Page /Parent 2 0 R /MediaBox [0 0 612 792] "
    page += b"/Resources << /Font << /F1 3 0 R >> >> /Contents 4 0 R >>"
    objects += [page] * pages
    kids = " ".join(f"{5 + i} 0 R" for i in range(pages)).encode()
    objects[0] = b"<< /Type /Catalog /Pages 2 0 R >>"
    objects[1] = b"<< /Type /Pages /Kids [%s] /Count %d >>" % (kids, pages)
    return serialise_pdf(objects)


def run(tmp_path: Path, pages: dict[str, str | bytes], **kw: object) -> dict[str, str]:
    """Skip reasons by path of one folder run over ``pages``."""
    root = tmp_path / "wiki"
    for rel, content in pages.items():
        (root / rel).parent.mkdir(parents=True, exist_ok=True)
        (root / rel).write_bytes(content.encode() if isinstance(content, str) else content)
    settings = IndexSettings(index_dir=tmp_path / "idx", chunk_tokens=64, chunk_overlap=8, **kw)
    report = refresh_index([root], settings, HashingEmbedder(16))
    return {s.path: s.reason for s in report.skipped}


def test_pdf_extraction_stops_at_the_page_that_passes_the_cap() -> None:
    data = bomb_pdf(pages=10, repeats=1000)  # about 28,000 characters a page
    assert len(data) < 3000
    with pytest.raises(LoadError, match=r"max_document_chars.*stopped") as caught:
        parse_document(
            data,
            "pdf",
            doc_id="b.pdf",
            name="b.pdf",
            source="b.pdf",
            modified=0,
            limits=LoadLimits(max_chars=50_000),
        )
    assert "at page 2" in str(caught.value)  # not after all 10 pages


def test_a_single_page_over_the_cap_is_refused() -> None:
    data = bomb_pdf(pages=1, repeats=4_000)  # 112,000 characters on one page
    with pytest.raises(LoadError, match="at page 1"):
        parse_document(
            data,
            "pdf",
            doc_id="b.pdf",
            name="b.pdf",
            source="b.pdf",
            modified=0,
            limits=LoadLimits(max_chars=1_000),
        )


def test_a_real_sized_pdf_passes_the_default_cap() -> None:
    doc = parse_document(
        bomb_pdf(pages=3, repeats=200), "pdf", doc_id="a", name="a", source="a", modified=0
    )
    assert [s.page for s in doc.sections] == [1, 2, 3]


def test_folder_runs_skip_documents_over_the_caps_naming_the_setting(tmp_path: Path) -> None:
    record = {"_id": "r1", "text": "x " * 3000}
    reasons = run(
        tmp_path,
        {
            "long.md": f"# Long\n\n{LONG}\n",
            "bomb.pdf": bomb_pdf(pages=10, repeats=1000),
            "c.jsonl": json.dumps(record) + "\n",
            "ok.md": "# Fine\n\nShort page.\n",
        },
        max_document_chars=5_000,
    )
    assert set(reasons) == {"long.md", "bomb.pdf", "c.jsonl:1"}
    assert all("max_document_chars" in r for r in reasons.values())
    reasons = run(tmp_path, {"long.md": f"# Long\n\n{LONG}\n"}, max_document_chunks=5)
    assert "over the limit of 5 (setting max_document_chunks)" in reasons["long.md"]


@pytest.fixture(scope="module")
def api(serve_index: ServeIndex):
    return serve_index(
        {"public.md": "# Open day\n\nVisitors welcome.\n"},
        embedder=HashingEmbedder(16),
        keys=[("w", "write", "", False)],
        max_document_chars=20_000,
        max_document_chunks=30,
        chunk_tokens=64,
        chunk_overlap=8,
    )


def test_pushes_over_the_caps_are_422s_naming_the_setting(api) -> None:
    r = api.client.put(
        "/documents/up/bomb.pdf",
        files={"file": ("bomb.pdf", bomb_pdf(pages=10, repeats=1000), "application/pdf")},
        headers=api.auth("w"),
    )
    assert r.status_code == 422 and "max_document_chars" in r.json()["detail"]
    r = api.client.put(
        "/documents/up/long.md", json={"text": f"# Long\n\n{LONG}\n"}, headers=api.auth("w")
    )
    assert r.status_code == 422 and "max_document_chunks" in r.json()["detail"]
