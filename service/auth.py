"""Who is calling: an API key from ``Authorization: Bearer``, its scope and groups.

Routes take the caller as a parameter and never read headers themselves::

    @router.post("/search")
    def search(body: SearchRequest, caller: ReadCaller) -> SearchResponse:
        ...  # pass caller.groups to the searcher

Scopes are ordered, ``read`` < ``write`` < ``admin``, each including the ones
before it. A caller's ``groups`` decide which restricted documents it may
read. A key with the act-for right may send ``X-Sounding-On-Behalf-Of: g1,g2``
(empty: a user in no group), and its groups are then exactly those: a chat
bot searches with the rights of the person asking, never with its own. It may
claim only the groups it was created to act for (``--act-for-groups``); any
other is a 403 naming it.

With ``require_keys`` off, a request without a key is served as anonymous
only when it arrived on a loopback socket (the connection's address, not the
``host`` setting, which ``uvicorn --factory --host ...`` does not change).

Statuses follow RFC 6750 section 3.1: 401 with ``WWW-Authenticate: Bearer``
when the key is missing or refused, 403 with ``error="insufficient_scope"``
when the key's scope is too low; a malformed header is a 400; 429 with
Retry-After while a key id that kept failing is backed off.
"""

from __future__ import annotations

import functools
import ipaddress
import logging
import math
from collections.abc import Callable
from dataclasses import dataclass, replace
from typing import Annotated

from fastapi import Depends, Header, HTTPException, Request
from fastapi.security import HTTPAuthorizationCredentials, HTTPBearer
from sounding.indexer.errors import AccessError

from .backoff import TooManyAttempts
from .keys import SCOPES, KeyStore, check_groups, scope_rank
from .settings import ServiceSettings

log = logging.getLogger("sounding.service")

ON_BEHALF_HEADER = "X-Sounding-On-Behalf-Of"
MAX_ON_BEHALF_CHARS = 4096
REALM = "sounding"


@dataclass(frozen=True)
class Caller:
    """Who sent a request and what it may see.

    ``groups`` are the effective groups: the key's own, or the end user's when
    ``on_behalf`` (a key with ``act_for`` sent the on-behalf header).
    """

    name: str
    scope: str
    groups: frozenset[str]
    act_for: bool = False
    on_behalf: bool = False
    key_id: str | None = None
    act_for_groups: frozenset[str] = frozenset()  # the groups an act-for key may claim

    def may(self, scope: str) -> bool:
        """Whether this caller's scope includes ``scope``."""
        return scope_rank(self.scope) >= scope_rank(scope)

    @property
    def anonymous(self) -> bool:
        return self.key_id is None


# With require_keys off (loopback sockets only): every scope, but no group and no act-for, so an
# anonymous caller sees only unrestricted documents.
ANONYMOUS = Caller(name="anonymous", scope=SCOPES[-1], groups=frozenset())

# Declared so that the OpenAPI schema (and viewers' "Authorize" buttons) show the scheme; the
# header itself is parsed below, to give each refusal its own reason.
_bearer = HTTPBearer(
    auto_error=False,
    scheme_name="APIKey",
    bearerFormat="snd_<id>_<secret>",
    description="An API key from `sounding keys create`.",
)


def _challenge(
    error: str | None = None, description: str | None = None, scope: str | None = None
) -> dict[str, str]:
    params = [f'realm="{REALM}"']
    if error:
        params.append(f'error="{error}"')
    if description:
        # A quoted-string may not hold '"' or '\' unescaped; keep the header plain ASCII.
        safe = description.replace("\\", "/").replace('"', "'")
        params.append(f'error_description="{safe.encode("ascii", "replace").decode()}"')
    if scope:
        params.append(f'scope="{scope}"')
    return {"WWW-Authenticate": "Bearer " + ", ".join(params)}


def _refuse(reason: str, error: str | None = "invalid_token") -> HTTPException:
    # A request with no credentials gets a bare challenge (RFC 6750 section 3.1).
    return HTTPException(
        status_code=401, detail=reason, headers=_challenge(error, reason if error else None)
    )


def _one_header(request: Request, name: str) -> str | None:
    values = request.headers.getlist(name)
    if len(values) > 1:
        raise HTTPException(
            status_code=400, detail=f"send the {name} header once, not {len(values)} times"
        )
    return values[0] if values else None


def from_loopback(request: Request) -> bool:
    """Whether the request arrived on a loopback socket (127.0.0.0/8, ::1, or ::ffff:127.x).

    ASGI's ``client`` is the peer address of the connection; with no address (a UNIX
    socket, some servers) the answer is no, so keys-off fails closed.
    """
    client = request.client
    if client is None:
        return False
    try:
        address = ipaddress.ip_address(client.host)
    except ValueError:  # not an address at all
        return False
    if isinstance(address, ipaddress.IPv6Address) and address.ipv4_mapped is not None:
        address = address.ipv4_mapped
    return address.is_loopback


