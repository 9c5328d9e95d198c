"""``sounding search --server URL``: ask a running service over HTTP instead of loading the model.

The standard library's urllib is enough for one POST, so the command needs no
HTTP client at run time. Every failure becomes one :class:`ServerError` line
saying what to do.
"""

from __future__ import annotations

import json
import os
import urllib.error
import urllib.request
from pathlib import Path
from typing import Any

from sounding.indexer.errors import SoundingError

# sysexits.h: the service cannot be reached or answered with an error / the key was refused.
EX_UNAVAILABLE = 69
EX_NOPERM = 77


class ServerError(SoundingError):
    """The service could not be reached, refused the key, or could not answer."""

    exit_code = EX_UNAVAILABLE


class RequestRefusedError(ServerError):
    """The service found the request malformed (400, 413, 422): a bad argument."""

    exit_code = 2


class KeyRefusedError(ServerError):
    """The service answered 401 or 403."""

    exit_code = EX_NOPERM


def api_key(key_file: str | None) -> str | None:
    """The key to send: the file named by ``--key-file`` / ``SOUNDING_API_KEY_FILE``,
    else ``SOUNDING_API_KEY``, else none (a service with keys off needs none)."""
    if key_file:
        path = Path(key_file).expanduser()
        try:
            key = path.read_text(encoding="utf-8").strip()
        except OSError as exc:
            raise ServerError(
                f"cannot read the key file {path}: {exc.strerror or exc}; "
                "name a file holding a key from `sounding keys create`"
            ) from None
        if not key:
            raise ServerError(
                f"the key file {path} is empty; put a key from `sounding keys create` in it"
            )
        return key
    return os.environ.get("SOUNDING_API_KEY", "").strip() or None


def _detail(error: urllib.error.HTTPError) -> str:
    try:
        body = json.loads(error.read() or b"{}")
    except ValueError:
        return error.reason or ""
    detail = body.get("detail") if isinstance(body, dict) else None
    if isinstance(detail, list):  # a 422 from validation: [{"loc": ..., "msg": ...}, ...]
        detail = "; ".join(str(d.get("msg", d)) if isinstance(d, dict) else str(d) for d in detail)
    return " ".join(str(detail or error.reason or "").split())


def post_search(
    server: str, body: dict[str, Any], key: str | None, *, timeout: float = 30.0
) -> list[dict[str, Any]]:
    """``POST {server}/search`` with ``body``; the response's ``results``."""
    url = server.rstrip("/") + "/search"
    if not url.startswith(("http://", "https://")):
        raise ServerError(f"--server {server!r} is not an http:// or https:// address")
    headers = {"content-type": "application/json", "accept": "application/json"}
    if key:
        headers["Authorization"] = f"Bearer {key}"
    request = urllib.request.Request(
        url, data=json.dumps(body).encode(), headers=headers, method="POST"
    )
    try:
        with urllib.request.urlopen(request, timeout=timeout) as response:
            answer = json.load(response)
    except urllib.error.HTTPError as exc:
        detail = _detail(exc)
        if exc.code == 401:
            how = (
                "set SOUNDING_API_KEY or --key-file to a key from `sounding keys create`"
                if key is None
                else "check the key (revoked, or from another index?); make one with "
                "`sounding keys create` on the server"
            )
            raise KeyRefusedError(f"{server} refused the request (401: {detail}); {how}") from None
        if exc.code == 403:
            raise KeyRefusedError(
                f"{server} refused the key (403: {detail}); use a key with scope read"
            ) from None
        refused = RequestRefusedError if exc.code in (400, 413, 422) else ServerError
        raise refused(f"{server} answered {exc.code}: {detail}") from None
    except OSError as exc:  # URLError, a refused or reset connection, a timeout
        reason = getattr(exc, "reason", exc)
        raise ServerError(
            f"cannot reach {server}: {reason}; start the service with `sounding serve`, "
            "or check --server / SOUNDING_SERVER"
        ) from None
    except ValueError:
        raise ServerError(
            f"{server} did not answer with sounding's JSON; is it sounding?"
        ) from None
    results = answer.get("results") if isinstance(answer, dict) else None
    if not isinstance(results, list):
        raise ServerError(f"{server} did not answer with search results; is it sounding?")
    return results
