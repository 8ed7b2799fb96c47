"""The application factory: routers, middleware, error handlers."""

from __future__ import annotations

import logging
import re
import time
import uuid
from collections.abc import AsyncIterator, Iterable, Iterator
from contextlib import asynccontextmanager
from typing import Any

import anyio
import orjson
from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import Response
from fastapi.routing import APIRoute
from sqlalchemy import Engine
from sqlalchemy.exc import OperationalError
from starlette.exceptions import HTTPException as StarletteHTTPException
from starlette.routing import Match
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from service import __version__, logs
from service.config import Settings, get_settings
from service.domain import CONTROL_CHARACTERS, DETECTOR_ID_PATTERN, detector_id_error
from service.errors import Forbidden, TallywardError, Unauthorized, Unavailable
from service.pipeline.score import mark_dirty
from service.pipeline.worker import Worker, default_tasks, one_blas_thread, refits_enabled
from service.store.engine import make_engine
from service.web import docs, metrics, openapi
from service.web.deps import PRINCIPAL_SCOPE_KEY, check_permission, identify
from service.web.routes import alerts, baselines, corrections, counts, detectors, health, jobs
from service.web.routes import figures as planners
from service.web.ui import install as install_ui

log = logging.getLogger("tallyward.http")
WRITE_METHODS = frozenset({"POST", "PUT", "PATCH"})
# A client's X-Request-Id is echoed only when it is short and plain; otherwise a new one is made.
REQUEST_ID = re.compile(rb"[A-Za-z0-9._-]{1,64}")
WWW_AUTHENTICATE = 'Bearer realm="tallyward"'
UI_PREFIX = "/ui/"

DESCRIPTION = """Tallyward ingests vehicle-detector interval counts, learns each detector's
time-of-day rhythm, and raises advisory alerts for likely detector faults, traffic events and
communications loss. Alerts are statistical evidence, not proof: verify in the field before
acting; never use Tallyward as a safety system or to control traffic devices."""


def _json(status: int, body: dict[str, Any], headers: dict[str, str] | None = None) -> Response:
    return Response(orjson.dumps(body), status_code=status, media_type="application/json",
                    headers=headers)


class KeyBeforeBody:
    """Checks the API key, and the route's role, of a POST/PUT/PATCH before any of its body
    is read: a caller without a valid key gets 401 (403 for the wrong role) and the
    connection is closed with the body unread. The principal is handed to the route."""

    def __init__(self, app: ASGIApp) -> None:
        self.app = app
        self._permissions: list[tuple[Any, str]] | None = None

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if (scope["type"] != "http" or scope.get("method") not in WRITE_METHODS
                or scope.get("path", "").startswith(UI_PREFIX)):
            # The web view's forms authenticate by session cookie and CSRF token (service.web.ui).
            await self.app(scope, receive, send)
            return
        state = scope["app"].state
        headers = scope.get("headers", [])
        authorization = next((v.decode("latin-1") for k, v in headers if k == b"authorization"),
                             None)
        client = scope.get("client")
        names = frozenset(k.decode("latin-1") for k, _ in headers)
        try:
            if authorization is None:
                principal = identify(state.settings, state.engine, authorization=None,
                                     client=client[0] if client else None, header_names=names)
            else:
                principal = await anyio.to_thread.run_sync(lambda: identify(
                    state.settings, state.engine, authorization=authorization,
                    client=client[0] if client else None, header_names=names))
            permission = self._permission(scope)
            if permission is not None:
                check_permission(principal, permission)
        except (Unauthorized, Forbidden) as exc:
            extra = {"WWW-Authenticate": WWW_AUTHENTICATE} if isinstance(exc, Unauthorized) else {}
            await _json(exc.status_code, exc.to_dict(),
                        {"Connection": "close", **extra})(scope, receive, send)
            return
        except OperationalError as exc:
            await _db_unavailable(exc)(scope, receive, send)
            return
        await self.app({**scope, PRINCIPAL_SCOPE_KEY: principal}, receive, send)

    def _permission(self, scope: Scope) -> str | None:
        """The permission the matching route requires (from its ``require`` dependency)."""
        if self._permissions is None:
            self._permissions = [(route, perm) for route in _api_routes(scope["app"].routes)
                                 if (perm := _route_permission(route.dependant))]
        for route, permission in self._permissions:
            match, _ = route.matches(scope)
            if match == Match.FULL:
                return permission
        return None


