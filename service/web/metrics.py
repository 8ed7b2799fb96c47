"""``GET /metrics``: the service's own figures in the Prometheus text format (prometheus-client).

Each app has its own ``CollectorRegistry``, so several apps in one process (tests, several
services embedded in one program) never share or collide on series. Figures kept in this
process: counts stored by outcome and rejected by reason, request latency by route template,
fit durations. Figures read from the database when scraped (a custom collector): scoring
backlog and lag, open alerts by kind and cause, detectors by service state. With several
``tallyward serve --workers`` processes each process answers for its own requests and counts
(scrape each, or sum them); the database figures are the same in every process.

Access follows the API key rules (role ``read``), unless ``TALLYWARD_METRICS_PUBLIC=true``.
"""

from __future__ import annotations

import time
from collections.abc import Iterable, Iterator
from typing import Any

from fastapi import APIRouter, FastAPI, Request, Response
from prometheus_client import CollectorRegistry, Counter, Histogram, Info
from prometheus_client.core import GaugeMetricFamily, Metric, SummaryMetricFamily
from prometheus_client.exposition import choose_encoder
from sqlalchemy import Engine
from sqlalchemy.exc import SQLAlchemyError
from starlette.routing import Match
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from service import __version__
from service.config import Settings
from service.domain import CAUSES, KINDS
from service.store import metrics as figures
from service.store.engine import read_transaction
from service.store.scoring import scoring_health
from service.web.deps import PRINCIPAL_SCOPE_KEY, check_permission, identify

OUTCOMES = ("accepted", "duplicate", "conflict", "rejected")
SERVICE_STATES = ("in_service", "out_of_service", "retired")
UNMATCHED = "<unmatched>"  # one label for every path no route matches (bounded cardinality)
# Request latency buckets (seconds): from a cached read to a large batch or export.
LATENCY_BUCKETS_S = (0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0)
# Fit duration buckets (seconds per detector, thresholds included).


class DatabaseFigures:
    """A collector that reads its gauges from the database at scrape time."""

    def __init__(self, engine: Engine, settings: Settings) -> None:
        self.engine = engine
        self.settings = settings

    def describe(self) -> Iterable[Metric]:
        return []  # nothing to check at registration; names are fixed below

    def collect(self) -> Iterator[Metric]:
        up = GaugeMetricFamily("tallyward_database_up",
                               "1 when the database answered this scrape, 0 when it did not.")
        try:
            with read_transaction(self.engine) as conn:
                scoring = scoring_health(conn, self.settings)
                alerts = figures.open_alerts_by_kind_cause(conn)
                states = figures.detectors_by_state(conn)
                fits, fit_seconds = figures.fit_job_seconds(conn)
        except SQLAlchemyError:
            up.add_metric([], 0)
            yield up
            return
        up.add_metric([], 1)
        yield up
        yield SummaryMetricFamily(
            "tallyward_fit_duration_seconds",
            "Baseline fits done by fit jobs (POST /v1/baselines/fit, run by any worker or the "
            "inline runner): how many and their seconds in all, from the database.",
            count_value=fits, sum_value=fit_seconds)
        yield GaugeMetricFamily(
            "tallyward_scoring_backlog_detectors",
            "Detectors with scoring work waiting (those waiting for a retry included).",
            value=scoring.backlog)
        yield GaugeMetricFamily(
            "tallyward_scoring_lag_seconds",
            "Wall seconds the oldest waiting scoring work has waited since its counts were "
            "committed (0 when nothing waits; failing detectors are counted apart).",
            value=scoring.longest_wait_s or 0.0)
        yield GaugeMetricFamily(
            "tallyward_scoring_oldest_unscored_age_seconds",
            "Age of the oldest interval waiting to be scored, on the scoring clock (0 when "
            "nothing waits).", value=scoring.oldest_unscored_age_s or 0.0)
        yield GaugeMetricFamily(
            "tallyward_scoring_retrying_detectors",
            "Detectors whose last scoring attempt failed.", value=scoring.retrying)
        open_alerts = GaugeMetricFamily("tallyward_open_alerts",
                                        "Open alerts (not withdrawn) by kind and cause.",
                                        labels=["kind", "cause"])
        for kind in KINDS:
            for cause in CAUSES:
                open_alerts.add_metric([kind, cause], alerts.pop((kind, cause), 0))
        for (kind, cause), n in sorted(alerts.items()):  # any other stored pair, still shown
            open_alerts.add_metric([kind, cause], n)
        yield open_alerts
        detectors = GaugeMetricFamily("tallyward_detectors",
                                      "Registered detectors by service state.", labels=["state"])
        for state in SERVICE_STATES:
            detectors.add_metric([state], states.pop(state, 0))
        for state, n in sorted(states.items()):
            detectors.add_metric([state], n)
        yield detectors


