"""``tallyward`` command line: serve, migrate, imports, keys (and later fit, replay, evaluate).

Configured by the same ``TALLYWARD_*`` environment variables as the service.
"""

from __future__ import annotations

import argparse
import gzip
import io
import os
import sys
import time
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import Any, TextIO

import orjson
from sqlalchemy.exc import OperationalError

from service.config import Settings, get_settings
from service.errors import TallywardError


def table(rows: Sequence[Sequence[Any]], headers: Sequence[str], *, out: TextIO | None = None) -> None:
    """Print a plain aligned table."""
    out = out or sys.stdout
    cells = [[str(h) for h in headers]] + [["" if v is None else str(v) for v in r] for r in rows]
    widths = [max(len(r[i]) for r in cells) for i in range(len(headers))]

    def line(r: Sequence[str]) -> str:
        return "  ".join(v.rjust(w) if _numeric(v) else v.ljust(w) for v, w in zip(r, widths, strict=True)).rstrip()

    print(line(cells[0]), file=out)
    print("  ".join("-" * w for w in widths), file=out)
    for r in cells[1:]:
        print(line(r), file=out)


def _numeric(v: str) -> bool:
    return v.replace(".", "", 1).replace("-", "", 1).replace(",", "").replace("%", "").isdigit()


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


def open_text(path: str) -> TextIO:
    """A text stream of a CSV file, gzip-compressed or not (decided by its first bytes)."""
    raw = open(path, "rb")  # noqa: SIM115 - returned to the caller
    magic = raw.read(2)
    raw.seek(0)
    if magic == b"\x1f\x8b":
        return io.TextIOWrapper(gzip.GzipFile(fileobj=raw), encoding="utf-8-sig", newline="")
    return io.TextIOWrapper(raw, encoding="utf-8-sig", newline="")


def csv_chunks(stream: TextIO, *, chunk: int) -> Iterator[tuple[int, bytes]]:
    """(first data line number, CSV bytes with header) chunks of a counts CSV."""
    header = stream.readline()
    if not header:
        raise TallywardError("the file is empty; expected the header detector_id,start,count")
    lines: list[str] = []
    line_no = 2
    first = line_no
    for line in stream:
        lines.append(line)
        line_no += 1
        if len(lines) >= chunk:
            yield first, (header + "".join(lines)).encode()
            lines = []
            first = line_no
    if lines:
        yield first, (header + "".join(lines)).encode()


def cmd_import_counts(args: argparse.Namespace, settings: Settings) -> int:
    from tqdm import tqdm

    from service.pipeline import ingest

    engine = _engine(settings)
    size = os.path.getsize(args.file)
    total = ingest.BatchResult()
    started = time.perf_counter()
    stream = open_text(args.file)
    raw = stream.buffer.raw if hasattr(stream.buffer, "raw") else None  # type: ignore[attr-defined]
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
        pos = _file_pos(raw, stream)
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


def _file_pos(raw: Any, stream: Any) -> int:
    fileobj = getattr(stream.buffer, "fileobj", None)
    try:
        if fileobj is not None:
            return fileobj.tell()
        return stream.buffer.tell()
    except (OSError, ValueError):
        return 0


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


def _time_arg(text: str | None) -> int | None:
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
                                   as_of_s=_time_arg(args.as_of), workers=args.workers,
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


def cmd_replay(args: argparse.Namespace, settings: Settings) -> int:
    from tqdm import tqdm

    from service.tools.replay import ReplayError, replay, wait_for_scoring

    try:
        with tqdm(unit="count", desc="replay", file=sys.stderr, disable=args.quiet) as bar:
            summary = replay(args.feed, url=args.url, key=api_key(args), speed=args.speed,
                             from_s=_time_arg(args.from_), until_s=_time_arg(args.until),
                             batch=args.batch, progress=bar.update)
    except ReplayError as exc:
        print(f"replay stopped: {exc}", file=sys.stderr)
        return 1
    table([[f"{summary.rows:,}", summary.batches, f"{summary.accepted:,}",
            f"{summary.duplicate:,}", summary.conflict, summary.rejected, summary.retries,
            f"{summary.seconds:.1f}"]],
          ["rows", "batches", "accepted", "duplicate", "conflict", "rejected", "retries", "seconds"])
    if args.wait_scored:
        backlog = wait_for_scoring(args.url)
        if backlog:
            print(f"scoring backlog still {backlog} after waiting", file=sys.stderr)
    return 0 if not summary.rejected else 1


def cmd_demo(args: argparse.Namespace, settings: Settings) -> int:
    from service.tools.demo import main_demo

    return main_demo(args.feed, args.folder, workers=args.workers)


def cmd_evaluate(args: argparse.Namespace, settings: Settings) -> int:
    from service.tools import evaluate

    truth = evaluate.load_truth(args.truth)
    key = api_key(args)
    alerts = evaluate.fetch_alerts(args.url, key)
    report = evaluate.evaluate(truth, alerts, intervals=evaluate.detector_intervals(args.url, key))
    if args.json:
        print(orjson.dumps(report, option=orjson.OPT_INDENT_2).decode())
    else:
        evaluate.print_report(report)
    return 0


