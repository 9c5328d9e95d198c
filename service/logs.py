"""Structured logs: one JSON object per line, each tagged with the request it belongs to.

A record looks like::

    {"timestamp": "2025-01-31T08:15:02.481Z", "level": "info", "logger": "sounding.access",
     "message": "POST /search 200", "request_id": "5f0c...", "method": "POST",
     "route": "/search", "status": 200, "duration_ms": 12.7}

The request id lives in a context variable set by the request middleware
(:mod:`service.metrics`), so any record made while a request is answered
carries it, whichever module logs it.

Privacy: queries can be personal data (people search for colleagues, their
own health or pay), and passages are the organisation's documents. Nothing
at info level or above may hold query text, document text or raw paths (a
document id is a path that may name a restricted page): access lines carry
the route *template* (``/documents/{document_id}``), never the path asked for.
"""

from __future__ import annotations

import json
import logging
import re
import uuid
from contextvars import ContextVar
from datetime import datetime, timezone
from typing import Any, Literal

REQUEST_ID_HEADER = "x-request-id"
# An incoming id is kept only when it is short and plain: letters, digits and
# ". _ : -" cover UUIDs, hex trace ids and most gateways' ids, and leave no
# room for newlines, quotes or markup that could forge or break a log line.
MAX_REQUEST_ID_CHARS = 128
_REQUEST_ID = re.compile(rf"[A-Za-z0-9._:-]{{1,{MAX_REQUEST_ID_CHARS}}}")

request_id_var: ContextVar[str | None] = ContextVar("sounding_request_id", default=None)

ACCESS_LOGGER = "sounding.access"
# Attributes every LogRecord has; anything else on a record came from ``extra=``.
_STANDARD = set(vars(logging.makeLogRecord({}))) | {"message", "asctime", "taskName"}
# uvicorn adds a copy of its message with terminal colour codes; not wanted in JSON.
_DROPPED = {"color_message", "request_id"}


def current_request_id() -> str | None:
    """The id of the request being answered in this context, or None outside a request."""
    return request_id_var.get()


def accept_request_id(value: str | None) -> str:
    """``value`` if it is a well-formed request id, else a new random one (32 hex digits)."""
    if value is not None and _REQUEST_ID.fullmatch(value):
        return value
    return uuid.uuid4().hex


class RequestIdFilter(logging.Filter):
    """Put the current request id on each record (``%(request_id)s`` in text formats)."""

    def filter(self, record: logging.LogRecord) -> bool:
        if getattr(record, "request_id", None) is None:
            record.request_id = current_request_id()
        return True


class JsonFormatter(logging.Formatter):
    """Format a record as one line of JSON: timestamp (ISO 8601, UTC), level, logger,
    message, the request id when there is one, then any ``extra=`` fields."""

    def format(self, record: logging.LogRecord) -> str:
        entry: dict[str, Any] = {
            "timestamp": datetime.fromtimestamp(record.created, timezone.utc)
            .isoformat(timespec="milliseconds")
            .replace("+00:00", "Z"),
            "level": record.levelname.lower(),
            "logger": record.name,
            "message": record.getMessage(),
        }
        request_id = getattr(record, "request_id", None) or current_request_id()
        if request_id is not None:
            entry["request_id"] = request_id
        for key, value in vars(record).items():
            if key not in _STANDARD and key not in _DROPPED and key not in entry:
                entry[key] = value
        if record.exc_info:
            entry["exception"] = self.formatException(record.exc_info)
        if record.stack_info:
            entry["stack"] = self.formatStack(record.stack_info)
        # default=str: an odd extra value must not lose the line; ensure_ascii keeps
        # each record one line of plain bytes whatever the text holds.
        return json.dumps(entry, default=str, ensure_ascii=True)


TEXT_FORMAT = "%(asctime)s %(levelname)s %(name)s [%(request_id)s] %(message)s"


def log_config(level: str = "info", fmt: Literal["json", "text"] = "json") -> dict[str, Any]:
    """A :func:`logging.config.dictConfig` for ``sounding serve`` (uvicorn's ``log_config``).

    Everything goes to stderr in one format. uvicorn's own access log is off
    (its lines hold the raw path and query string): the request middleware
    writes the access lines instead, one per request, on ``sounding.access``.
    """
    formatter: dict[str, Any] = (
        {"()": "sounding.service.logs.JsonFormatter"} if fmt == "json" else {"format": TEXT_FORMAT}
    )
    handler = ["stderr"]
    return {
        "version": 1,
        "disable_existing_loggers": False,
        "filters": {"request_id": {"()": "sounding.service.logs.RequestIdFilter"}},
        "formatters": {"main": formatter},
        "handlers": {
            "stderr": {
                "class": "logging.StreamHandler",
                "stream": "ext://sys.stderr",
                "formatter": "main",
                "filters": ["request_id"],
            }
        },
        "loggers": {
            "uvicorn": {"handlers": handler, "level": level.upper(), "propagate": False},
            "uvicorn.error": {"level": level.upper()},
            "uvicorn.access": {"handlers": [], "level": "WARNING", "propagate": False},
            "sounding": {"handlers": handler, "level": level.upper(), "propagate": False},
        },
        # Libraries (sentence-transformers, faiss...): warnings and worse only.
        "root": {"handlers": handler, "level": "WARNING"},
    }
