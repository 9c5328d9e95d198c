"""Limits on what one HTTP request may send, checked before any route sees it.

A pure ASGI middleware, so it works the same under any FastAPI or Starlette
version. It answers, with a JSON ``{"detail": ...}`` that names the limit:

- 413 when the body is over ``max_body_bytes``: the ``Content-Length`` is
  checked first, and a body sent without one (chunked) is counted as it
  arrives and refused as soon as it passes the limit, so no more than the
  limit is ever held in memory;
- 414 when a ``/documents/{id}`` id is longer than :data:`MAX_DOCUMENT_ID_CHARS`;
- 422 when a JSON body is bytes that no Unicode encoding decodes, or holds
  what Python's parser accepts but nothing after it can use: nesting deeper
  than ``max_json_depth`` (the parser recurses, and pydantic after it),
  ``NaN``/``Infinity``, numbers too large for a float or a 64-bit integer
  (SQLite's), and lone UTF-16 surrogates such as ``"\\ud800"`` (no UTF-8
  encoding exists, so the text cannot be searched, stored or even echoed in
  an error).

Bodies that are not JSON at all, or not valid JSON, pass through untouched:
FastAPI's own validation answers them with its usual 422.
"""

from __future__ import annotations

import email.message
import json
import math
from collections.abc import Awaitable, Callable, MutableMapping
from typing import Any

Scope = MutableMapping[str, Any]
Message = MutableMapping[str, Any]
Receive = Callable[[], Awaitable[Message]]
Send = Callable[[Message], Awaitable[None]]
ASGIApp = Callable[[Scope, Receive, Send], Awaitable[None]]

DEFAULT_MAX_BODY_BYTES = 64 * 1024
DEFAULT_MAX_JSON_DEPTH = 32
# The same bound as FeedbackRequest.document_id (service/schemas.py).
MAX_DOCUMENT_ID_CHARS = 1000
DOCUMENTS_PREFIX = "/documents/"
_INT64 = (-(2**63), 2**63 - 1)


class BodyTooLarge(Exception):
    """The request body passed the byte limit."""


class RequestLimits:
    """Refuse oversized bodies, overlong document ids and hostile JSON with a 4xx."""

    def __init__(
        self,
        app: ASGIApp,
        max_body_bytes: int = DEFAULT_MAX_BODY_BYTES,
        max_json_depth: int = DEFAULT_MAX_JSON_DEPTH,
        max_upload_bytes: int | None = None,
    ) -> None:
        if max_body_bytes < 1 or max_json_depth < 1:
            raise ValueError("max_body_bytes and max_json_depth must be at least 1")
        self.app = app
        self.max_body_bytes = max_body_bytes
        # Documents pushed with PUT /documents/{id} may be larger than a query.
        self.max_upload_bytes = max_upload_bytes or max_body_bytes
        self.max_json_depth = max_json_depth

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        path: str = scope.get("path", "")
        if path.startswith(DOCUMENTS_PREFIX):
            n = len(path) - len(DOCUMENTS_PREFIX)
            if n > MAX_DOCUMENT_ID_CHARS:
                await _error(
                    send,
                    414,
                    f"document id is {n} characters, over the limit of {MAX_DOCUMENT_ID_CHARS}",
                )
                return
        headers = _headers(scope)
        upload = scope.get("method") == "PUT" and path.startswith(DOCUMENTS_PREFIX)
        limit, setting = (
            (self.max_upload_bytes, "max_upload_bytes")
            if upload
            else (self.max_body_bytes, "max_body_bytes")
        )
        declared = headers.get("content-length")
        if declared is not None and declared.isdigit() and int(declared) > limit:
            await _error(send, 413, _too_large(f"is {int(declared)} bytes,", limit, setting))
            return
        try:
            body, last = await self._read_body(receive, limit)
        except BodyTooLarge:
            await _error(send, 413, _too_large("is", limit, setting))
            return
        if body and _is_json(headers.get("content-type")):
            problem = json_problem(body, self.max_json_depth)
            if problem is not None:
                await _error(send, 422, f"invalid request: {problem}")
                return
        await self.app(scope, _replay(body, last, receive), send)

    async def _read_body(self, receive: Receive, limit: int) -> tuple[bytes, Message | None]:
        """The whole body, at most the limit; and a non-body message that ended it, if any."""
        parts: list[bytes] = []
        size = 0
        while True:
            message = await receive()
            if message["type"] != "http.request":
                return b"".join(parts), message  # http.disconnect: let the app see it
            chunk = message.get("body", b"")
            size += len(chunk)
            if size > limit:
                raise BodyTooLarge
            parts.append(chunk)
            if not message.get("more_body", False):
                return b"".join(parts), None


def _too_large(size: str, limit: int, setting: str) -> str:
    return f"request body {size} over the limit of {limit} bytes (setting {setting})"