def cmd_score(args: argparse.Namespace, settings: Settings) -> int:
    from service.pipeline.score import score_pass

    engine = _engine(settings)
    total = 0
    while True:
        n = score_pass(engine, settings)
        total += n
        if n == 0:
            if not args.loop:
                break
            time.sleep(args.idle)
    print(f"scored {total} detector passes", file=sys.stderr)
    return 0


def cmd_plot(args: argparse.Namespace, settings: Settings) -> int:
    import httpx

    from service.tools.plots import plot_day

    key = api_key(args)
    headers = {"Authorization": f"Bearer {key}"} if key else {}
    with httpx.Client(base_url=args.url, headers=headers, timeout=30) as c:
        r = c.get(f"/v1/detectors/{args.detector}/baseline", params={"date": args.date})
        if r.status_code != 200:
            raise TallywardError(f"baseline: {r.status_code} {r.text[:300]}")
        doc = r.json()
        lo, hi = doc["data"][0]["start"], doc["data"][-1]["start"]
        counts = c.get("/v1/counts", params={"detector_id": args.detector, "from": lo,
                                             "until": hi}).json()["data"]
        alerts = c.get("/v1/alerts", params={"detector_id": args.detector, "limit": 1000}).json()
    out = plot_day(doc, counts, [a for a in alerts["data"] if not a["withdrawn"]],
                   title=f"{args.detector} on {args.date}", out=args.out)
    print(out)
    return 0


# ----------------------------------------------------------------------------- parser


KEY_ENV = "TALLYWARD_API_KEY"
OLD_KEY_ENV = "TALLYWARD_KEY"  # the earlier name, still read


def _server_args(parser: argparse.ArgumentParser, *, role: str) -> None:
    """--url and the API key of a command that talks to a running Tallyward."""
    parser.add_argument("--url", default="http://127.0.0.1:8000", help="the service's base URL")
    given = parser.add_mutually_exclusive_group()
    given.add_argument("--key-file", help=f"file holding the API key (role {role}); "
                                          f"default: ${KEY_ENV}")
    given.add_argument("--key", help="the API key itself; other users of this machine can read "
                                     f"it in the process list, so prefer --key-file or ${KEY_ENV}")


def api_key(args: argparse.Namespace) -> str | None:
    """The key from --key-file, --key, $TALLYWARD_API_KEY or $TALLYWARD_KEY, in that order."""
    if getattr(args, "key_file", None):
        path = Path(args.key_file)
        try:
            text = path.read_text(encoding="utf-8")
            mode = path.stat().st_mode
        except (OSError, UnicodeDecodeError) as exc:
            raise TallywardError(f"--key-file {path}: cannot read it ({exc})") from None
        lines = [line.strip() for line in text.splitlines() if line.strip()]
        if len(lines) != 1 or any(ch.isspace() for ch in lines[0]):
            raise TallywardError(f"--key-file {path}: expected one line holding the key")
        if mode & 0o077:
            print(f"warning: --key-file {path} is readable by other users; chmod 600 it",
                  file=sys.stderr)
        return lines[0]
    if getattr(args, "key", None):
        print(f"warning: --key is visible to other users in the process list; prefer --key-file "
              f"or ${KEY_ENV}", file=sys.stderr)
        return args.key
    return os.environ.get(KEY_ENV) or os.environ.get(OLD_KEY_ENV) or None


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

    s = sub.add_parser("replay", help="post a recorded feed through the HTTP API in time order")
    s.add_argument("feed", help="feed folder (with counts.csv.gz) or a counts CSV file")
    _server_args(s, role="ingest")
    s.add_argument("--speed", default="max", help="max, or a factor such as 60x")
    s.add_argument("--from", dest="from_", help="RFC 3339: first interval to send")
    s.add_argument("--until", help="RFC 3339: send intervals before this")
    s.add_argument("--batch", type=int, default=5000, help="items per batch at max speed")
    s.add_argument("--wait-scored", action="store_true",
                   help="afterwards, wait until the service has scored everything")
    s.add_argument("--quiet", action="store_true")
    s.set_defaults(func=cmd_replay)

    s = sub.add_parser("demo", help="the main job on the demo network (embedded SQLite)")
    s.add_argument("--feed", help="feed folder; default seed_feed/")
    s.add_argument("--folder", help="working folder; default ./demo_run")
    s.add_argument("--workers", type=int, default=2)
    s.set_defaults(func=cmd_demo)

    s = sub.add_parser("evaluate", help="score a service's alerts against a feed's truth file")
    s.add_argument("--truth", required=True)
    _server_args(s, role="read")
    s.add_argument("--json", action="store_true", help="print the report as JSON")
    s.set_defaults(func=cmd_evaluate)

    s = sub.add_parser("score", help="score pending counts (a worker beside the service)")
    s.add_argument("--loop", action="store_true", help="keep running")
    s.add_argument("--idle", type=float, default=1.0)
    s.set_defaults(func=cmd_score)

    s = sub.add_parser("plot", help="PNG of a detector's day against its baseline band")
    s.add_argument("detector")
    s.add_argument("--date", required=True, help="local date YYYY-MM-DD")
    s.add_argument("--out", required=True, help="PNG path")
    _server_args(s, role="read")
    s.set_defaults(func=cmd_plot)

    return p


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
