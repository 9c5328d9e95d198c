"""``GET /``: the search page for people, and its static files under ``/static``.

The page is plain HTML, CSS and JavaScript shipped inside the package (``service/static``),
so it works on a network with no internet. It calls the same REST API as any other client
and carries the caller's key itself; serving the page needs no key because it holds no data.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from fastapi import APIRouter
from fastapi.responses import FileResponse
from fastapi.staticfiles import StaticFiles
from starlette.responses import Response

STATIC_DIR = Path(__file__).resolve().parent.parent / "static"

# The page shows document text, so it may run only its own script and talk only to this
# service: no inline script or style, no frames, no plugins, no other origins.
# Directives as defined by Content Security Policy Level 3 (W3C).
CONTENT_SECURITY_POLICY = "; ".join(
    [
        "default-src 'self'",
        "script-src 'self'",
        "style-src 'self'",
        "img-src 'self' data:",
        "connect-src 'self'",
        "object-src 'none'",
        "base-uri 'none'",
        "form-action 'self'",
        "frame-ancestors 'none'",
    ]
)

PAGE_HEADERS = {
    "Content-Security-Policy": CONTENT_SECURITY_POLICY,
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "no-referrer",
    # The page is small; always revalidate so an upgraded service never runs an old script.
    "Cache-Control": "no-cache",
}

router = APIRouter(tags=["page"])


@router.get("/", include_in_schema=False)
def search_page() -> FileResponse:
    """The search page (HTML); it loads ``/static/page.js`` and ``/static/page.css``."""
    return FileResponse(
        STATIC_DIR / "index.html", media_type="text/html; charset=utf-8", headers=PAGE_HEADERS
    )


@router.get("/favicon.ico", include_in_schema=False)
def favicon() -> FileResponse:
    """The page's icon (SVG, which browsers take at this address too); no key, no data."""
    return FileResponse(
        STATIC_DIR / "favicon.svg", media_type="image/svg+xml", headers=PAGE_HEADERS
    )


class _StaticFiles(StaticFiles):
    """Static files with the page's headers, so ``/static/index.html`` is as strict as ``/``."""

    def file_response(self, *args: Any, **kwargs: Any) -> Response:
        response = super().file_response(*args, **kwargs)
        response.headers.update(PAGE_HEADERS)
        return response


def static_files() -> StaticFiles:
    """The page's script and style sheet, to mount at ``/static``."""
    return _StaticFiles(directory=STATIC_DIR)