def _api_routes(routes: Iterable[Any]) -> Iterator[APIRoute]:
    for route in routes:
        if isinstance(route, APIRoute):
            yield route
        inner = getattr(route, "original_router", None)  # newer FastAPI wraps included routers
        if inner is not None:
            yield from _api_routes(inner.routes)


def _route_permission(dependant: Any) -> str | None:
    for dep in dependant.dependencies:
        found = getattr(dep.call, "permission", None) or _route_permission(dep)
        if found:
            return found
    return None


class BodyLimit:
    """Reads a POST/PUT/PATCH body in full before the app sees it: over the limit is 413
    (chunked bodies included), and a body that does not arrive within the deadline is 408."""

    def __init__(self, app: ASGIApp, max_bytes: int, timeout_s: float) -> None:
        self.app = app
        self.max_bytes = max_bytes
        self.timeout_s = timeout_s

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        limit = self.max_bytes
        for name, value in scope.get("headers", []):
            if name == b"content-length":
                try:
                    declared = int(value)
                except ValueError:
                    declared = -1
                if declared > limit or declared < 0:
                    await self._reject(scope, receive, send, declared)
                    return
        if scope.get("method") not in WRITE_METHODS:
            await self.app(scope, receive, send)
            return
        # Read the body up to the limit before the app sees it, so chunked bodies without a
        # Content-Length are refused as early as declared ones.
        parts: list[bytes] = []
        seen = 0
        try:
            with anyio.fail_after(self.timeout_s):
                while True:
                    message = await receive()
                    if message["type"] == "http.disconnect":
                        return
                    chunk = message.get("body", b"")
                    seen += len(chunk)
                    if seen > limit:
                        await self._reject(scope, receive, send, seen, streamed=True)
                        return
                    parts.append(chunk)
                    if not message.get("more_body", False):
                        break
        except TimeoutError:
            await _json(408, {"error": "request_timeout",
                              "message": f"the request body did not arrive within "
                                         f"{self.timeout_s:g} seconds ({seen:,} bytes received); "
                                         "send it in one go, or smaller batches",
                              "detail": {"body_timeout_s": self.timeout_s}},
                        headers={"Connection": "close"})(scope, receive, send)
            return
        body = b"".join(parts)
        delivered = False

        async def replay() -> Message:
            nonlocal delivered
            if not delivered:
                delivered = True
                return {"type": "http.request", "body": body, "more_body": False}
            return await receive()

        await self.app(scope, replay, send)

    async def _reject(self, scope: Scope, receive: Receive, send: Send, declared: int, *,
                      streamed: bool = False) -> None:
        size = f"more than {self.max_bytes:,} bytes" if streamed else f"{declared:,} bytes"
        message = (f"request body of {size} is over the {self.max_bytes:,}-byte limit; "
                   "send smaller batches") if declared >= 0 else "Content-Length is not a number"
        status = 413 if declared >= 0 else 400
        response = _json(status, {"error": "payload_too_large" if status == 413 else "bad_request",
                                  "message": message, "detail": {"max_body_bytes": self.max_bytes}},
                         headers={"Connection": "close"})
        await response(scope, receive, send)


def _db_unavailable(exc: OperationalError) -> Response:
    log.warning("database unavailable", extra={"fields": {"error": str(exc.orig)[:200]}})
    return _json(503, {"error": "unavailable",
                       "message": "the database is busy or unreachable; retry shortly"},
                 {"Retry-After": str(Unavailable.retry_after_s)})


class AccessLog:
    """One JSON log line per request, an X-Request-Id on every response, and a JSON 500 for
    anything unhandled (a plain ASGI middleware: no extra task or body copy per request)."""

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        started = time.perf_counter()
        offered = next((v for k, v in scope.get("headers", []) if k == b"x-request-id"), None)
        request_id = (offered.decode("ascii") if offered and REQUEST_ID.fullmatch(offered)
                      else uuid.uuid4().hex[:16])
        status = 500
        sent = False

        async def tagged(message: Message) -> None:
            nonlocal status, sent
            if message["type"] == "http.response.start":
                status = message["status"]
                sent = True
                message = {**message, "headers": [*message.get("headers", []),
                                                  (b"x-request-id", request_id.encode())]}
            await send(message)

        try:
            await self.app(scope, receive, tagged)
        except Exception:
            log.exception("unhandled error", extra={"fields": {"path": scope.get("path"),
                                                               "request_id": request_id}})
            if not sent:
                await _json(500, {"error": "internal_error",
                                  "message": "an unexpected error; it has been logged",
                                  "request_id": request_id})(scope, receive, tagged)
        log.info("request", extra={"fields": {
            "method": scope.get("method"), "path": scope.get("path"), "status": status,
            "ms": round((time.perf_counter() - started) * 1000, 2), "request_id": request_id}})


