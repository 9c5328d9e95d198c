"""The office and mail formats of the registry, and how a mail's attachments are indexed."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import PurePath
from typing import Any

from ..documents import Document, Section, Skipped
from ..errors import LoadError
from ._common import LoadLimits, Parsed, short_error
from ._docx import parse_docx
from ._mail import Mail, parse_mail
from ._odf import parse_odf
from ._pptx import parse_pptx
from ._xlsx import parse_xlsx

# Suffix → kind; the kind is stored with each document (``Document.kind``).
OFFICE_KINDS: dict[str, str] = {
    ".docx": "docx",
    ".odt": "odt",
    ".pptx": "pptx",
    ".odp": "odp",
    ".xlsx": "xlsx",
    ".ods": "ods",
    ".eml": "mail",
}
# Mail attached to mail attached to mail: deeper ones are listed, not read.
MAX_MAIL_DEPTH = 3
ATTACHMENTS = "attachments"

ParseMany = Callable[[bytes, str, str], list[Document | Skipped]]


def parse_office(data: bytes, kind: str, stem: str, limits: LoadLimits) -> Parsed:
    """Parse a word-processor, slide or spreadsheet file of ``kind``."""
    if kind == "docx":
        return parse_docx(data, stem, limits)
    if kind == "pptx":
        return parse_pptx(data, stem, limits)
    if kind == "xlsx":
        return parse_xlsx(data, stem, limits)
    if kind in ("odt", "odp", "ods"):
        return parse_odf(data, kind, stem, limits)
    raise LoadError(f"unsupported kind {kind!r}")


def read_mail(
    data: bytes,
    stem: str,
    doc_id: str,
    kinds: dict[str, str],
    parse: Callable[..., Document],
    into: list[Document | Skipped] | None,
    common: dict[str, Any],
) -> tuple[Parsed, list[Document | Skipped]]:
    """A mail and its attachments, each parsed with ``parse`` (parse_document, given the
    keywords ``common``): as sections of the message when ``into`` is None (a push),
    else as documents of their own, returned beside it."""
    mail = parse_mail(data, stem)
    attachments = attachment_documents(
        mail, doc_id, kinds, attachment_parser(parse, doc_id, **common)
    )
    return (mail.parsed if into is not None else fold_attachments(mail, attachments)), attachments


def attachment_parser(parse: Callable[..., Document], doc_id: str, **common: Any) -> ParseMany:
    """How the attachments of mail ``doc_id`` are parsed: with ``parse`` (parse_document),
    each into its own documents, the attachment first, marked as ``doc_id``'s."""

    def parse_attachment(data: bytes, kind: str, att_id: str) -> list[Document | Skipped]:
        out: list[Document | Skipped] = []
        parse(data, kind, doc_id=att_id, name=att_id.rsplit("/", 1)[-1], into=out, **common)
        if out and isinstance(out[0], Document):
            out[0].metadata["attachment_of"] = doc_id
        return out

    return parse_attachment


def attachment_id(doc_id: str, name: str) -> str:
    """The id of an attachment: ``mail/x.eml/attachments/budget.xlsx``."""
    return f"{doc_id}/{ATTACHMENTS}/{name}"


def attachment_kind(name: str, kinds: dict[str, str]) -> str:
    """The kind an attachment is read as; LoadError when it is not one we read."""
    suffix = PurePath(name.lower()).suffix
    kind = kinds.get(suffix)
    if kind is None or kind == "corpus":
        raise LoadError(f"unsupported file type '{suffix}'" if suffix else "no file name suffix")
    return kind


def attachment_documents(
    mail: Mail, doc_id: str, kinds: dict[str, str], parse: ParseMany
) -> list[Document | Skipped]:
    """The attachments of ``mail`` as documents (ids under ``doc_id``), or Skipped each."""
    out: list[Document | Skipped] = []
    for name, reason in mail.left_out:
        out.append(Skipped(attachment_id(doc_id, name), reason))
    depth = doc_id.count(f"/{ATTACHMENTS}/")
    for attachment in mail.attachments:
        att_id = attachment_id(doc_id, attachment.name)
        try:
            kind = attachment_kind(attachment.name, kinds)
            if kind == "mail" and depth >= MAX_MAIL_DEPTH:
                raise LoadError(f"mail nested more than {MAX_MAIL_DEPTH} deep")
            out += parse(attachment.data, kind, att_id)
        except LoadError as exc:
            out.append(Skipped(att_id, str(exc)))
        except MemoryError:
            raise
        except Exception as exc:  # noqa: BLE001 - one bad attachment must not lose the mail
            out.append(Skipped(att_id, f"cannot parse attachment: {short_error(exc)}"))
    return out


def fold_attachments(mail: Mail, attachments: list[Document | Skipped]) -> Parsed:
    """The message with its readable attachments as sections (trail "Attachment: name");
    a pushed document is one id, so its attachments travel, and are deleted, with it."""
    parsed = mail.parsed
    for item in attachments:
        name = item.path if isinstance(item, Skipped) else item.id
        name = name.split(f"/{ATTACHMENTS}/", 1)[-1]
        if isinstance(item, Skipped):
            parsed.warnings.append(f"attachment {name!r} not indexed: {item.reason}")
            continue
        for part in item.sections:
            parsed.sections.append(
                Section(trail=(f"Attachment: {name}", *part.trail), text=part.text, page=part.page)
            )
    return parsed
