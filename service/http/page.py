"""The live page at ``GET /``: one HTML file, one script and one style sheet, served by the service itself.

The files live in ``service/http/static/`` and ship in the wheel. The page draws its charts as
hand-written SVG (no chart library, no network beyond the service) from ``GET /v1/health``, which
it polls every two seconds; after a failed poll it says so and keeps polling, so it recovers by
itself when the service comes back. A Content-Security-Policy that allows only the service's own
origin backs the "no other host" rule in the browser itself. The page asks for no token to read
unless ``service.token_for_reads`` is set; operator actions (rollback, checkpoint) always need it,
and the page keeps it only in a variable of the tab (never in storage or a cookie).
"""

from __future__ import annotations

from importlib.resources import files

from aiohttp import web

__all__ = ["ASSETS", "page", "page_asset", "page_weight"]

_STATIC = files("service.http") / "static"
_TYPES = {".html": "text/html", ".js": "text/javascript", ".css": "text/css"}
#: the page's files by the name they are served under (``/`` is ``index.html``)
ASSETS = {name: (_STATIC / name).read_bytes() for name in ("index.html", "trimtab-page.js", "trimtab-page.css")}

_HEADERS = {
    # only this origin, for everything: no CDN, no font host, no beacon can be reached from the page
    "Content-Security-Policy": ("default-src 'none'; script-src 'self'; style-src 'self'; connect-src 'self'; "
                                "img-src 'self' data:; base-uri 'none'; form-action 'none'; frame-ancestors 'none'"),
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "no-referrer",
    "Cache-Control": "no-cache",
}


def page_weight() -> int:
    """Bytes of HTML, script and style the page loads (uncompressed)."""
    return sum(len(b) for b in ASSETS.values())


def _answer(name: str) -> web.Response:
    suffix = name[name.rfind("."):]
    return web.Response(body=ASSETS[name], content_type=_TYPES[suffix], charset="utf-8", headers=_HEADERS)


async def page(request: web.Request) -> web.Response:
    """``GET /``: the page (it holds no data; the data comes from ``/v1/health``)."""
    return _answer("index.html")


async def page_asset(request: web.Request) -> web.Response:
    """``GET /page/{name}``: the page's script and style sheet."""
    name = request.match_info["name"]
    if name not in ASSETS or name == "index.html":
        raise web.HTTPNotFound(text=f"no page file {name!r} (there are {', '.join(sorted(ASSETS))})")
    return _answer(name)
