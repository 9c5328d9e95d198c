"""Helpers for the loader tests: write files, walk a root, load one file, build PDFs."""

from __future__ import annotations

import io
import json
from pathlib import Path

import pypdf
from sounding.indexer.documents import Document, Skipped
from sounding.indexer.loaders import iter_root, load_file


def write(root: Path, rel: str, content: str | bytes) -> Path:
    """Create ``root/rel`` (and its folders) holding ``content``; UTF-8 for str."""
    path = root / rel
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(content.encode("utf-8") if isinstance(content, str) else content)
    return path


def walk(root: Path, **kwargs: int) -> tuple[dict[str, Document], dict[str, str]]:
    """Documents by id and skip reasons by path from one ``iter_root`` run."""
    docs: dict[str, Document] = {}
    skipped: dict[str, str] = {}
    for item in iter_root(root, **kwargs):
        if isinstance(item, Skipped):
            skipped[item.path] = item.reason
        else:
            assert item.id not in docs, f"duplicate id {item.id}"
            docs[item.id] = item
    return docs, skipped


def load_one(tmp_path: Path, name: str, content: str | bytes) -> Document:
    """Write one file and load it through ``load_file``; exactly one document expected."""
    docs = load_file(write(tmp_path, name, content), name)
    assert len(docs) == 1
    return docs[0]


def skip_reason(tmp_path: Path, name: str, content: str | bytes) -> str:
    """The reason ``iter_root`` gives for skipping a lone file."""
    write(tmp_path / "root", name, content)
    docs, skipped = walk(tmp_path / "root")
    assert not docs, f"expected {name} to be skipped, got {list(docs)}"
    assert list(skipped) == [name]
    return skipped[name]


def texts(doc: Document) -> list[tuple[tuple[str, ...], str]]:
    return [(s.trail, s.text) for s in doc.sections]


def _pdf_string(text: str) -> str:
    return "(" + text.replace("\\", "\\\\").replace("(", "\\(").replace(")", "\\)") + ")"


def make_pdf(
    pages: list[list[str]], *, title: str | None = None, author: str | None = None
) -> bytes:
    """A minimal valid PDF, written by hand: one Helvetica text line per string.

    An empty list gives a page with a drawing but no text (a scanned page).
    """
    objects: list[bytes] = []

    def add(body: bytes) -> int:
        objects.append(body)
        return len(objects)

    catalog, pages_ref = add(b""), add(b"")
    font = add(b"<< /Type /Font /Subtype /Type1 /BaseFont /Helvetica >>")
    kids = []
    for lines in pages:
        ops = ["BT", "/F1 12 Tf", "72 720 Td"]
        for i, line in enumerate(lines):
            ops += (["0 -16 Td"] if i else []) + [f"{_pdf_string(line)} Tj"]
        stream = "\n".join([*ops, "ET"]).encode("latin-1") if lines else b"0 0 m 10 10 l S"
        content = add(b"<< /Length %d >>\nstream\n%s\nendstream" % (len(stream), stream))
        kids.append(
            add(
                f"<< /Type /Page /Parent {pages_ref} 0 R /MediaBox [0 0 612 792] "
                f"/Resources << /Font << /F1 {font} 0 R >> >> /Contents {content} 0 R >>".encode()
            )
        )
    objects[catalog - 1] = f"<< /Type /Catalog /Pages {pages_ref} 0 R >>".encode()
    kid_refs = " ".join(f"{k} 0 R" for k in kids)
    objects[pages_ref - 1] = f"<< /Type /Pages /Kids [{kid_refs}] /Count {len(kids)} >>".encode()
    info = None
    if title is not None or author is not None:
        entries = [f"/Title {_pdf_string(title)}" if title is not None else ""]
        entries.append(f"/Author {_pdf_string(author)}" if author is not None else "")
        info = add(("<< " + " ".join(entries) + " >>").encode("latin-1"))
    return serialise_pdf(objects, root=catalog, info=info)


def serialise_pdf(objects: list[bytes], *, root: int = 1, info: int | None = None) -> bytes:
    """The bytes of a PDF of ``objects`` (numbered from 1), with its cross-reference table."""
    out = io.BytesIO()
    out.write(b"%PDF-1.4\n")
    offsets = []
    for number, body in enumerate(objects, start=1):
        offsets.append(out.tell())
        out.write(b"%d 0 obj\n%s\nendobj\n" % (number, body))
    xref = out.tell()
    out.write(b"xref\n0 %d\n0000000000 65535 f \n" % (len(objects) + 1))
    for offset in offsets:
        out.write(b"%010d 00000 n \n" % offset)
    info_ref = f" /Info {info} 0 R" if info else ""
    out.write(f"trailer\n<< /Size {len(objects) + 1} /Root {root} 0 R{info_ref} >>\n".encode())
    out.write(b"startxref\n%d\n%%%%EOF\n" % xref)
    return out.getvalue()


def encrypt_pdf(data: bytes, user: str, owner: str | None = None) -> bytes:
    writer = pypdf.PdfWriter(clone_from=pypdf.PdfReader(io.BytesIO(data)))
    writer.encrypt(user, owner_password=owner)
    out = io.BytesIO()
    writer.write(out)
    return out.getvalue()


# Three corpus.jsonl records: a titled one with a URL, an untitled one, a numeric id.
RECORDS = [
    {"_id": "d1", "title": "Aspirin", "text": "Aspirin reduces fever.", "url": "http://a"},
    {"_id": "d2", "title": "", "text": "Untitled record.", "metadata": {"year": 2020}},
    {"_id": 3, "text": "Numeric id, no title.", "metadata": None},
]


def corpus_bytes(records: list[object]) -> bytes:
    """One line per record: JSON, or the bytes as given."""
    return b"".join(
        (r if isinstance(r, bytes) else json.dumps(r).encode()) + b"\n" for r in records
    )
