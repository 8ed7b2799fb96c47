"""``tallyward`` command line: serve, worker, migrate, import-*, keys, fit, score.

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
from pydantic import ValidationError
from sqlalchemy.exc import OperationalError

from service import __version__
from service.config import Settings, get_settings, settings_error_text
from service.errors import TallywardError
from service.textio import csv_chunks, file_pos, open_text, table


def _engine(settings: Settings):  # type: ignore[no-untyped-def]
    """The engine of a command that works on an existing Tallyward database: a SQLite file
    that is not there is an error naming the setting (never an empty file left behind)."""
    from sqlalchemy.engine import make_url

    from service.store.engine import make_engine

    url = make_url(settings.database_url)
    if url.get_backend_name() == "sqlite" and url.database not in (None, "", ":memory:"):
        path = Path(url.database)
        if not path.exists():
            raise TallywardError(
                f"no database at {path.resolve()} (TALLYWARD_DATABASE_URL="
                f"{_safe_url(settings)}); set TALLYWARD_DATABASE_URL to the service's database "
                "(the demo's: README, From the demo to a running service), or create one with "
                "`tallyward migrate`")
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
    if not _database_reachable(settings):
        return 1
    migrate.upgrade(settings.database_url)
    _start_line("serve", settings, workers=args.workers)
    uvicorn.run("service.web.app:app_from_env", factory=True, host=args.host, port=args.port,
                workers=args.workers, log_level="warning", access_log=False,
                http=server.protocol(), timeout_keep_alive=settings.http_keep_alive_s,
                limit_concurrency=settings.http_max_connections,
                h11_max_incomplete_event_size=settings.http_max_header_bytes)
    return 0


def cmd_import_detectors(args: argparse.Namespace, settings: Settings) -> int:
    from service.store.detectors import import_feature_collection

    try:
        doc = orjson.loads(Path(args.file).read_bytes())
    except orjson.JSONDecodeError as exc:
        raise TallywardError(f"{args.file} is not JSON ({exc}); a detector file is a GeoJSON "
                             'FeatureCollection (RFC 7946): {"type": "FeatureCollection", '
                             '"features": [...]}') from None
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


class UsageError(TallywardError):
    """A command-line argument that cannot be used as given (exit status 2)."""

    exit_status = 2  # read by main() from the attribute: `python -m service.cli` loads this
    # module twice (as __main__ and as service.cli), so the class may not be main()'s own


def time_arg(text: str | None, option: str = "time") -> int | None:
    """An RFC 3339 command-line argument as epoch seconds (None stays None); ``UsageError``
    naming the option otherwise."""
    from service.timefmt import parse_rfc3339

    if text is None:
        return None
    try:
        return parse_rfc3339(text)
    except ValueError as exc:
        message = str(exc).removeprefix("start ")
        raise UsageError(f"{option}: {message}") from None


def cmd_fit(args: argparse.Namespace, settings: Settings) -> int:
    from tqdm import tqdm

    from service.pipeline import fit as fitting

    as_of_s = time_arg(args.as_of, "--as-of")  # a bad value fails before any bar is drawn
    engine = _engine(settings)
    ids = args.detector or fitting.all_detector_ids(engine)
    started = time.perf_counter()
    with tqdm(total=len(ids), unit="det", desc="fit baselines", file=sys.stderr,
              disable=args.quiet) as bar:
        results = fitting.fit_many(settings, engine, detector_ids=ids,
                                   as_of_s=as_of_s, workers=args.workers,
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


def cmd_figures(args: argparse.Namespace, settings: Settings) -> int:
    """Write the planners' figures of many detectors to a CSV or JSON report."""
    import csv

    from tqdm import tqdm

    from service.pipeline import figures as planning
    from service.pipeline.fit import all_detector_ids

    out = Path(args.out)
    if out.suffix.lower() not in (".csv", ".json"):
        raise TallywardError(f"--out {out}: name a .csv or .json file")
    engine = _engine(settings)
    ids = args.detector or all_detector_ids(engine)
    started = time.perf_counter()
    with tqdm(total=len(ids), unit="det", desc=f"figures {args.year}", file=sys.stderr,
              disable=args.quiet) as bar:
        report = planning.figures_many(settings, engine, ids, year=args.year,
                                       workers=args.workers, progress=bar.update)
    if out.suffix.lower() == ".json":
        out.write_bytes(orjson.dumps(report, option=orjson.OPT_INDENT_2))
    else:
        with out.open("w", newline="", encoding="utf-8") as f:
            writer = csv.DictWriter(f, fieldnames=planning.REPORT_COLUMNS)
            writer.writeheader()
            writer.writerows(planning.report_row(r) for r in report)
    failed = sum("error" in r for r in report)
    table([[len(report) - failed, failed, f"{time.perf_counter() - started:.1f}", str(out)]],
          ["with figures", "without", "seconds", "report"])
    return 0


