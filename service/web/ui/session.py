"""Sessions of the web view: a person signs in with an API key once; the browser then holds a
signed session cookie, never the key.

The cookie names the key (by its row id, not its secret), a random nonce and the time of the
last page request, signed with HMAC-SHA256. Every request checks the signature, the idle time
(``TALLYWARD_UI_SESSION_IDLE_S``) and that the key is still active, so revoking a key ends its
sessions at once. Forms that change state carry a CSRF token derived from the session's nonce
(a token without the session cookie, or a cookie without the token, is refused).
"""

from __future__ import annotations

import base64
import hashlib
import hmac
import secrets
import time
from dataclasses import dataclass

from fastapi import Request
from starlette.responses import Response

from service.store.keys import Principal
from service.store.overview import session_principal

COOKIE = "tw_session"
REFRESH_AFTER_S = 60  # re-issue the cookie (sliding idle expiry) at most once a minute


class SignInNeeded(Exception):
    """No valid session: a page answers with a redirect to the sign-in form."""


class CsrfRefused(Exception):
    """A state-changing form arrived without the session's CSRF token."""


def _b64(raw: bytes) -> str:
    return base64.urlsafe_b64encode(raw).rstrip(b"=").decode("ascii")


def _sign(secret: bytes, text: str) -> str:
    return _b64(hmac.new(secret, text.encode("ascii"), hashlib.sha256).digest())


def secret_of(request: Request) -> bytes:
    return request.app.state.ui_secret


@dataclass(frozen=True)
class Session:
    """A signed-in person: their key's principal, and what the cookie carries."""

    principal: Principal
    key_id: int
    nonce: str
    last_seen_s: int
    secret: bytes
    idle_s: int
    secure: bool

    @property
    def csrf(self) -> str:
        return _sign(self.secret, f"csrf.{self.key_id}.{self.nonce}")

    def may(self, permission: str) -> bool:
        return self.principal.may(permission)

    def check_csrf(self, token: str | None) -> None:
        if not token or not hmac.compare_digest(token, self.csrf):
            raise CsrfRefused("the form's CSRF token is missing or does not match this session")

    def keep_alive(self, response: Response) -> Response:
        """Re-issue the cookie (new last-seen time) when the old one is over a minute old."""
        now = int(time.time())
        if now - self.last_seen_s >= REFRESH_AFTER_S:
            set_cookie(response, cookie_value(self.secret, self.key_id, self.nonce, now),
                       idle_s=self.idle_s, secure=self.secure)
        return response


def cookie_value(secret: bytes, key_id: int, nonce: str, last_seen_s: int) -> str:
    body = f"{key_id}.{nonce}.{last_seen_s}"
    return f"{body}.{_sign(secret, body)}"


def new_cookie_value(secret: bytes, key_id: int) -> str:
    return cookie_value(secret, key_id, secrets.token_urlsafe(16).replace(".", "_"),
                        int(time.time()))


def is_https(request: Request) -> bool:
    return request.url.scheme == "https"


def set_cookie(response: Response, value: str, *, idle_s: int, secure: bool) -> None:
    response.set_cookie(COOKIE, value, max_age=idle_s, path="/ui", httponly=True,
                        samesite="strict", secure=secure)


def clear_cookie(response: Response, *, secure: bool) -> None:
    response.delete_cookie(COOKIE, path="/ui", httponly=True, samesite="strict", secure=secure)


def read_session(request: Request) -> Session | None:
    """The request's valid session, or None (no cookie, bad signature, idle too long, or the
    key revoked). Runs a database query: call it from a worker thread."""
    raw = request.cookies.get(COOKIE)
    if not raw or len(raw) > 300:
        return None
    parts = raw.split(".")
    if len(parts) != 4:
        return None
    key_text, nonce, seen_text, signature = parts
    secret = secret_of(request)
    if not hmac.compare_digest(signature, _sign(secret, f"{key_text}.{nonce}.{seen_text}")):
        return None
    try:
        key_id, last_seen_s = int(key_text), int(seen_text)
    except ValueError:
        return None
    idle_s = request.app.state.settings.ui_session_idle_s
    if time.time() - last_seen_s > idle_s:
        return None
    principal = session_principal(request.app.state.engine, key_id)
    if principal is None:
        return None
    return Session(principal, key_id, nonce, last_seen_s, secret, idle_s, is_https(request))


def require_session(request: Request) -> Session:
    session = read_session(request)
    if session is None:
        raise SignInNeeded(request.url.path)
    return session
