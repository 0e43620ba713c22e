"""The API documentation page, /docs: Swagger UI, its script and styles served by the service.

The assets come from the swagger-ui-bundle-v2 package (installed with the service), so the page
renders on a network that reaches nothing but the service itself, and a visitor's browser asks no
third party for anything. Only the three files the page uses are served.
"""

from __future__ import annotations

from fastapi import FastAPI
from fastapi.openapi.docs import get_swagger_ui_html
from starlette.responses import FileResponse, HTMLResponse
from swagger_ui_bundle import swagger_ui_path

from .errors import NotFound

ASSETS_PATH = "/docs/assets"
_ASSETS = {
    "swagger-ui-bundle.js": "text/javascript; charset=utf-8",
    "swagger-ui.css": "text/css; charset=utf-8",
    "favicon-32x32.png": "image/png",
}
# An hour: the files change only when the service is upgraded.
_CACHE = "public, max-age=3600"


def install_docs(app: FastAPI) -> None:
    """Serve /docs and its assets; the app must be built with ``docs_url=None, redoc_url=None``."""
    openapi_url = app.openapi_url or "/openapi.json"

    @app.get("/docs", include_in_schema=False)
    async def docs_page() -> HTMLResponse:
        return get_swagger_ui_html(
            openapi_url=openapi_url,
            title=f"{app.title} {app.version}: API",
            swagger_js_url=f"{ASSETS_PATH}/swagger-ui-bundle.js",
            swagger_css_url=f"{ASSETS_PATH}/swagger-ui.css",
            swagger_favicon_url=f"{ASSETS_PATH}/favicon-32x32.png",
            # Swagger UI would otherwise send the document to a public validator for its badge.
            swagger_ui_parameters={"validatorUrl": None, "tryItOutEnabled": False},
        )

    @app.get(f"{ASSETS_PATH}/{{name}}", include_in_schema=False)
    async def docs_asset(name: str) -> FileResponse:
        media_type = _ASSETS.get(name)
        if media_type is None:
            raise NotFound(f"no documentation asset {name!r}")
        return FileResponse(
            str(swagger_ui_path / name), media_type=media_type, headers={"Cache-Control": _CACHE}
        )