class ServiceMetrics:
    """One app's registry and the figures it keeps in this process."""

    def __init__(self, settings: Settings, engine: Engine) -> None:
        self.registry = CollectorRegistry(auto_describe=False)
        self.counts = Counter("tallyward_counts", "Count items posted, by outcome.",
                              ["outcome"], registry=self.registry)
        for outcome in OUTCOMES:
            self.counts.labels(outcome)
        self.rejected = Counter("tallyward_counts_rejected",
                                "Count items rejected (never storable as sent), by reason.",
                                ["reason"], registry=self.registry)
        self.requests = Histogram("tallyward_http_request_duration_seconds",
                                  "HTTP request latency (seconds), by route template.",
                                  ["method", "route", "status"], buckets=LATENCY_BUCKETS_S,
                                  registry=self.registry)
        Info("tallyward_build", "Version and the settings that shape what is measured.",
             registry=self.registry).info({
                 "version": __version__, "clock": settings.clock, "scoring": settings.scoring,
                 "auth": settings.auth})
        self.registry.register(DatabaseFigures(engine, settings))

    def observe_batch(self, result: Any) -> None:
        """Add one ingested batch (a ``pipeline.ingest.BatchResult``)."""
        self.counts.labels("accepted").inc(result.accepted)
        self.counts.labels("duplicate").inc(result.duplicate)
        self.counts.labels("conflict").inc(len(result.conflicts))
        self.counts.labels("rejected").inc(len(result.rejected))
        by_reason: dict[str, int] = {}
        for item in result.rejected:
            reason = item.get("reason", "other")
            by_reason[reason] = by_reason.get(reason, 0) + 1
        for reason, n in by_reason.items():
            self.rejected.labels(reason).inc(n)

    def exposition(self, accept: str | None) -> tuple[bytes, str]:
        """The figures in the format the scraper's Accept header asks for (the classic text
        format 0.0.4 unless it asks for a newer one), and its content type."""
        encoder, content_type = choose_encoder(accept or "")
        return encoder(self.registry), content_type


def route_template(app: Any, scope: Scope) -> str:
    """The path template of the route that serves ``scope`` (``/v1/alerts/{alert_id}``)."""
    for route in _routes(app.router.routes):
        match, _ = route.matches(scope)
        if match == Match.FULL:
            return str(getattr(route, "path", UNMATCHED))
    return UNMATCHED


def _routes(routes: Iterable[Any]) -> Iterator[Any]:
    for route in routes:
        inner = getattr(route, "original_router", None)  # newer FastAPI wraps included routers
        if inner is not None:
            yield from _routes(inner.routes)
        else:
            yield route


class RequestMetrics:
    """Times every HTTP request and files it under its route template and status."""

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        started = time.perf_counter()
        status = 500

        async def watched(message: Message) -> None:
            nonlocal status
            if message["type"] == "http.response.start":
                status = message["status"]
            await send(message)

        try:
            await self.app(scope, receive, watched)
        finally:
            app = scope["app"]
            app.state.metrics.requests.labels(
                scope.get("method", ""), route_template(app, scope), str(status)
            ).observe(time.perf_counter() - started)


router = APIRouter()


@router.get("/metrics", include_in_schema=False)
def metrics(request: Request) -> Response:
    """The service's figures in the Prometheus text format."""
    state = request.app.state
    if not state.settings.metrics_public:
        principal = request.scope.get(PRINCIPAL_SCOPE_KEY) or identify(
            state.settings, state.engine, authorization=request.headers.get("authorization"),
            client=request.client.host if request.client else None,
            header_names=set(request.headers.keys()))
        check_permission(principal, "read")
    body, content_type = state.metrics.exposition(request.headers.get("accept"))
    return Response(body, media_type=content_type)


def install(app: FastAPI, settings: Settings, engine: Engine) -> None:
    """Give ``app`` its registry, the ``/metrics`` route and the request timer."""
    app.state.metrics = ServiceMetrics(settings, engine)
    app.include_router(router)
    app.add_middleware(RequestMetrics)


def observe_batch(app: Any, result: Any) -> None:
    """Record an ingested batch in ``app``'s metrics (when it has them)."""
    found = getattr(app.state, "metrics", None)
    if found is not None:
        found.observe_batch(result)


