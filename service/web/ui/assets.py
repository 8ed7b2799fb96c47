"""The web view's static files (stylesheet, script), served under names that carry a hash of
their content so that browsers may cache them for a year: a new release is a new name."""

from __future__ import annotations

import hashlib
from dataclasses import dataclass
from importlib import resources

SOURCES = {"ui.css": "text/css; charset=utf-8", "ui.js": "text/javascript; charset=utf-8"}
CACHE_FOREVER = "public, max-age=31536000, immutable"


@dataclass(frozen=True)
class Asset:
    name: str  # the hashed name, e.g. ui.3f2a9c1d0b7e.css
    body: bytes
    media_type: str


def _load() -> tuple[dict[str, Asset], dict[str, str]]:
    by_hashed: dict[str, Asset] = {}
    url_of: dict[str, str] = {}
    folder = resources.files("service.web.ui") / "static"
    for source, media_type in SOURCES.items():
        body = (folder / source).read_bytes()
        stem, ext = source.rsplit(".", 1)
        hashed = f"{stem}.{hashlib.sha256(body).hexdigest()[:12]}.{ext}"
        by_hashed[hashed] = Asset(hashed, body, media_type)
        url_of[source] = f"/ui/static/{hashed}"
    return by_hashed, url_of


ASSETS, URL_OF = _load()