def cmd_score(args: argparse.Namespace, settings: Settings) -> int:
    from service.pipeline.score import ScoringCache, score_pass

    engine = _engine(settings)
    cache = ScoringCache()  # baselines parsed once for the life of this command
    total = 0
    while True:
        n = score_pass(engine, settings, limit=settings.scoring_batch, cache=cache)
        total += n
        if n == 0:
            if not args.loop:
                break
            time.sleep(args.idle)
    print(f"scored {total} detector passes", file=sys.stderr)
    return 0


def _database_reachable(settings: Settings) -> bool:
    """Connect once (5 s at most); on failure print one clear line naming the database."""
    from sqlalchemy import create_engine, text

    connect_args = {"connect_timeout": 5} if settings.database_url.startswith("postgresql") \
        else {}
    engine = create_engine(settings.database_url, connect_args=connect_args)
    try:
        with engine.connect() as conn:
            conn.execute(text("SELECT 1"))
    except Exception as exc:  # noqa: BLE001 - any failure to connect is reported the same way
        reason = str(getattr(exc, "orig", None) or exc).strip().splitlines()
        print(f"error: cannot reach the database {_safe_url(settings)} "
              f"({reason[0][:200] if reason else type(exc).__name__}); check "
              "TALLYWARD_DATABASE_URL and that the database is running", file=sys.stderr)
        return False
    finally:
        engine.dispose()
    return True


def _start_line(command: str, settings: Settings, *, workers: int, **more: Any) -> None:
    """One log line at start: what runs, against which database, on which clock."""
    import logging

    from service import __version__, logs

    logs.configure(settings.log_level)
    logging.getLogger("tallyward.start").info(f"tallyward {command} starting", extra={"fields": {
        "version": __version__, "database": _safe_url(settings), "clock": settings.clock,
        "auth": settings.auth, "scoring": settings.scoring, "workers": workers, **more}})


def cmd_worker(args: argparse.Namespace, settings: Settings) -> int:
    import signal

    from service.pipeline.worker import Worker, default_tasks, one_blas_thread, refits_enabled
    from service.store import migrations as migrate

    if not _database_reachable(settings):
        return 1
    engine = _engine(settings)
    current, head = migrate.current_revision(engine), migrate.head_revision(settings.database_url)
    if current != head:
        print(f"error: the database {_safe_url(settings)} is at schema revision {current} and "
              f"this code needs {head}; run `tallyward migrate` (or `tallyward serve`) first",
              file=sys.stderr)
        return 1
    one_blas_thread()  # the cause of slow fits outside `tallyward fit` (see the function)
    refits = refits_enabled(settings, in_worker=True)
    _start_line("worker", settings, workers=1, refits="nightly" if refits else "off",
                refit_hour=settings.refit_hour, first_fit_days=settings.first_fit_days)
    worker = Worker(default_tasks(engine, settings, refits=refits, storage=True))
    if args.once:
        done = worker.run_until_idle()
        print(f"worker: {done} units of work done; nothing left", file=sys.stderr)
        return 0

    def _stop(_signum: int, _frame: Any) -> None:
        worker.stop_event.set()
        worker.wake.set()

    signal.signal(signal.SIGTERM, _stop)
    worker.run()
    return 0


