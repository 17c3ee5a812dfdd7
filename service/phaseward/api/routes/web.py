"""The operator page: static files shipped inside the package, served by the service itself.

``/`` and ``/rails/{rail_id}`` answer with the page (the script reads the path and draws the
overview or one rail); ``/static/{name}`` serves the page's own assets from an allowlist, so
nothing outside ``api/web/`` can be named. Every asset comes from this service: the page's
Content-Security-Policy forbids any other origin.
"""

from __future__ import annotations

from pathlib import Path
from typing import Final

from fastapi import APIRouter
from fastapi.responses import FileResponse

from phaseward.api.routes.rails import RailId
from phaseward.errors import NotFound

WEB_DIR: Final = Path(__file__).resolve().parent.parent / "web"

CONTENT_TYPES: Final = {
    ".html": "text/html; charset=utf-8",
    ".js": "text/javascript; charset=utf-8",
    ".css": "text/css; charset=utf-8",
    ".svg": "image/svg+xml",
}

# Only this service: no CDN, no external fonts, no outside connections, no framing.
CSP: Final = (
    "default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self' data:; "
    "connect-src 'self'; font-src 'self'; base-uri 'none'; form-action 'self'; "
    "frame-ancestors 'none'"
)
_PAGE_HEADERS: Final = {
    "Content-Security-Policy": CSP,
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "no-referrer",
    "Cache-Control": "no-cache",
}
_ASSET_HEADERS: Final = {"X-Content-Type-Options": "nosniff", "Cache-Control": "no-cache"}

router = APIRouter(tags=["operator page"], include_in_schema=False)


def _assets() -> dict[str, Path]:
    """The servable files by name: the web directory's files with a known content type (none
    when the package was installed without them; the API then serves on without the page)."""
    if not WEB_DIR.is_dir():
        return {}
    return {
        p.name: p
        for p in sorted(WEB_DIR.iterdir())
        if p.is_file() and p.suffix in CONTENT_TYPES and p.name != "index.html"
    }


ASSETS: Final = _assets()


def _page() -> FileResponse:
    if not (WEB_DIR / "index.html").is_file():
        raise NotFound("the operator page is not installed with this package", field="path")
    return FileResponse(
        WEB_DIR / "index.html", media_type=CONTENT_TYPES[".html"], headers=_PAGE_HEADERS
    )


@router.get("/")
def overview_page() -> FileResponse:
    return _page()


@router.get("/rails/{rail_id}")
def rail_page(rail_id: RailId) -> FileResponse:
    """The page for one rail (the script fetches the rail; an unknown id shows as such)."""
    return _page()


@router.get("/static/{name}")
def asset(name: str) -> FileResponse:
    path = ASSETS.get(name)
    if path is None:
        raise NotFound(f"no asset '{name}'", field="name")
    return FileResponse(path, media_type=CONTENT_TYPES[path.suffix], headers=_ASSET_HEADERS)
