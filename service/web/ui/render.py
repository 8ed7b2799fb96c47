"""HTML of the web view: the page frame, escaping, and the small formatters the pages share.

Pages are built from Python strings; every value that comes from the database or a request
passes through :func:`h` (HTML escaping) before it reaches the page.
"""

from __future__ import annotations

import html
from collections.abc import Iterable
from datetime import UTC, datetime
from urllib.parse import urlencode
from zoneinfo import ZoneInfo

from service.web.ui.assets import URL_OF

CAUTION = ("Alerts are advisory statistical evidence: verify in the field before acting. "
           "Tallyward is not a safety system and never controls traffic devices; defer to local "
           "codes and licensed engineering judgment.")
NAV = (("network", "/ui/network", "Network"), ("alerts", "/ui/alerts?status=open", "Alerts"))
# Content-Security-Policy of every page: nothing from any other host, no inline script.
CSP = ("default-src 'self'; script-src 'self'; style-src 'self'; img-src 'self' data:; "
       "connect-src 'self'; form-action 'self'; frame-ancestors 'none'; base-uri 'none'")
PAGE_HEADERS = {"Content-Security-Policy": CSP, "Cache-Control": "no-store",
                "X-Content-Type-Options": "nosniff", "Referrer-Policy": "same-origin"}


def h(value: object) -> str:
    """Escape a value for HTML text or a quoted attribute (as ``html.escape`` with quotes)."""
    if value is None:
        return ""
    text = value if isinstance(value, str) else str(value)
    # Most values (ids, labels, numbers) hold nothing to escape: skip escape's five copies.
    if "&" in text or "<" in text or ">" in text or '"' in text or "'" in text:
        return html.escape(text, quote=True)
    return text


def query(**params: object) -> str:
    """A query string of the non-empty ``params`` (with its leading ``?``, or empty)."""
    kept = {k: v for k, v in params.items() if v not in (None, "")}
    return "?" + urlencode(kept) if kept else ""


def page(*, title: str, body: str, active: str = "", who: str | None = None,
         csrf: str | None = None) -> str:
    """A whole page: header with navigation and sign-out, the caution line, ``body`` in main."""
    nav = ""
    if who is not None:
        current = ' aria-current="page"'
        links = "".join(
            f'<li><a href="{href}"{current if key == active else ""}>{label}</a></li>'
            for key, href, label in NAV)
        nav = (f'<nav aria-label="Sections"><ul>{links}</ul></nav>'
               f'<div class="who"><span>Signed in as <strong>{h(who)}</strong></span>'
               f'<form method="post" action="/ui/logout"><input type="hidden" name="csrf" '
               f'value="{h(csrf)}"><button type="submit">Sign out</button></form></div>')
    return (
        '<!doctype html><html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        '<meta name="color-scheme" content="light dark">'
        f'<title>{h(title)} · Tallyward</title>'
        f'<link rel="stylesheet" href="{URL_OF["ui.css"]}">'
        f'<script src="{URL_OF["ui.js"]}" defer></script></head><body>'
        '<a class="skip" href="#main">Skip to content</a>'
        f'<header class="top"><span class="brand">Tallyward</span>{nav}</header>'
        f'<p class="caution" role="note">{h(CAUTION)}</p>'
        f'<main id="main" tabindex="-1"><h1>{h(title)}</h1>{body}</main>'
        '<footer><p>Tallyward operations view. The JSON API (<a href="/docs">/docs</a>) '
        'is the contract for other tools.</p></footer></body></html>')


def options(values: Iterable[str], selected: str | None, *, any_label: str = "any") -> str:
    out = [f'<option value=""{" selected" if not selected else ""}>{h(any_label)}</option>']
    for v in values:
        out.append(f'<option value="{h(v)}"{" selected" if v == selected else ""}>{h(v)}</option>')
    return "".join(out)


def local_time(epoch_s: float, timezone: str, *, with_date: bool = True) -> str:
    """``epoch_s`` on the wall clock of ``timezone`` (with its abbreviation)."""
    moment = datetime.fromtimestamp(epoch_s, ZoneInfo(timezone))
    return moment.strftime("%Y-%m-%d %H:%M %Z" if with_date else "%H:%M")


def parse_utc(text: str) -> float:
    return datetime.fromisoformat(text.replace("Z", "+00:00")).astimezone(UTC).timestamp()


def duration(seconds: float) -> str:
    """A short duration: 45 min, 3 h 05 min, 2 d 4 h."""
    minutes = int(max(0, seconds) // 60)
    if minutes < 60:
        return f"{minutes} min"
    hours, minutes = divmod(minutes, 60)
    if hours < 48:
        return f"{hours} h {minutes:02d} min"
    days, hours = divmod(hours, 24)
    return f"{days} d {hours} h"
