"""One settings object for the service, the CLI and the workers.

Every setting is read from an environment variable with the prefix ``TALLYWARD_``
(for example ``TALLYWARD_DATABASE_URL``). Bad values fail at start-up with a message
naming the variable, never later in a request.
"""

from __future__ import annotations

from functools import lru_cache
from typing import Literal

from pydantic import Field, ValidationError, field_validator
from pydantic_settings import BaseSettings, SettingsConfigDict


class Settings(BaseSettings):
    model_config = SettingsConfigDict(env_prefix="TALLYWARD_", extra="ignore")

    database_url: str = Field(
        "sqlite:///tallyward.db",
        description="SQLAlchemy URL. Default: a SQLite file in the working folder. "
        "Production: postgresql+psycopg://user@host/db",
    )
    auth: Literal["required", "loopback-open"] = Field(
        "required",
        description="'required': every request needs an API key. 'loopback-open' (DEMO ONLY): "
        "requests from 127.0.0.1/::1 need no key; all others still do.",
    )
    max_batch_items: int = Field(10_000, ge=1, le=1_000_000, description="Most items in one count batch.")
    max_body_bytes: int = Field(
        4 * 1024 * 1024, ge=1024, description="Largest request body accepted (bytes); larger gets 413."
    )
    future_tolerance_s: int = Field(
        300, ge=0, description="How far past the server clock an interval start may be (seconds)."
    )
    clock: Literal["wall", "data"] = Field(
        "wall",
        description="'wall': missing data is judged against the server clock (live). "
        "'data': against the latest interval seen across the network (replays of history).",
    )
    false_alerts_per_week: float = Field(
        0.05, gt=0, le=50, description="Expected false alerts per detector per week under normal traffic."
    )
    network_false_alerts_per_day: float | None = Field(
        None, gt=0, le=10_000,
        description="Optional cap on expected false alerts per day across the whole network. "
        "Unset: every detector spends false_alerts_per_week. Set: each detector's weekly budget "
        "becomes min(false_alerts_per_week, 7 x cap / N), N the registered detectors rounded "
        "up to a power of two (thresholds change only when the network doubles).",
    )
    missing_grace_s: int = Field(
        600, ge=0, description="How long after an interval ends before it counts as missing (seconds)."
    )
    close_after_intervals: int = Field(
        6, ge=1, description="Normal intervals in a row that close an alert episode."
    )
    fit_window_days: int = Field(56, ge=7, le=730, description="History window for baseline fits (days).")
    fit_half_life_days: float | None = Field(
        None, gt=0, description="Exponential forgetting half-life for fits (days); unset = equal weights."
    )
    fit_min_completeness: float = Field(
        0.8, gt=0, le=1, description="Days with a smaller share of intervals present are left out of fits."
    )
    baseline_validity_days: int = Field(
        28, ge=0, le=3650, description="Days beyond a baseline's fit window a baseline day is served "
        "without a warning (a field and the X-Baseline-Warning header)."
    )
    scoring: Literal["inline", "worker", "off"] = Field(
        "inline", description="'inline': the API process scores counts itself and runs fit jobs "
        "(one-process set-up, the embedded SQLite default). 'worker': the API only stores; "
        "`tallyward worker` processes score, sweep for missing data, refit and run jobs. "
        "'off': store only (nothing scores unless a worker or `tallyward score` runs)."
    )
    log_level: str = Field("INFO", description="Python log level for the JSON logs.")
    max_page_bytes: int = Field(
        1024 * 1024, ge=16 * 1024, le=64 * 1024 * 1024,
        description="Largest page of rows a read returns (bytes of JSON data); a longer answer "
        "ends early with a cursor to the rest (GET /v1/counts: next_from).",
    )
    http_header_timeout_s: float = Field(
        10.0, gt=0, le=600,
        description="`tallyward serve`: a connection must finish sending a request's headers "
        "this many seconds after it opens (or after the request's first byte); otherwise it "
        "is closed. Idle new connections are closed after this time too.",
    )
    http_body_timeout_s: float = Field(
        30.0, gt=0, le=3600,
        description="A request body must arrive in full within this many seconds of the "
        "headers; otherwise the request is answered 408 and the connection closed.",
    )
    http_keep_alive_s: int = Field(
        5, ge=1, le=300,
        description="`tallyward serve`: an idle keep-alive connection is closed after this "
        "many seconds without a new request (uvicorn timeout_keep_alive).",
    )
    http_max_connections: int = Field(
        256, ge=1, le=100_000,
        description="`tallyward serve`: most open connections (and requests in progress) per "
        "worker process; requests beyond it get 503 at once (uvicorn limit_concurrency).",
    )
    http_max_header_bytes: int = Field(
        16 * 1024, ge=1024, le=1024 * 1024,
        description="`tallyward serve`: largest request line plus headers (bytes); larger is "
        "refused with 431 and the connection closed.",
    )
    db_statement_timeout_s: float = Field(
        30.0, ge=0, le=3600,
        description="PostgreSQL statement_timeout for the service's and the CLI's connections "
        "(seconds; 0 = none). A statement cut off answers 503 with Retry-After.",
    )
    db_lock_timeout_s: float = Field(
        5.0, ge=0, le=3600,
        description="PostgreSQL lock_timeout (seconds; 0 = none): how long a statement waits for "
        "a lock held by another session before the request answers 503 with Retry-After.",
    )
    metrics_public: bool = Field(
        False,
        description="GET /metrics without an API key: false (default) = it needs a key of role "
        "read like the API (or loopback-open); true = anyone who reaches the port may scrape it.",
    )
    page_cursor_secret: str | None = Field(
        None, min_length=16,
        description="Secret that signs GET /v1/counts page cursors (HMAC-SHA256). Unset: a "
        "secret is drawn at start, so cursors do not outlive the process or cross --workers; "
        "set the same value on every process behind one address.",
    )
    sqlite_busy_timeout_s: float = Field(
        5.0, ge=0, le=600,
        description="SQLite: how long a write waits for another writer's lock (seconds) before "
        "the request answers 503 with Retry-After.",
    )
    # Storage maintenance (``tallyward maintain``; service.pipeline.retention.maintain_storage)
    raw_retention_days: int = Field(
        0, ge=0, le=36_500,
        description="Raw intervals older than this many days are removed by maintenance after "
        "their hourly totals are stored (days; 0 = keep every interval). On PostgreSQL whole "
        "partitions are dropped, so intervals are kept up to one partition longer.",
    )
    partition_days: int = Field(
        7, ge=1, le=366,
        description="PostgreSQL: days of intervals per counts partition (UTC-aligned ranges).",
    )
    partition_ahead_days: int = Field(
        14, ge=1, le=3660,
        description="PostgreSQL: maintenance creates counts partitions this many days ahead "
        "of the clock (days).",
    )
    rollup_refresh_days: int = Field(
        2, ge=1, le=366,
        description="Maintenance recomputes hourly totals over this many recent days, so late "
        "intervals and rescored flags reach them (days).",
    )
    retention_batch_rows: int = Field(
        10_000, ge=100, le=10_000_000,
        description="SQLite: most expired intervals deleted per transaction (rows).",
    )

    # Workers and rolling refits (see `tallyward worker`).
    refits: Literal["auto", "nightly", "off"] = Field(
        "auto",
        description="Rolling refits: 'nightly' refits each detector's baseline every night at "
        "TALLYWARD_REFIT_HOUR and fits new detectors once they have TALLYWARD_FIRST_FIT_DAYS "
        "of history; 'off' never; 'auto' = nightly in `tallyward worker`, off in the inline "
        "runner of `tallyward serve` (so a replay of history keeps the baselines it was given).",
    )
    refit_hour: int = Field(
        2, ge=0, le=23, description="Local hour (0-23, each detector's own time zone) of the "
        "nightly refit.")
    first_fit_days: float = Field(
        7.0, ge=3, le=730, description="Days of history (first stored interval to the clock) "
        "a new detector needs before its first fit; until then its health says 'learning'.")
    worker_poll_s: float = Field(
        1.0, gt=0, le=60, description="Seconds an idle worker waits before looking for work "
        "again (scoring, missing-data sweep, jobs).")
    scoring_batch: int = Field(
        64, ge=1, le=1000, description="Detectors a scorer claims per scoring pass (one "
        "claim, one read, one write transaction). Several workers split the backlog in "
        "batches of this size.")
    worker_lease_s: float = Field(
        120.0, ge=1, le=3600, description="Seconds a scorer's claim on a detector holds: work "
        "of a worker that dies is taken over by another after this long. Longer than a "
        "scoring pass takes.")
    ui_session_idle_s: int = Field(
        1800, ge=60, le=7 * 86_400,
        description="Web view (/ui/): a signed-in session ends after this many seconds without "
        "a page request; the person signs in again with their key.",
    )
    ui_session_secret: str | None = Field(
        None, min_length=32,
        description="Web view: the secret that signs session cookies (at least 32 characters). "
        "Unset: a random one per process, so sessions end when the service restarts; set it "
        "when `tallyward serve --workers` is above 1 so every worker accepts the same sessions.",
    )

    @field_validator("database_url")
    @classmethod
    def _known_backend(cls, value: str) -> str:
        if not (value.startswith("sqlite") or value.startswith("postgresql")):
            raise ValueError(
                "TALLYWARD_DATABASE_URL must be a sqlite:/// or postgresql+psycopg:// URL"
            )
        if value.startswith("postgresql://"):
            value = "postgresql+psycopg://" + value[len("postgresql://") :]
        return value


ENV_PREFIX = "TALLYWARD_"


def settings_error_text(exc: ValidationError) -> str:
    """A settings error as people set them: one line per problem, naming the environment
    variable (``TALLYWARD_FALSE_ALERTS_PER_WEEK``), never the field name alone."""
    lines = []
    for err in exc.errors():
        field = str(err["loc"][0]) if err.get("loc") else ""
        name = f"{ENV_PREFIX}{field.upper()}" if field else "settings"
        message = str(err.get("msg", "invalid")).removeprefix("Value error, ")
        if name in message:  # the message names the variable already
            lines.append(message)
            continue
        given = err.get("input")
        shown = f" (got {given!r})" if isinstance(given, str | int | float) else ""
        lines.append(f"{name}: {message}{shown}")
    return "; ".join(lines)


@lru_cache
def get_settings() -> Settings:
    return Settings()
