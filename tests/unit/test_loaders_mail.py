"""Mail (.eml): headers as title and metadata, the text or HTML body, attachments as
documents under the message's id (folder runs) or as its sections (pushes)."""

from __future__ import annotations

from pathlib import Path

import pytest
from sounding.indexer.documents import Document, Skipped
from sounding.indexer.embedding import HashingEmbedder
from sounding.indexer.loaders import DEFAULT_LIMITS, _documents, parse_document

from tests.unit.loading import walk, write
from tests.unit.office_files import docx_bytes, eml_bytes, xlsx_bytes

XLSX = "application/vnd.openxmlformats-officedocument.spreadsheetml.sheet"
BUDGET = xlsx_bytes({"Budget": [["Line", "Amount"], ["Otterbrook pumps", 48000]]}, title="Budget")
MAIL = eml_bytes(
    subject="Board papers for October",
    sender="Maren Oduya <maren.oduya@quillmere.example>",
    to="board@quillmere.example",
    body="Dear all,\n\nThe budget for the Otterbrook pumps is attached.\n\nMaren",
    attachments=[
        ("budget.xlsx", BUDGET, XLSX),
        ("site-photo.jpg", b"\xff\xd8\xff\xe0 not really a photo", "image/jpeg"),
        (
            "../../etc/notes.docx",
            docx_bytes([("p", "Minutes to follow.")]),
            "application/octet-stream",
        ),
    ],
)


def test_headers_are_title_and_metadata_and_open_the_text(tmp_path: Path) -> None:
    docs, _ = walk(write(tmp_path, "mail/board.eml", MAIL).parent.parent)
    doc = docs["mail/board.eml"]
    assert doc.title == "Board papers for October" and doc.kind == "mail"
    assert doc.metadata["from"] == "Maren Oduya <maren.oduya@quillmere.example>"
    assert doc.metadata["to"] == "board@quillmere.example"
    assert doc.metadata["date"] == "2026-10-13T09:30:00+01:00"
    assert doc.sections[0].text.startswith("From: Maren Oduya")
    assert "budget for the Otterbrook pumps is attached" in doc.sections[0].text


def test_attachments_are_documents_under_the_message_id_the_rest_skipped(tmp_path: Path) -> None:
    docs, skipped = walk(write(tmp_path, "mail/board.eml", MAIL).parent.parent)
    budget = docs["mail/board.eml/attachments/budget.xlsx"]
    assert budget.kind == "xlsx" and budget.metadata["attachment_of"] == "mail/board.eml"
    assert "Line: Otterbrook pumps; Amount: 48000" in budget.text
    # A path in the file name is dropped: the id stays under the message.
    assert "mail/board.eml/attachments/notes.docx" in docs
    assert skipped == {"mail/board.eml/attachments/site-photo.jpg": "unsupported file type '.jpg'"}
    assert docs["mail/board.eml"].metadata["attachments"] == [
        "budget.xlsx",
        "site-photo.jpg",
        "notes.docx",
    ]


def test_a_push_keeps_the_attachments_as_sections_of_the_message() -> None:
    doc = parse_document(
        MAIL, "mail", doc_id="up/board.eml", name="board.eml", source="x", modified=0
    )
    trails = [s.trail for s in doc.sections]
    assert ("Attachment: budget.xlsx", "Budget") in trails
    assert ("Attachment: notes.docx",) in trails
    assert doc.metadata["warnings"] == [
        "attachment 'site-photo.jpg' not indexed: unsupported file type '.jpg'"
    ]


def test_an_html_only_mail_goes_through_the_html_loader_and_its_meta_is_ignored() -> None:
    html = (
        '<html><head><meta name="groups" content="nobody"></head><body>'
        "<h1>Levels</h1><h2>Reservoir levels</h2><p>Brackwell is at 91%.</p></body></html>"
    )
    data = eml_bytes(subject="Levels", sender="a@q.example", to="b@q.example", body="x", html=html)
    # Keep only the HTML alternative: a sender's markup is all there is.
    data = data.replace(b"Content-Type: text/plain", b"Content-Type: text/x-ignored")
    doc = parse_document(data, "mail", doc_id="l.eml", name="l.eml", source="x", modified=0)
    assert any("Brackwell is at 91%." in s.text for s in doc.sections)
    assert ("Reservoir levels",) in [s.trail for s in doc.sections]
    assert "groups" not in doc.metadata


def test_mail_within_mail_is_read_to_a_depth_then_skipped() -> None:
    inner = MAIL
    for level in range(4):
        inner = eml_bytes(
            subject=f"Fwd {level}",
            sender="a@q.example",
            to="b@q.example",
            body=f"level {level}",
            attachments=[("fwd.eml", inner, "message/rfc822")],
        )
    found = _documents(Path("x.eml"), "x.eml", "mail", inner, 0.0, DEFAULT_LIMITS)
    reasons = [f.reason for f in found if isinstance(f, Skipped)]
    assert any("nested more than 3 deep" in r for r in reasons)
    assert sum(isinstance(f, Document) and f.kind == "mail" for f in found) == 4


def test_not_mail_is_skipped_with_a_reason(tmp_path: Path) -> None:
    _, skipped = walk(write(tmp_path, "r/notes.eml", "just some words\n").parent)
    assert skipped == {
        "notes.eml": "not a mail message: no From, Subject, Date or Message-ID header"
    }


@pytest.mark.parametrize("upload", ["board.eml"])
def test_push_of_a_mail_over_http(serve_index, upload: str) -> None:
    served = serve_index(
        {"a.md": "# A\n\nText.\n"}, embedder=HashingEmbedder(16), keys=[("w", "write", "", False)]
    )
    r = served.client.put(
        "/documents/mail/board.eml",
        files={"file": (upload, MAIL, "message/rfc822")},
        headers=served.auth("w"),
    )
    assert r.status_code == 200, r.text
    doc = served.client.get("/documents/mail/board.eml", headers=served.auth("w")).json()
    assert doc["title"] == "Board papers for October"
    assert any(c["trail"][:1] == ["Attachment: budget.xlsx"] for c in doc["chunks"])
