"""Saved mail (.eml) with the standard library's email package (policy ``default``).

The subject is the title; from, to, cc and date are metadata and open the
text, so "the mail from Priya about the budget" finds it. The plain-text part
is the body, or the HTML part through the HTML loader. Attachments are handed
back as bytes: the registry indexes those of supported types as documents of
their own (``parse_document(..., into=[...])``).
"""

from __future__ import annotations

import email
import mimetypes
import re
from dataclasses import dataclass, field
from email import policy
from email.message import EmailMessage, Message
from pathlib import PurePath
from typing import Any

from ..documents import Section
from ..errors import LoadError
from ._common import Parsed, json_safe, normalise_newlines, short_error, tidy_text
from ._html import parse_html

# More attachments than a real mail carries; the rest are listed as skipped.
MAX_ATTACHMENTS = 50
HEADERS = ("from", "to", "cc", "date")
# Characters a pushed document id may not hold (service/routes/documents.py) become "_".
_UNSAFE = re.compile(r"[^\w.~@:+=,()' -]+")
# An HTML mail's <meta> tags are the sender's, not ours: a <meta name="groups"> must not
# decide who may read the message.
_META_TAG = re.compile(r"<meta\b[^>]*>", re.IGNORECASE)


@dataclass
class Attachment:
    """One attached file: a name safe as a document id part, and its bytes."""

    name: str
    data: bytes


@dataclass
class Mail:
    """A parsed message: its own text and metadata, its attachments, those left out."""

    parsed: Parsed
    attachments: list[Attachment] = field(default_factory=list)
    left_out: list[tuple[str, str]] = field(default_factory=list)


def parse_mail(data: bytes, stem: str) -> Mail:
    """Headers, body and attachments of a message; LoadError when it is not mail."""
    message = email.message_from_bytes(data, policy=policy.default)
    if not isinstance(message, EmailMessage) or not any(
        message.get(h) for h in ("from", "subject", "date", "message-id")
    ):
        raise LoadError("not a mail message: no From, Subject, Date or Message-ID header")
    metadata: dict[str, Any] = {}
    lines: list[str] = []
    for name in HEADERS:
        value = _header(message, name)
        if value:
            metadata[name] = value
            lines.append(f"{name.capitalize()}: {value}")
    when = _date(message)
    if when:
        metadata["date"] = when
    message_id = _header(message, "message-id")
    if message_id:
        metadata["message_id"] = message_id
    subject = _header(message, "subject")
    title = subject or stem
    sections = _body(message, stem)
    head = Section(trail=(), text="\n".join(lines)) if lines else None
    if head is not None and sections and not sections[0].trail:
        sections[0] = Section(trail=(), text=f"{head.text}\n\n{sections[0].text}")
    elif head is not None:
        sections.insert(0, head)
    mail = Mail(Parsed(title=title, sections=sections, metadata=metadata))
    _attachments(message, mail)
    if mail.attachments or mail.left_out:
        metadata["attachments"] = [a.name for a in mail.attachments] + [n for n, _ in mail.left_out]
    return mail


def _header(message: EmailMessage, name: str) -> str:
    try:
        value = message.get(name)
    except Exception:  # noqa: BLE001 - a malformed header loses only itself
        return ""
    return " ".join(str(value).split()) if value is not None else ""


def _date(message: EmailMessage) -> str:
    """The Date header as ISO 8601, when it parses."""
    try:
        value = message.get("date")
        when = getattr(value, "datetime", None)
    except Exception:  # noqa: BLE001
        return ""
    return str(json_safe(when)) if when is not None else ""


def _text_of(part: Message) -> str:
    """A text part decoded with its charset (UTF-8 with replacement when it lies)."""
    try:
        content = part.get_content() if isinstance(part, EmailMessage) else None
        if isinstance(content, str):
            return normalise_newlines(content)
    except (LookupError, UnicodeError, ValueError):
        pass
    raw = part.get_payload(decode=True)
    return normalise_newlines(raw.decode("utf-8", "replace")) if isinstance(raw, bytes) else ""


def _body(message: EmailMessage, stem: str) -> list[Section]:
    body = message.get_body(preferencelist=("plain", "html"))
    if body is None:
        return []
    text = _text_of(body)
    if body.get_content_subtype() == "html":
        try:
            return list(parse_html(_META_TAG.sub("", text), stem).sections)
        except LoadError:
            return []
    text = tidy_text(text)
    return [Section(trail=(), text=text)] if text.strip() else []


def safe_name(name: str | None, content_type: str, number: int) -> str:
    """An attachment's file name usable as the last part of a document id."""
    base = PurePath((name or "").replace("\\", "/")).name.strip()
    base = _UNSAFE.sub("_", base).strip(" .")
    if not base:
        base = f"attachment-{number}{mimetypes.guess_extension(content_type) or '.bin'}"
    return base[:200]


def _attachments(message: EmailMessage, mail: Mail) -> None:
    taken: set[str] = set()
    for number, part in enumerate(message.iter_attachments(), start=1):
        content_type = part.get_content_type()
        name = safe_name(part.get_filename(), content_type, number)
        candidate, n = name, 1
        while candidate in taken:  # two attachments named alike keep both
            n += 1
            candidate = f"{PurePath(name).stem}-{n}{PurePath(name).suffix}"
        taken.add(candidate)
        if len(mail.attachments) >= MAX_ATTACHMENTS:
            mail.left_out.append((candidate, f"more than {MAX_ATTACHMENTS} attachments"))
            continue
        try:
            if content_type == "message/rfc822":
                inner = part.get_payload()
                inner = inner[0] if isinstance(inner, list) and inner else inner
                data = inner.as_bytes() if isinstance(inner, Message) else b""
                if not candidate.lower().endswith(".eml"):
                    candidate += ".eml"
            else:
                payload = part.get_payload(decode=True)
                data = payload if isinstance(payload, bytes) else b""
        except Exception as exc:  # noqa: BLE001 - a broken part loses only itself
            mail.left_out.append((candidate, f"cannot decode: {short_error(exc, 120)}"))
            continue
        if not data:
            mail.left_out.append((candidate, "empty attachment"))
            continue
        mail.attachments.append(Attachment(candidate, data))
