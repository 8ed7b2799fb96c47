"""The application factory: routers, middleware, error handlers."""

from __future__ import annotations

import logging
import time
import uuid
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from typing import Any

import orjson
from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import Response
from sqlalchemy import Engine
from sqlalchemy.exc import OperationalError
from starlette.exceptions import HTTPException as StarletteHTTPException
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from . import __version__, logs, openapi
from .alerting import Scorer, mark_dirty
from .api import alerts, baselines, counts, detectors, health
from .config import Settings, get_settings
from .db import make_engine
from .errors import TallywardError, Unavailable

log = logging.getLogger("tallyward.http")

DESCRIPTION = """Tallyward ingests vehicle-detector interval counts, learns each detector's
time-of-day rhythm, and raises advisory alerts for likely detector faults, traffic events and
communications loss. Alerts are statistical evidence, not proof: verify in the field before
acting; never use Tallyward as a safety system or to control traffic devices."""


def _json(status: int, body: dict[str, Any], headers: dict[str, str] | None = None) -> Response:
    return Response(orjson.dumps(body), status_code=status, media_type="application/json",
                    headers=headers)


class BodyLimit:
    """Rejects bodies over the limit with 413 before they are parsed, chunked ones included."""

    def __init__(self, app: ASGIApp, max_bytes: int) -> None:
        self.app = app
        self.max_bytes = max_bytes

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
        if scope.get("method") not in ("POST", "PUT", "PATCH"):
            await self.app(scope, receive, send)
            return
        # Read the body up to the limit before the app sees it, so chunked bodies without a
        # Content-Length are refused as early as declared ones.
        parts: list[bytes] = []
        seen = 0
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
        request_id = next((v.decode("latin-1") for k, v in scope.get("headers", [])
                           if k == b"x-request-id"), None) or uuid.uuid4().hex[:16]
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
        scorer = None
        if settings.scoring == "inline":
            scorer = Scorer(engine, settings).start()
            app.state.after_commit = lambda _result: scorer.wake.set()
        try:
            yield
        finally:
            if scorer is not None:
                scorer.stop()

    app = FastAPI(title="Tallyward", version=__version__, description=DESCRIPTION,
                  docs_url="/docs", openapi_url="/openapi.json", lifespan=lifespan)
    app.state.settings = settings
    app.state.engine = engine
    app.state.after_store = mark_dirty
    app.state.after_commit = None

    @app.exception_handler(TallywardError)
    async def _tallyward_error(_: Request, exc: TallywardError) -> Response:
        headers = None
        if isinstance(exc, Unavailable):
            headers = {"Retry-After": str(exc.retry_after_s)}
        return _json(exc.status_code, exc.to_dict(), headers)

    @app.exception_handler(RequestValidationError)
    async def _validation_error(_: Request, exc: RequestValidationError) -> Response:
        problems = []
        for err in exc.errors():
            where = ".".join(str(p) for p in err.get("loc", ()) if p != "body")
            problems.append({"field": where, "message": err.get("msg", "invalid")})
        text = "; ".join(f"{p['field']}: {p['message']}" if p["field"] else p["message"]
                         for p in problems)
        return _json(422, {"error": "validation_failed", "message": text, "detail": problems})

    @app.exception_handler(StarletteHTTPException)
    async def _http_error(request: Request, exc: StarletteHTTPException) -> Response:
        code = {404: "not_found", 405: "method_not_allowed"}.get(exc.status_code, "http_error")
        return _json(exc.status_code, {"error": code, "message": str(exc.detail)},
                     openapi.error_headers(request, exc))

    @app.exception_handler(OperationalError)
    async def _db_down(_: Request, exc: OperationalError) -> Response:
        log.warning("database unavailable", extra={"fields": {"error": str(exc.orig)[:200]}})
        return _json(503, {"error": "unavailable",
                           "message": "the database is busy or unreachable; retry shortly"},
                     {"Retry-After": "2"})

    app.include_router(health.router)
    app.include_router(detectors.import_router)
    app.include_router(detectors.router)
    app.include_router(counts.router)
    app.include_router(baselines.router)
    app.include_router(alerts.router)
    app.include_router(alerts.detector_router)
    openapi.document(app)
    app.add_middleware(AccessLog)
    app.add_middleware(BodyLimit, max_bytes=settings.max_body_bytes)
    return app


def app_from_env() -> FastAPI:
    """Entry point for ``uvicorn --factory service.main:app_from_env``."""
    return create_app(get_settings())
