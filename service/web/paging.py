"""Opaque page cursors and CSV answers shared by the list routes.

A cursor names the query it belongs to and where the next page starts, as base64url JSON
followed by an HMAC-SHA256 tag (RFC 2104) over it. A cursor whose tag, encoding or fields do
not check out is refused with 422, never read as another position; a cursor used with other
filters than its own is refused too.

CSV answers (``Accept: text/csv``) follow RFC 4180 (CRLF line ends, a header line), and a
text cell that a spreadsheet would run as a formula (starting with ``=``, ``+``, ``-``, ``@``,
tab or carriage return) is prefixed with ``'`` (common practice, as the OWASP guidance on
CSV injection describes).
"""

from __future__ import annotations

import base64
import binascii
import csv
import hashlib
import hmac
import io
from collections.abc import Iterable, Sequence
from typing import Any

import orjson
from fastapi import Request, Response

from service.errors import ValidationFailed

CURSOR_VERSION = 1
TAG_BYTES = 16  # HMAC-SHA256 cut to 128 bits
MAX_CURSOR_CHARS = 1000
# The tag's key when TALLYWARD_PAGE_CURSOR_SECRET is unset: cursors are still checked for
# integrity (an edited one is refused), and the same on every process of one deployment.
DEFAULT_SECRET = b"tallyward page cursor v1"
CSV_MEDIA_TYPE = "text/csv; charset=utf-8"
FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")


def _secret(settings: Any) -> bytes:
    secret = getattr(settings, "page_cursor_secret", None)
    return secret.encode() if secret else DEFAULT_SECRET


def _b64(data: bytes) -> str:
    return base64.urlsafe_b64encode(data).rstrip(b"=").decode("ascii")


def _unb64(text: str) -> bytes:
    return base64.urlsafe_b64decode(text + "=" * (-len(text) % 4))


def encode_cursor(settings: Any, *, query: dict[str, Any], position: list[Any]) -> str:
    """A cursor for ``query`` (the filters) resuming at ``position``."""
    payload = orjson.dumps({"v": CURSOR_VERSION, "q": query, "p": position},
                           option=orjson.OPT_SORT_KEYS)
    tag = hmac.new(_secret(settings), payload, hashlib.sha256).digest()[:TAG_BYTES]
    return f"{_b64(payload)}.{_b64(tag)}"


def decode_cursor(settings: Any, cursor: str, *, query: dict[str, Any]) -> list[Any]:
    """The position a cursor resumes at; ``ValidationFailed`` if it was altered, is not one of
    ours, or belongs to a query with other filters."""
    invalid = ("cursor is not one this service issued (altered, cut, or from another "
               "deployment); pass the `next` value of the previous page unchanged, or start "
               "again without a cursor")
    if len(cursor) > MAX_CURSOR_CHARS or cursor.count(".") != 1:
        raise ValidationFailed(invalid)
    body, _, tag_text = cursor.partition(".")
    try:
        payload, tag = _unb64(body), _unb64(tag_text)
    except (binascii.Error, ValueError):
        raise ValidationFailed(invalid) from None
    expected = hmac.new(_secret(settings), payload, hashlib.sha256).digest()[:TAG_BYTES]
    if not hmac.compare_digest(tag, expected):
        raise ValidationFailed(invalid)
    try:
        doc = orjson.loads(payload)
    except orjson.JSONDecodeError:
        raise ValidationFailed(invalid) from None
    if not isinstance(doc, dict) or doc.get("v") != CURSOR_VERSION \
            or not isinstance(doc.get("p"), list):
        raise ValidationFailed(invalid)
    if doc.get("q") != query:
        raise ValidationFailed("cursor belongs to a query with other filters; repeat the "
                               "query that returned it (same detector_id, group, from, until) "
                               "with cursor=<next>")
    return doc["p"]


def wants_csv(request: Request) -> bool:
    """True when the Accept header prefers text/csv to JSON (RFC 9110 section 12.5.1 q-values)."""
    accept = request.headers.get("accept")
    if not accept:
        return False
    best: dict[str, float] = {}
    for part in accept.split(","):
        media, *params = [p.strip() for p in part.split(";")]
        q = 1.0
        for param in params:
            name, _, value = param.partition("=")
            if name.strip().lower() == "q":
                try:
                    q = float(value)
                except ValueError:
                    q = 0.0
        media = media.lower()
        best[media] = max(q, best.get(media, 0.0))
    csv_q = max(best.get("text/csv", 0.0), best.get("application/csv", 0.0))
    json_q = max(best.get("application/json", 0.0), best.get("*/*", 0.0),
                 best.get("application/*", 0.0))
    return csv_q > 0 and csv_q >= json_q


def safe_cell(value: Any) -> Any:
    """A cell as written to CSV: text that a spreadsheet would run as a formula gets a ``'``."""
    if isinstance(value, str) and value.startswith(FORMULA_STARTS):
        return "'" + value
    if value is None:
        return ""
    if isinstance(value, bool):
        return "true" if value else "false"
    return value


def csv_text(header: Sequence[str], rows: Iterable[Sequence[Any]]) -> bytes:
    """RFC 4180 CSV of ``rows`` under ``header``."""
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\r\n")
    writer.writerow(header)
    for row in rows:
        writer.writerow([safe_cell(v) for v in row])
    return out.getvalue().encode("utf-8")


def csv_response(body: bytes, *, filename: str, headers: dict[str, str] | None = None
                 ) -> Response:
    return Response(body, media_type=CSV_MEDIA_TYPE, headers={
        "Content-Disposition": f'attachment; filename="{filename}"', **(headers or {})})