def authenticate(
    request: Request,
    _credentials: Annotated[HTTPAuthorizationCredentials | None, Depends(_bearer)],
    _on_behalf: Annotated[
        str | None,
        Header(
            alias=ON_BEHALF_HEADER,
            description="Only for keys with the act-for right: the end user's groups, "
            "comma-separated (empty for a user in no group), each among the key's act-for "
            "groups (else 403). The request then sees exactly what that user may read.",
        ),
    ] = None,
) -> Caller:
    """The caller of this request, or 401/400/403 saying why not.

    A plain function (FastAPI runs it in its thread pool): the first use of a
    key in a process costs one scrypt check, later ones one SQLite lookup.
    """
    settings: ServiceSettings = request.app.state.settings
    header = _one_header(request, "Authorization")
    if header is None:
        if settings.require_keys:
            raise _refuse(
                "no API key: send 'Authorization: Bearer <key>'; an administrator creates "
                "keys with `sounding keys create`",
                error=None,
            )
        if not from_loopback(request):
            host = request.client.host if request.client else "an unknown address"
            raise _refuse(
                f"no API key: keys are off here (require_keys=false), but only for requests "
                f"from this machine's loopback, and this one came from {host}; send "
                "'Authorization: Bearer <key>'",
                error=None,
            )
        caller = ANONYMOUS
    else:
        scheme, _, secret = header.strip().partition(" ")
        if scheme.lower() != "bearer" or not secret.strip():
            raise _refuse("the Authorization header must be 'Bearer <key>'", "invalid_request")
        store: KeyStore | None = getattr(request.app.state, "keys", None)
        if store is None:  # the lifespan has not run: a wiring bug, not the caller's fault
            raise HTTPException(status_code=503, detail="the keys store is not open")
        try:
            key = store.authenticate(secret.strip())
        except TooManyAttempts as exc:
            raise HTTPException(
                status_code=429,
                detail=str(exc),
                headers={"Retry-After": str(max(1, math.ceil(exc.retry_after)))},
            ) from None
        except AccessError as exc:
            raise _refuse(str(exc)) from None
        caller = Caller(
            name=key.name,
            scope=key.scope,
            groups=key.groups,
            act_for=key.act_for,
            key_id=key.id,
            act_for_groups=key.act_for_groups,
        )

    on_behalf = _one_header(request, ON_BEHALF_HEADER)
    if on_behalf is not None:
        if not caller.act_for:
            who = "anonymous callers lack" if caller.anonymous else f"key {caller.name!r} lacks"
            raise HTTPException(
                status_code=403,
                detail=f"{who} the act-for right, so may not send {ON_BEHALF_HEADER}; "
                "create a key with `sounding keys create --act-for`",
            )
        if len(on_behalf) > MAX_ON_BEHALF_CHARS:
            raise HTTPException(
                status_code=400,
                detail=f"{ON_BEHALF_HEADER} is {len(on_behalf)} characters; at most "
                f"{MAX_ON_BEHALF_CHARS} are accepted",
            )
        try:
            groups = check_groups(on_behalf, ON_BEHALF_HEADER)
        except AccessError as exc:
            raise HTTPException(status_code=400, detail=str(exc)) from None
        outside = groups - caller.act_for_groups
        if outside:
            allowed = ", ".join(sorted(caller.act_for_groups)) or "none"
            raise HTTPException(
                status_code=403,
                detail=f"key {caller.name!r} may not act for group(s) "
                f"{', '.join(sorted(outside))}: it may act for {allowed}; an administrator "
                "re-creates it with `sounding keys create --act-for --act-for-groups G1,G2`",
            )
        caller = replace(caller, groups=groups, on_behalf=True)
    request.state.caller = caller  # for request logs and metrics
    return caller


@functools.cache
def require(scope: str) -> Callable[..., Caller]:
    """A dependency giving the caller, or 403 when its scope is below ``scope``.

    Cached, so each scope has one dependency and FastAPI resolves it once per request.
    """
    scope_rank(scope)  # an unknown scope fails at import, not per request

    async def dependency(caller: Annotated[Caller, Depends(authenticate)]) -> Caller:
        if not caller.may(scope):
            reason = (
                f"{'the anonymous caller' if caller.anonymous else repr(caller.name)} "
                f"has scope {caller.scope!r}; this needs scope {scope!r}"
            )
            raise HTTPException(
                status_code=403,
                detail=reason,
                headers=_challenge("insufficient_scope", reason, scope),
            )
        return caller

    dependency.__name__ = f"require_{scope}"
    return dependency


ReadCaller = Annotated[Caller, Depends(require("read"))]
WriteCaller = Annotated[Caller, Depends(require("write"))]
AdminCaller = Annotated[Caller, Depends(require("admin"))]


def open_keys(settings: ServiceSettings) -> KeyStore:
    """Open the keys file at start, and say in the log how callers are identified."""
    store = KeyStore(settings.keys_file)
    if not settings.require_keys:
        log.warning(
            "API keys are OFF (require_keys=false): any program or user on this machine that "
            "can connect to %s:%d is served as 'anonymous' with every scope, seeing the "
            "unrestricted documents (requests from other addresses still need a key); set "
            "SOUNDING_REQUIRE_KEYS=true to require keys",
            settings.host,
            settings.port,
        )
    elif not store.list(include_revoked=False):
        log.warning(
            "API keys are required but %s holds no live key: every request but /health "
            "gets 401; create one with `sounding keys create --name NAME --scope read`",
            settings.keys_file,
        )
    return store
