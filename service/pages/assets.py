"""The status page's static files (``service/static``): served at ``/static/NAME`` and inlined
into the self-contained HTML report.

Only the files listed in ``ASSETS`` are served, read once from the package; each URL carries a
hash of the content (``?v=...``), so a browser may keep it for a year and a new release is
fetched anew. uPlot (MIT, ``uPlot.LICENSE``) is the charting library, vendored from its npm
package so that nothing is fetched from elsewhere.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass
from functools import cache
from importlib import resources

from fastapi import APIRouter
from fastapi.responses import Response

from ..problems import ProblemError

ASSETS = {
    "uPlot.iife.min.js": "text/javascript; charset=utf-8",
    "uPlot.min.css": "text/css; charset=utf-8",
    "uPlot.LICENSE": "text/plain; charset=utf-8",
    "status.js": "text/javascript; charset=utf-8",
}
SCRIPTS = ("uPlot.iife.min.js", "status.js")
STYLESHEETS = ("uPlot.min.css",)
IMMUTABLE = "public, max-age=31536000, immutable"

router = APIRouter(tags=["pages"], include_in_schema=False)


@dataclass(frozen=True, slots=True)
class Asset:
    name: str
    body: bytes
    media_type: str
    digest: str

    @property
    def url(self) -> str:
        return f"/static/{self.name}?v={self.digest}"

    @property
    def text(self) -> str:
        return self.body.decode("utf-8")


@cache
def asset(name: str) -> Asset:
    """The packaged file ``name`` (one of ``ASSETS``); ``KeyError`` for any other name."""
    media_type = ASSETS[name]
    body = resources.files("service").joinpath("static", name).read_bytes()
    return Asset(name, body, media_type, hashlib.sha256(body).hexdigest()[:16])


def script_urls() -> list[str]:
    return [asset(name).url for name in SCRIPTS]


def stylesheet_urls() -> list[str]:
    return [asset(name).url for name in STYLESHEETS]


@router.get("/static/{name}")
def static_file(name: str, v: str | None = None) -> Response:
    """A listed static file; cached for a year when asked for by its current hash."""
    if name not in ASSETS:
        raise ProblemError(404, f"There is no static file {name!r}.")
    found = asset(name)
    cache_control = IMMUTABLE if v == found.digest else "public, max-age=300"
    return Response(found.body, media_type=found.media_type,
                    headers={"Cache-Control": cache_control, "ETag": f'"{found.digest}"',
                             "X-Content-Type-Options": "nosniff"})
