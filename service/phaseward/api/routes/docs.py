"""Interactive API documentation served from the installed package, never from elsewhere.

``/docs`` (Swagger UI) loads its script and styles from ``/docs-assets/``, which serves the
files shipped by the ``fastapi-offline`` package (MIT; it bundles Swagger UI under the Apache
License 2.0, which its licence file names), so the page works on a machine with no outside
network, like the operator page.
"""

from __future__ import annotations

from pathlib import Path
from typing import Final

import fastapi_offline
from fastapi import APIRouter, Request
from fastapi.openapi.docs import get_swagger_ui_html
from fastapi.responses import FileResponse, HTMLResponse

from phaseward.errors import NotFound

ASSET_DIR: Final = Path(fastapi_offline.__file__).resolve().parent / "static"
ASSETS: Final = {
    "swagger-ui-bundle.js": "text/javascript; charset=utf-8",
    "swagger-ui.css": "text/css; charset=utf-8",
    "favicon.png": "image/png",
}

router = APIRouter(include_in_schema=False)


def _root(request: Request) -> str:
    return str(request.scope.get("root_path", ""))


@router.get("/docs")
def swagger(request: Request) -> HTMLResponse:
    root = _root(request)
    return get_swagger_ui_html(
        openapi_url=f"{root}/openapi.json", title="phaseward API",
        swagger_js_url=f"{root}/docs-assets/swagger-ui-bundle.js",
        swagger_css_url=f"{root}/docs-assets/swagger-ui.css",
        swagger_favicon_url=f"{root}/docs-assets/favicon.png",
    )  # fmt: skip


@router.get("/docs-assets/{name}")
def asset(name: str) -> FileResponse:
    kind = ASSETS.get(name)
    if kind is None:
        raise NotFound(f"no documentation asset '{name}'", field="name")
    return FileResponse(
        ASSET_DIR / name, media_type=kind, headers={"Cache-Control": "max-age=3600"}
    )