def cmd_maintain(args: argparse.Namespace, settings: Settings) -> int:
    from service.pipeline.retention import maintain_storage

    report = maintain_storage(_engine(settings), settings, time_arg(args.now))
    print(orjson.dumps(report.to_dict()).decode())
    return 0


# ----------------------------------------------------------------------------- parser


EXIT_STATUSES = """exit status:
  0  the command did its work
  1  the work failed (rejected rows, failed fits, a database or service that refused or
     could not be reached); the message says which
  2  bad usage: an unknown option, an argument or a TALLYWARD_* setting that cannot be used

settings come from TALLYWARD_* environment variables (README: Configuration), e.g.
TALLYWARD_DATABASE_URL=postgresql+psycopg://tallyward@db-host/tallyward"""


class HELP_FORMAT(argparse.HelpFormatter):  # noqa: N801 - used like argparse's formatter names
    """Every option's help ends with its default, when it has one worth showing."""

    def _get_help_string(self, action: argparse.Action) -> str | None:
        text = action.help or ""
        if "%(default)" not in text and action.default not in (None, False, argparse.SUPPRESS) \
                and (action.option_strings or action.nargs in (argparse.OPTIONAL,
                                                               argparse.ZERO_OR_MORE)):
            text += " (default: %(default)s)"
        return text


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="tallyward", description=__doc__.splitlines()[0],
                                epilog=EXIT_STATUSES, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--version", action="version", version=f"tallyward {__version__}")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")

    s = sub.add_parser("serve", help="run the HTTP service (migrates first)")
    s.add_argument("--host", default="127.0.0.1",
                   help="address to listen on; a non-loopback address needs TALLYWARD_AUTH=required")
    s.add_argument("--port", type=int, default=8000, help="TCP port to listen on")
    s.add_argument("--workers", type=int, default=1,
                   help="HTTP worker processes (each with its own /metrics figures)")
    s.set_defaults(func=cmd_serve)

    s = sub.add_parser("migrate", help="create or upgrade the database schema to head")
    s.set_defaults(func=cmd_migrate)

    s = sub.add_parser("import-detectors", help="create/update detectors from a GeoJSON file")
    s.add_argument("file", help="GeoJSON FeatureCollection (RFC 7946) of detectors")
    s.set_defaults(func=cmd_import_detectors)

    s = sub.add_parser("import-counts", help="store counts from a CSV (or .csv.gz) file")
    s.add_argument("file", help="CSV with the header detector_id,start,count (.gz accepted)")
    s.add_argument("--chunk", type=int, default=10_000, help="rows per transaction")
    s.add_argument("--quiet", action="store_true", help="no progress bar")
    s.set_defaults(func=cmd_import_counts)

    s = sub.add_parser("keys", help="API keys: create, list, revoke")
    ks = s.add_subparsers(dest="keys_cmd", required=True, metavar="ACTION")
    k = ks.add_parser("create", help="create a key and print it (shown only this once)")
    k.add_argument("--role", required=True, choices=["ingest", "read", "operate", "admin"],
                   help="what the key may do (README: API keys)")
    k.add_argument("--name", required=True, help="a unique name to list and revoke it by")
    ks.add_parser("list", help="list keys")
    k = ks.add_parser("revoke", help="revoke a key by name")
    k.add_argument("name", help="the key's name")
    s.set_defaults(func=cmd_keys)

    s = sub.add_parser("fit", help="fit baselines (expected counts by time of day and day type)")
    s.add_argument("--detector", action="append",
                   help="detector id (repeat for several); default: every detector")
    s.add_argument("--as-of", help="RFC 3339 end of the history window, e.g. "
                                   "2026-11-16T00:00:00-06:00; default: just after the latest "
                                   "stored count")
    s.add_argument("--workers", type=int, default=max(1, min(4, os.cpu_count() or 1)),
                   help="fitting processes")
    s.add_argument("--no-thresholds", action="store_true",
                   help="skip deriving scoring thresholds (the first scoring pass does it)")
    s.add_argument("--quiet", action="store_true", help="no progress bar")
    s.set_defaults(func=cmd_fit)

    s = sub.add_parser("score", help="score pending counts (a worker beside the service)")
    s.add_argument("--loop", action="store_true", help="keep running")
    s.add_argument("--idle", type=float, default=1.0,
                   help="seconds to wait between passes when nothing is pending (with --loop)")
    s.set_defaults(func=cmd_score)

    s = sub.add_parser("worker", help="run scoring, the missing-data sweep, refits and fit jobs "
                       "(beside `serve` with TALLYWARD_SCORING=worker; start as many as needed)")
    s.add_argument("--once", action="store_true",
                   help="work until nothing is left to do, then exit (default: run until "
                   "SIGTERM or Ctrl-C)")
    s.set_defaults(func=cmd_worker)

    s = sub.add_parser("figures", help="planners' annual figures (AADT, K30, PHF...) to CSV/JSON")
    s.add_argument("--year", type=int, required=True, help="calendar year, local time")
    s.add_argument("--detector", action="append", help="detector id (repeat); default: all")
    s.add_argument("--out", required=True, help="report path: .csv (one row a detector) or .json")
    s.add_argument("--workers", type=int, default=max(1, min(4, os.cpu_count() or 1)),
                   help="processes computing figures in parallel")
    s.add_argument("--quiet", action="store_true", help="no progress bar")
    s.set_defaults(func=cmd_figures)

    s = sub.add_parser("maintain", help="storage maintenance: partitions ahead, hourly totals, "
                       "expiry of raw intervals (run from cron or a worker)")
    s.add_argument("--now", help="RFC 3339 clock for the pass (default: the wall clock)")
    s.set_defaults(func=cmd_maintain)

    for register in command_plugins():
        register(sub)
    _show_defaults(p)
    return p


