"""The API docs pages (/docs: Swagger UI, /redoc: ReDoc) served from installed files only.

The assets come from the fastapi-offline package (Swagger UI and ReDoc bundles, their
licences in its distribution); no page asks anything of another host. Knows no routes."""

from __future__ import annotations

import functools
from pathlib import Path

import fastapi_offline
from fastapi import APIRouter, FastAPI
from fastapi.responses import HTMLResponse, Response
from fastapi.staticfiles import StaticFiles

ASSETS = Path(fastapi_offline.__file__).parent / "static"
ASSETS_URL = "/docs-assets"
TOKEN_KEY = "quaver.token"  # where the dashboard keeps the token (sessionStorage, web/api.js)

router = APIRouter(include_in_schema=False)
# Nothing from elsewhere, ever (the pages' own inline scripts and styles are allowed).
CSP = (
    "default-src 'self'; script-src 'self' 'unsafe-inline'; style-src 'self' 'unsafe-inline'; "
    "img-src 'self' data:; font-src 'self' data:; worker-src 'self' blob:; connect-src 'self'"
)

# The token the dashboard signed in with (same tab, same origin) goes on every request the
# docs make; without one, a service with tokens answers 401 and the page says so.
_TOKEN_JS = f"""
function quaverToken() {{
  try {{ return sessionStorage.getItem({TOKEN_KEY!r}); }} catch (e) {{ return null; }}
}}
function quaverHeaders() {{
  const t = quaverToken();
  return t ? {{Authorization: "Bearer " + t}} : {{}};
}}
function quaverSignInNote(el, status) {{
  el.textContent = status === 401
    ? "This service asks for a token: sign in on the dashboard (/) in this tab, then come back."
    : "Could not load /openapi.json (HTTP " + status + ").";
}}
"""


def _page(title: str, head: str, body: str) -> HTMLResponse:
    return HTMLResponse(
        f"""<!doctype html>
<html lang="en"><head><meta charset="utf-8"><title>{title}</title>
<meta http-equiv="Content-Security-Policy" content="{CSP}">
<link rel="icon" href="{ASSETS_URL}/favicon.png">{head}<script>{_TOKEN_JS}</script></head>
<body>{body}</body></html>"""
    )


REDOC_BADGE = b"https://cdn.redoc.ly/redoc/logo-mini.svg"  # ReDoc's menu badge image


@functools.cache
def _redoc_js() -> bytes:
    """The bundled ReDoc with its one image from elsewhere (the badge in its menu) pointed at
    our own icon instead, so the page makes no request beyond this service."""
    return (ASSETS / "redoc.standalone.js").read_bytes().replace(
        REDOC_BADGE, f"{ASSETS_URL}/favicon.png".encode()
    )


@router.get(f"{ASSETS_URL}/redoc.standalone.js")
def redoc_js() -> Response:
    return Response(_redoc_js(), media_type="text/javascript")


@router.get("/docs")
def swagger() -> HTMLResponse:
    return _page(
        "quaver API",
        f'<link rel="stylesheet" href="{ASSETS_URL}/swagger-ui.css">',
        f"""<div id="note"></div><div id="swagger-ui"></div>
<script src="{ASSETS_URL}/swagger-ui-bundle.js"></script>
<script>
window.addEventListener("load", () => {{
  SwaggerUIBundle({{
    url: "/openapi.json", dom_id: "#swagger-ui", deepLinking: true,
    validatorUrl: null,
    requestInterceptor: (req) => {{ Object.assign(req.headers, quaverHeaders()); return req; }},
    onComplete: () => {{}},
  }});
  fetch("/openapi.json", {{headers: quaverHeaders()}}).then((r) => {{
    if (!r.ok) quaverSignInNote(document.getElementById("note"), r.status);
  }});
}});
</script>""",
    )


@router.get("/redoc")
def redoc() -> HTMLResponse:
    return _page(
        "quaver API",
        "",
        f"""<div id="note"></div><div id="redoc"></div>
<script src="{ASSETS_URL}/redoc.standalone.js"></script>
<script>
fetch("/openapi.json", {{headers: quaverHeaders()}}).then(async (r) => {{
  if (!r.ok) {{ quaverSignInNote(document.getElementById("note"), r.status); return; }}
  Redoc.init(await r.json(), {{}}, document.getElementById("redoc"));
}});
</script>""",
    )


def mount(app: FastAPI) -> None:
    """Add the docs pages and their assets to ``app`` (built with docs_url=None); the routes
    go first, so the patched ReDoc is served instead of the file in the mount."""
    app.include_router(router)
    app.mount(ASSETS_URL, StaticFiles(directory=ASSETS), name="docs-assets")
