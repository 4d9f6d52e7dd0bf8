"""``/docs``: the interactive API documentation, served from files shipped with the package.

The Swagger UI assets come from the ``swagger-ui-bundle-v2`` package (Swagger UI 5, which
reads OpenAPI 3.1; Apache-2.0, its licence ships in the package's metadata), so the page works
on a network without internet access: nothing is loaded from a CDN, and the online validator
badge is switched off.
"""

from __future__ import annotations

from pathlib import Path

from fastapi import APIRouter, FastAPI
from fastapi.openapi.docs import get_swagger_ui_html
from fastapi.responses import HTMLResponse
from fastapi.staticfiles import StaticFiles

router = APIRouter()

#: Where the page's assets are served.
ASSETS_URL = "/docs/assets"


def assets_dir() -> Path:
    """The packaged Swagger UI folder (``swagger-ui-bundle.js``, ``swagger-ui.css``, icons)."""
    import swagger_ui_bundle

    return Path(str(swagger_ui_bundle.swagger_ui_path))


def mount_assets(app: FastAPI) -> None:
    app.mount(ASSETS_URL, StaticFiles(directory=assets_dir()), name="docs-assets")


@router.get("/docs", include_in_schema=False)
async def docs_page() -> HTMLResponse:
    return get_swagger_ui_html(
        openapi_url="/openapi.json",
        title="dueroute API",
        swagger_js_url=f"{ASSETS_URL}/swagger-ui-bundle.js",
        swagger_css_url=f"{ASSETS_URL}/swagger-ui.css",
        swagger_favicon_url=f"{ASSETS_URL}/favicon-32x32.png",
        swagger_ui_parameters={"validatorUrl": None},
    )