def _show_defaults(parser: argparse.ArgumentParser) -> None:
    """Every command's help lists its options' defaults and the exit statuses."""
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            for child in action.choices.values():
                child.formatter_class = HELP_FORMAT
                child.epilog = child.epilog or "exit status: 0 done, 1 the work failed, 2 bad usage"
                _show_defaults(child)


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
    """Run one command; the exit status is 0 (done), 1 (the work failed) or 2 (bad usage:
    an argument or a setting that cannot be used)."""
    args = build_parser().parse_args(argv)  # bad usage exits 2 here (argparse)
    try:
        settings = get_settings()
    except ValidationError as exc:
        print(f"configuration error: {settings_error_text(exc)}", file=sys.stderr)
        return 2
    try:
        status = int(args.func(args, settings) or 0)
        sys.stdout.flush()  # a closed pipe shows here, where it is handled, not at exit
        return status
    except BrokenPipeError:
        # The reader (`| head`) closed the pipe: what it wanted was delivered. Later writes,
        # and the flush at exit, go nowhere instead of raising again.
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 0
    except TallywardError as exc:
        print(f"error: {exc.message}", file=sys.stderr)
        return int(getattr(exc, "exit_status", 1))
    except (FileNotFoundError, IsADirectoryError, PermissionError) as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 1
    except OperationalError as exc:
        cause = str(exc.orig).strip()
        if "no such table" in cause or ("relation" in cause and "does not exist" in cause):
            print(f"error: the database {_safe_url(settings)} has no Tallyward schema "
                  f"({cause[:120]}); set TALLYWARD_DATABASE_URL to the service's database, or "
                  "create the schema with `tallyward migrate`", file=sys.stderr)
        else:
            print(f"error: the database is busy or unreachable ({type(exc.orig).__name__}: "
                  f"{cause[:200]}); retry shortly", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":
    sys.exit(main())