def json_problem(body: bytes, max_depth: int = DEFAULT_MAX_JSON_DEPTH) -> str | None:
    """Why a JSON body is refused before validation, or None when it may go on.

    Invalid JSON gives None: the parser's own error (FastAPI's 422) is clearer.
    """
    # Nesting cannot pass the number of brackets and braces: counting them (in C) spares
    # the byte-by-byte scan for every ordinary body, which a long query made cost.
    if body.count(b"[") + body.count(b"{") > max_depth and nesting_depth(body, max_depth) > (
        max_depth
    ):
        return f"JSON is nested more than {max_depth} levels deep (the limit)"
    try:
        value = json.loads(body, parse_constant=_refuse_constant)
    except _Refused as exc:
        return str(exc)
    except UnicodeDecodeError:  # FastAPI would answer a bare 400 "error parsing the body"
        return "body is not text in UTF-8 (nor UTF-16 or UTF-32), so it is not JSON"
    except (ValueError, RecursionError):  # JSONDecodeError: FastAPI's 422 says where
        return None
    return _value_problem(value)


def nesting_depth(data: bytes, stop_above: int | None = None) -> int:
    """Deepest nesting of ``[`` and ``{`` outside JSON strings, without parsing.

    Stops counting once past ``stop_above``, so a hostile body costs one
    partial scan. Works on the raw bytes: in UTF-8 the bytes of ``"``, ``\\``,
    brackets and braces never occur inside a multi-byte character.
    """
    depth = deepest = 0
    in_string = escaped = False
    for byte in data:
        if in_string:
            if escaped:
                escaped = False
            elif byte == 0x5C:  # backslash
                escaped = True
            elif byte == 0x22:  # quote
                in_string = False
        elif byte == 0x22:
            in_string = True
        elif byte in (0x5B, 0x7B):  # [ {
            depth += 1
            if depth > deepest:
                deepest = depth
                if stop_above is not None and deepest > stop_above:
                    return deepest
        elif byte in (0x5D, 0x7D) and depth:  # ] }
            depth -= 1
    return deepest


class _Refused(ValueError):
    pass


def _refuse_constant(name: str) -> Any:
    raise _Refused(f"JSON holds {name}, which is not a JSON number")


def _value_problem(value: Any, where: str = "body") -> str | None:
    """The first unusable value inside a parsed body (depth is already bounded)."""
    if isinstance(value, str):
        return _string_problem(value, where)
    if isinstance(value, bool) or value is None:
        return None
    if isinstance(value, int):
        if not _INT64[0] <= value <= _INT64[1]:
            return f"{where}: integer is outside the 64-bit range"
        return None
    if isinstance(value, float):
        return None if math.isfinite(value) else f"{where}: number is too large for a float"
    if isinstance(value, dict):
        for key, item in value.items():
            problem = _string_problem(key, where) or _value_problem(item, f"{where}.{key}")
            if problem:
                return problem
        return None
    if isinstance(value, list):
        for i, item in enumerate(value):
            problem = _value_problem(item, f"{where}.{i}")
            if problem:
                return problem
    return None


def _string_problem(text: str, where: str) -> str | None:
    try:
        text.encode("utf-8")
    except UnicodeEncodeError:
        shown = where.encode("utf-8", "backslashreplace").decode("ascii", "backslashreplace")
        return f"{shown}: text holds a lone UTF-16 surrogate (such as \\ud800), not a character"
    return None


def _headers(scope: Scope) -> dict[str, str]:
    return {k.decode("latin-1").lower(): v.decode("latin-1") for k, v in scope.get("headers", ())}


def _is_json(content_type: str | None) -> bool:
    """Whether FastAPI will parse the body as JSON (it does for ``application/*json``)."""
    if not content_type:
        return False
    message = email.message.Message()
    message["content-type"] = content_type
    if message.get_content_maintype() != "application":
        return False
    subtype = message.get_content_subtype()
    return subtype == "json" or subtype.endswith("+json")


def _replay(body: bytes, last: Message | None, receive: Receive) -> Receive:
    """A ``receive`` that gives the buffered body once, then defers to the real one."""
    pending: list[Message] = [{"type": "http.request", "body": body, "more_body": False}]
    if last is not None:
        pending.append(last)

    async def replay() -> Message:
        if pending:
            return pending.pop(0)
        return await receive()

    return replay


async def _error(send: Send, status: int, detail: str) -> None:
    payload = json.dumps({"detail": detail}).encode("utf-8")
    await send(
        {
            "type": "http.response.start",
            "status": status,
            "headers": [
                (b"content-type", b"application/json"),
                (b"content-length", str(len(payload)).encode("ascii")),
                # The client may still be sending a body we will not read.
                (b"connection", b"close"),
            ],
        }
    )
    await send({"type": "http.response.body", "body": payload})
