"""The MCP tools over streamable HTTP at ``/mcp``, inside the service's own app.

A FastAPI route in front of the SDK's session manager, so an MCP request goes
through exactly what a REST request does: the request-id, metrics and access
log middleware (route ``/mcp``), the body and JSON limits, and the same
``Authorization: Bearer`` check (:data:`service.auth.ReadCaller`, act-for
header included). The route then hands the raw ASGI request to the SDK, with
the caller attached to the request's scope, and each tool call reads it from
there (:func:`_asker_of`). Nothing is kept between requests: the manager runs
stateless with JSON answers, so there is no session a second key could borrow.

With keys off (loopback only), an anonymous request must also name a loopback
host in ``Host`` and, when a browser sends one, ``Origin``: the MCP spec asks
servers to check Origin, because a web page whose name is re-pointed at
127.0.0.1 (DNS rebinding) could otherwise use the keyless service.
"""

from __future__ import annotations

import ipaddress
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from typing import Any
from urllib.parse import urlsplit

from fastapi import APIRouter, FastAPI, HTTPException, Request
from mcp.server.context import ServerRequestContext
from mcp.server.streamable_http_manager import StreamableHTTPSessionManager
from starlette.responses import Response
from starlette.types import Receive, Scope, Send

from .auth import Caller, ReadCaller
from .mcp import Asker, build_server
from .metrics import record_mode
from .settings import ServiceSettings

PATH = "/mcp"
# Where the caller travels from the route to the tool call: the ASGI scope both share.
ASKER_KEY = "sounding.mcp.asker"


def _asker_of(ctx: ServerRequestContext[Any, Any]) -> Asker | None:
    scope = getattr(ctx.request, "scope", None)
    asker = scope.get(ASKER_KEY) if isinstance(scope, dict) else None
    return asker if isinstance(asker, Asker) else None


@asynccontextmanager
async def _lifespan(app: FastAPI) -> AsyncIterator[None]:
    # Merged into the app's lifespan by include_router, after it: the engine is loaded.
    settings: ServiceSettings = app.state.settings
    manager = StreamableHTTPSessionManager(
        build_server(_asker_of),
        stateless=True,
        json_response=True,
        max_request_body_size=settings.max_body_bytes,
    )
    app.state.mcp_sessions = manager  # one per start: a manager runs only once
    async with manager.run():
        yield


router = APIRouter(tags=["mcp"], lifespan=_lifespan)


def loopback_name(host: str | None) -> bool:
    """Whether ``host`` (``name[:port]``, or a URL) names this machine's loopback."""
    if not host:
        return False
    name = urlsplit(host if "://" in host else f"//{host}").hostname
    if name is None:
        return False
    if name == "localhost" or name.endswith(".localhost"):
        return True
    try:
        return ipaddress.ip_address(name).is_loopback
    except ValueError:
        return False


def _check_keyless(request: Request, caller: Caller) -> None:
    if not caller.anonymous:
        return  # a page cannot hold the key, so a keyed request is not a rebinding risk
    origin = request.headers.get("origin")
    if not loopback_name(request.headers.get("host")) or (
        origin is not None and not loopback_name(origin)
    ):
        raise HTTPException(
            403,
            "keys are off here (require_keys=false), so /mcp answers only requests that "
            "name this machine (Host and Origin of localhost or 127.0.0.1); send "
            "'Authorization: Bearer <key>'",
        )


class _Handoff(Response):
    """A response that lets the SDK answer the request itself, with the caller attached."""

    def __init__(self, manager: StreamableHTTPSessionManager, asker: Asker) -> None:
        super().__init__()
        self.manager, self.asker = manager, asker

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        scope[ASKER_KEY] = self.asker
        await self.manager.handle_request(scope, receive, send)


# POST only: stateless, the service never streams to the client nor keeps a session to end,
# so GET and DELETE are the 405 the spec allows (an open GET stream would only hold a task).
@router.post(PATH, include_in_schema=False)
async def mcp_endpoint(request: Request, caller: ReadCaller) -> Response:
    """The MCP endpoint (streamable HTTP); every request needs the key a REST call would."""
    _check_keyless(request, caller)
    state = request.app.state
    asker = Asker(
        caller=caller,
        engine=state.engine,
        settings=state.settings,
        on_mode=lambda mode: record_mode(request, mode),
    )
    return _Handoff(state.mcp_sessions, asker)
