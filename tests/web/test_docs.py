"""/docs and /redoc work on a closed network: their pages name no other host and every asset
they load is served by Tallyward itself, from the fastapi-offline package."""

from __future__ import annotations

import re

import httpx
import pytest
from starlette.testclient import TestClient

from service.config import Settings
from service.web.app import create_app

# Every URL-looking reference in an HTML page: attributes, CSS url(), and quoted strings in
# its inline script (the Swagger UI set-up names the spec and asset URLs there).
REFERENCE = re.compile(r"""(?:src|href)\s*=\s*["']([^"']+)["']|url\(\s*["']?([^"')]+)|"""
                       r"""["']((?:[a-z][a-z0-9+.-]*:)?//[^"']+)["']""", re.IGNORECASE)


def references(html: str) -> list[str]:
    return [next(g for g in m.groups() if g) for m in REFERENCE.finditer(html)]


def external(ref: str) -> bool:
    """A reference that would make the browser contact another host."""
    return bool(re.match(r"^(?:[a-z][a-z0-9+.-]*:)?//", ref, re.IGNORECASE))


def test_reference_finder_sees_external_hosts() -> None:
    """The check below is not blind: a CDN script, a protocol-relative style sheet and a URL in
    inline script are all found and judged external."""
    html = ('<script src="https://cdn.example.net/x.js"></script>'
            "<link href='//fonts.example.org/a.css'><script>u = \"https://v.example/x\"</script>")
    refs = references(html)
    assert len(refs) == 3 and all(external(r) for r in refs)
    assert not external("/docs/assets/swagger-ui.css")


def test_docs_pages_reference_no_external_host() -> None:
    """The /docs and /redoc HTML load their scripts, style sheets and icons from /docs/assets
    on this server, the online validator is off, and no other host is named."""
    with TestClient(create_app(Settings(database_url="sqlite://"))) as c:
        r = c.get("/docs")
        assert r.status_code == 200 and r.headers["content-type"].startswith("text/html")
        refs = references(r.text)
        assert not [ref for ref in refs if external(ref)], refs
        assert {"/docs/assets/swagger-ui-bundle.js", "/docs/assets/swagger-ui.css"} <= set(refs)
        assert '"validatorUrl": null' in r.text
        r = c.get("/redoc")
        assert r.status_code == 200
        refs = references(r.text)
        assert not [ref for ref in refs if external(ref)], refs
        assert "/docs/assets/redoc.standalone.js" in refs


@pytest.mark.parametrize("page", ["/docs", "/redoc"])
def test_docs_assets_load_over_real_http(live_server, page) -> None:
    """Through a real server, every asset a documentation page references loads (200, right
    type, not empty), and so does the OpenAPI document it renders."""
    html = httpx.get(live_server.url + page)
    assert html.status_code == 200
    local = [ref for ref in references(html.text) if ref.startswith("/")]
    assert len(local) >= 2
    kinds = {".js": "javascript", ".css": "text/css", ".png": "image/png"}
    for ref in local:
        r = httpx.get(live_server.url + ref)
        assert r.status_code == 200 and len(r.content) > 100, ref
        suffix = next((s for s in kinds if ref.endswith(s)), None)
        if suffix:
            assert kinds[suffix] in r.headers["content-type"], (ref, r.headers["content-type"])
    spec = httpx.get(live_server.url + "/openapi.json")
    assert spec.status_code == 200 and spec.json()["info"]["title"] == "Tallyward"