def create_app(settings: Settings | None = None, *, engine: Engine | None = None) -> FastAPI:
    settings = settings or get_settings()
    logs.configure(settings.log_level)
    engine = engine or make_engine(settings)

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        # Inline (the one-process set-up): this process runs the worker loop in a thread.
        # 'worker' or 'off': no background thread; `tallyward worker` processes do the work.
        runner = None
        if settings.scoring == "inline":
            one_blas_thread()  # fits in this process at `tallyward fit`'s speed
            runner = Worker(default_tasks(engine, settings, refits=refits_enabled(
                settings, in_worker=False)), name="tallyward-inline").start()
            app.state.after_commit = lambda _result: runner.wake.set()
        try:
            yield
        finally:
            if runner is not None:
                runner.stop()

    # /docs and /redoc from bundled assets: nothing loads from another host
    app = docs.offline_app(title="Tallyward", version=__version__, description=DESCRIPTION,
                           openapi_url="/openapi.json", lifespan=lifespan)
    app.state.settings = settings
    app.state.engine = engine
    app.state.after_store = mark_dirty
    app.state.after_commit = None

    @app.exception_handler(TallywardError)
    async def _tallyward_error(_: Request, exc: TallywardError) -> Response:
        headers = None
        if isinstance(exc, Unavailable):
            headers = {"Retry-After": str(exc.retry_after_s)}
        elif isinstance(exc, Unauthorized):
            headers = {"WWW-Authenticate": WWW_AUTHENTICATE}
        return _json(exc.status_code, exc.to_dict(), headers)

    @app.exception_handler(RequestValidationError)
    async def _validation_error(_: Request, exc: RequestValidationError) -> Response:
        problems = []
        for err in exc.errors():
            where = ".".join(str(p) for p in err.get("loc", ()) if p != "body")
            message = err.get("msg", "invalid")
            if (err.get("ctx") or {}).get("pattern") == DETECTOR_ID_PATTERN:
                message = detector_id_error(str(err.get("input", ""))) or message
            problems.append({"field": where, "message": message})
        text = "; ".join(f"{p['field']}: {p['message']}" if p["field"] else p["message"]
                         for p in problems)
        return _json(422, {"error": "validation_failed", "message": text, "detail": problems})

    @app.exception_handler(StarletteHTTPException)
    async def _http_error(request: Request, exc: StarletteHTTPException) -> Response:
        code = {404: "not_found", 405: "method_not_allowed"}.get(exc.status_code, "http_error")
        message = str(exc.detail)
        where = f"{request.method} {CONTROL_CHARACTERS.sub('?', request.url.path[:200])}"
        if exc.status_code == 404:
            message = (f"no such route: {where}; the routes are listed at /docs "
                       "(OpenAPI document: /openapi.json)")
        headers = openapi.error_headers(request, exc)
        if exc.status_code == 405:
            allowed = next((v for k, v in (headers or {}).items() if k.lower() == "allow"), None)
            methods = f" (this path takes {allowed})" if allowed else ""
            message = (f"method not allowed: {where}{methods}; the routes and their methods "
                       "are listed at /docs")
        return _json(exc.status_code, {"error": code, "message": message}, headers)

    @app.exception_handler(OperationalError)
    async def _db_down(_: Request, exc: OperationalError) -> Response:
        return _db_unavailable(exc)

    app.include_router(health.router)
    app.include_router(detectors.import_router)
    app.include_router(detectors.router)
    app.include_router(corrections.router)
    app.include_router(counts.router)
    app.include_router(baselines.router)
    app.include_router(alerts.router)
    app.include_router(alerts.detector_router)
    app.include_router(jobs.router)
    app.include_router(planners.router)
    install_ui(app)  # the operations web view under /ui/ (and / redirecting there)
    # Outermost last: every answer (401, 408, 413 included) gets a request id and a log line,
    # and the key is checked before the body is read.
    app.add_middleware(BodyLimit, max_bytes=settings.max_body_bytes,
                       timeout_s=settings.http_body_timeout_s)
    app.add_middleware(KeyBeforeBody)
    openapi.document(app)
    metrics.install(app, settings, engine)  # GET /metrics and the request timer
    app.add_middleware(AccessLog)
    return app


def app_from_env() -> FastAPI:
    """Entry point for ``uvicorn --factory service.web.app:app_from_env``."""
    return create_app(get_settings())
