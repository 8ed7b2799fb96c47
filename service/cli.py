"""``tallyward`` command line: serve, migrate, import-detectors, import-counts, keys, fit, score.

The demo tools (replay, demo, evaluate, plot) add their commands through the entry-point
group ``tallyward.commands`` when installed with the ``demo`` extra.

Configured by the same ``TALLYWARD_*`` environment variables as the service.
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from collections.abc import Callable, Sequence
from importlib.metadata import entry_points
from pathlib import Path
from typing import Any

import orjson
from sqlalchemy.exc import OperationalError

from service.config import Settings, get_settings
from service.errors import TallywardError
from service.textio import csv_chunks, file_pos, open_text, table


def _engine(settings: Settings):  # type: ignore[no-untyped-def]
    from service.store.engine import make_engine

    return make_engine(settings)


# ----------------------------------------------------------------------------- commands


def cmd_migrate(args: argparse.Namespace, settings: Settings) -> int:
    from service.store import migrations as migrate

    migrate.upgrade(settings.database_url)
    print(f"schema at head {migrate.head_revision(settings.database_url)} ({_safe_url(settings)})",
          file=sys.stderr)
    return 0


def _safe_url(settings: Settings) -> str:
    from sqlalchemy.engine import make_url

    return make_url(settings.database_url).render_as_string(hide_password=True)


def _is_loopback_host(host: str) -> bool:
    import ipaddress

    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        return False


def cmd_serve(args: argparse.Namespace, settings: Settings) -> int:
    import uvicorn

    from service.store import migrations as migrate
    from service.web import server

    if settings.auth == "loopback-open":
        if not _is_loopback_host(args.host):
            print(f"error: TALLYWARD_AUTH=loopback-open lets any client on this machine act as "
                  f"admin without a key; it is for a demo bound to loopback and is refused with "
                  f"--host {args.host}. Serve on --host 127.0.0.1, or set "
                  f"TALLYWARD_AUTH=required and use API keys.", file=sys.stderr)
            return 2
        print("WARNING: TALLYWARD_AUTH=loopback-open (demo only): every request from this "
              "machine without a proxy forwarding header is admitted as admin without a key. "
              "Do not put a reverse proxy on this host in front of it; use "
              "TALLYWARD_AUTH=required for anything but a local demo.", file=sys.stderr)
    migrate.upgrade(settings.database_url)
    uvicorn.run("service.web.app:app_from_env", factory=True, host=args.host, port=args.port,
                workers=args.workers, log_level="warning", access_log=False,
                http=server.protocol(), timeout_keep_alive=settings.http_keep_alive_s,
                limit_concurrency=settings.http_max_connections,
                h11_max_incomplete_event_size=settings.http_max_header_bytes)
    return 0


def cmd_import_detectors(args: argparse.Namespace, settings: Settings) -> int:
    from service.store.detectors import import_feature_collection

    doc = orjson.loads(Path(args.file).read_bytes())
    result = import_feature_collection(_engine(settings), doc)
    print(f"detectors: {result['created']} created, {result['updated']} updated, "
          f"{len(result['errors'])} rejected")
    for err in result["errors"]:
        print(f"  feature {err['index']}: {err['error']}", file=sys.stderr)
    return 0 if not result["errors"] else 1


def cmd_import_counts(args: argparse.Namespace, settings: Settings) -> int:
    from tqdm import tqdm

    from service.pipeline import ingest

    engine = _engine(settings)
    size = os.path.getsize(args.file)
    total = ingest.BatchResult()
    started = time.perf_counter()
    stream = open_text(args.file)
    bar = tqdm(total=size, unit="B", unit_scale=True, desc="import counts", file=sys.stderr,
               disable=args.quiet)
    seen_items = 0
    last_pos = 0
    for first_line, body in csv_chunks(stream, chunk=args.chunk):
        items = ingest.parse_csv_batch(body, max_items=args.chunk + 1)
        result = ingest.ingest_items(engine, items, future_tolerance_s=settings.future_tolerance_s,
                                     after_store=getattr(args, "after_store", None))
        for r in result.rejected:
            # the chunk's own line numbers count its header as line 1
            r["line"] = first_line - 2 + r["line"] if "line" in r else first_line + r["index"]
        total.merge(result, index_offset=seen_items)
        seen_items += len(items)
        pos = file_pos(stream)
        bar.update(pos - last_pos)
        last_pos = pos
    bar.close()
    elapsed = time.perf_counter() - started
    table([[f"{total.accepted:,}", f"{total.duplicate:,}", f"{len(total.conflicts):,}",
            f"{len(total.rejected):,}", f"{elapsed:.1f}",
            f"{(seen_items / elapsed if elapsed else 0):,.0f}"]],
          ["accepted", "duplicate", "conflict", "rejected", "seconds", "rows/s"])
    for r in total.rejected[:20]:
        print(f"  line {r['line']}: {r['error']}", file=sys.stderr)
    if len(total.rejected) > 20:
        print(f"  ... and {len(total.rejected) - 20:,} more rejected rows", file=sys.stderr)
    return 0 if not total.rejected else 1


def cmd_keys(args: argparse.Namespace, settings: Settings) -> int:
    from service.store import keys as security
    from service.timefmt import format_utc

    engine = _engine(settings)
    if args.keys_cmd == "create":
        print(security.create_key(engine, name=args.name, role=args.role))
        return 0
    if args.keys_cmd == "revoke":
        security.revoke_key(engine, args.name)
        print(f"revoked {args.name}", file=sys.stderr)
        return 0
    rows = [[k["name"], k["role"], format_utc(k["created_s"]),
             format_utc(k["revoked_s"]) if k["revoked_s"] else "active"]
            for k in security.list_keys(engine)]
    table(rows, ["name", "role", "created", "revoked"])
    return 0


def time_arg(text: str | None) -> int | None:
    """An RFC 3339 command-line argument as epoch seconds (None stays None)."""
    from service.timefmt import parse_rfc3339

    if text is None:
        return None
    try:
        return parse_rfc3339(text)
    except ValueError as exc:
        raise TallywardError(str(exc)) from None


def cmd_fit(args: argparse.Namespace, settings: Settings) -> int:
    from tqdm import tqdm

    from service.pipeline import fit as fitting

    engine = _engine(settings)
    ids = args.detector or fitting.all_detector_ids(engine)
    started = time.perf_counter()
    with tqdm(total=len(ids), unit="det", desc="fit baselines", file=sys.stderr,
              disable=args.quiet) as bar:
        results = fitting.fit_many(settings, engine, detector_ids=ids,
                                   as_of_s=time_arg(args.as_of), workers=args.workers,
                                   thresholds=not args.no_thresholds, progress=bar.update)
    elapsed = time.perf_counter() - started
    by_status: dict[str, int] = {}
    for r in results:
        by_status[r["status"]] = by_status.get(r["status"], 0) + 1
    table([[by_status.get("fitted", 0), by_status.get("insufficient_history", 0),
            by_status.get("failed", 0), f"{elapsed:.1f}", args.workers]],
          ["fitted", "insufficient", "failed", "seconds", "workers"])
    problems = [r for r in results if r["status"] != "fitted"]
    if problems:
        table([[r["detector_id"], r["status"], r.get("reason") or ""] for r in problems[:30]],
              ["detector", "status", "reason"])
    return 0 if not by_status.get("failed") else 1


def cmd_score(args: argparse.Namespace, settings: Settings) -> int:
    from service.pipeline.score import ScoringCache, score_pass

    engine = _engine(settings)
    cache = ScoringCache()  # baselines parsed once for the life of this command
    total = 0
    while True:
        n = score_pass(engine, settings, cache=cache)
        total += n
        if n == 0:
            if not args.loop:
                break
            time.sleep(args.idle)
    print(f"scored {total} detector passes", file=sys.stderr)
    return 0


def cmd_maintain(args: argparse.Namespace, settings: Settings) -> int:
    from service.pipeline.retention import maintain_storage

    report = maintain_storage(_engine(settings), settings, time_arg(args.now))
    print(orjson.dumps(report.to_dict()).decode())
    return 0


# ----------------------------------------------------------------------------- parser


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="tallyward", description=__doc__.splitlines()[0])
    sub = p.add_subparsers(dest="command", required=True)

    s = sub.add_parser("serve", help="run the HTTP service (migrates first)")
    s.add_argument("--host", default="127.0.0.1",
                   help="address to listen on; a non-loopback address needs TALLYWARD_AUTH=required")
    s.add_argument("--port", type=int, default=8000)
    s.add_argument("--workers", type=int, default=1)
    s.set_defaults(func=cmd_serve)

    s = sub.add_parser("migrate", help="upgrade the database schema to head")
    s.set_defaults(func=cmd_migrate)

    s = sub.add_parser("import-detectors", help="create/update detectors from a GeoJSON file")
    s.add_argument("file")
    s.set_defaults(func=cmd_import_detectors)

    s = sub.add_parser("import-counts", help="store counts from a CSV (or .csv.gz) file")
    s.add_argument("file")
    s.add_argument("--chunk", type=int, default=10_000, help="rows per transaction")
    s.add_argument("--quiet", action="store_true", help="no progress bar")
    s.set_defaults(func=cmd_import_counts)

    s = sub.add_parser("keys", help="API keys")
    ks = s.add_subparsers(dest="keys_cmd", required=True)
    k = ks.add_parser("create", help="create a key and print it (shown only this once)")
    k.add_argument("--role", required=True, choices=["ingest", "read", "operate", "admin"])
    k.add_argument("--name", required=True)
    ks.add_parser("list", help="list keys")
    k = ks.add_parser("revoke", help="revoke a key by name")
    k.add_argument("name")
    s.set_defaults(func=cmd_keys)

    s = sub.add_parser("fit", help="fit baselines (expected counts by time of day and day type)")
    s.add_argument("--detector", action="append", help="detector id (repeat); default: all")
    s.add_argument("--as-of", help="RFC 3339 end of the history window; default: latest count")
    s.add_argument("--workers", type=int, default=max(1, min(4, os.cpu_count() or 1)))
    s.add_argument("--no-thresholds", action="store_true",
                   help="skip deriving scoring thresholds (the first scoring pass does it)")
    s.add_argument("--quiet", action="store_true")
    s.set_defaults(func=cmd_fit)

    s = sub.add_parser("score", help="score pending counts (a worker beside the service)")
    s.add_argument("--loop", action="store_true", help="keep running")
    s.add_argument("--idle", type=float, default=1.0)
    s.set_defaults(func=cmd_score)

    s = sub.add_parser("maintain", help="storage maintenance: partitions ahead, hourly totals, "
                       "expiry of raw intervals (run from cron or a worker)")
    s.add_argument("--now", help="RFC 3339 clock for the pass (default: the wall clock)")
    s.set_defaults(func=cmd_maintain)

    for register in command_plugins():
        register(sub)
    return p


COMMANDS_GROUP = "tallyward.commands"


def command_plugins() -> list[Callable[[Any], None]]:
    """The ``register(subparsers)`` functions of the installed ``tallyward.commands`` entry
    points (the demo tools' commands come this way; the product never imports them)."""
    found = []
    for ep in sorted(entry_points(group=COMMANDS_GROUP), key=lambda ep: ep.name):
        try:
            found.append(ep.load())
        except ImportError as exc:
            print(f"warning: commands {ep.name!r} ({ep.value}) not loaded: {exc}",
                  file=sys.stderr)
    return found


def main(argv: Sequence[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    try:
        settings = get_settings()
    except Exception as exc:  # noqa: BLE001 - settings errors name the variable
        print(f"configuration error: {exc}", file=sys.stderr)
        return 2
    try:
        return int(args.func(args, settings) or 0)
    except TallywardError as exc:
        print(f"error: {exc.message}", file=sys.stderr)
        return 1
    except FileNotFoundError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 1
    except OperationalError as exc:
        print(f"error: the database is busy or unreachable ({type(exc.orig).__name__}: "
              f"{str(exc.orig).strip()[:200]}); retry shortly", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":
    sys.exit(main())
