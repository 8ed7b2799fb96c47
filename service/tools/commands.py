"""The demo tools' commands, plugged into ``tallyward`` through the entry-point group
``tallyward.commands`` (see ``pyproject.toml``): replay, demo, evaluate, plot.

The product's CLI never imports this module; it calls :func:`register` for every entry
point of the group it finds installed. The tools' own dependencies (httpx, matplotlib) come
with the ``demo`` extra: ``pip install 'tallyward[demo]'``.
"""

from __future__ import annotations

import argparse
import os
import sys
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import orjson

from service.cli import time_arg
from service.config import Settings
from service.errors import TallywardError
from service.textio import table

KEY_ENV = "TALLYWARD_API_KEY"
OLD_KEY_ENV = "TALLYWARD_KEY"  # the earlier name, still read
DEMO_EXTRA = "the demo tools need the demo extra: pip install 'tallyward[demo]'"


def _needs_extra(exc: ImportError) -> TallywardError:
    return TallywardError(f"{DEMO_EXTRA} ({exc})")


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


@contextmanager
def service_errors(url: str, *, role: str) -> Iterator[None]:
    """Turns a service that cannot be reached, or that refuses the key, into a one-line error
    (exit status 1) instead of a traceback."""
    import httpx

    try:
        yield
    except httpx.HTTPStatusError as exc:
        r = exc.response
        try:
            said = r.json().get("message") or r.text[:200]
        except ValueError:
            said = r.text[:200]
        if r.status_code == 401:
            raise TallywardError(
                f"{url} refused the request without a valid API key ({said}); give a key of "
                f"role {role} with ${KEY_ENV}, --key-file or --key") from None
        if r.status_code == 403:
            raise TallywardError(f"{url} refused the key: {said}; use a key of role {role}"
                                 ) from None
        raise TallywardError(f"{r.request.method} {r.request.url.path} answered "
                             f"{r.status_code}: {said}") from None
    except httpx.TransportError as exc:
        raise TallywardError(f"cannot reach the service at {url} ({type(exc).__name__}: "
                             f"{exc}); is `tallyward serve` running there? (--url)") from None


# ----------------------------------------------------------------------------- commands


def cmd_replay(args: argparse.Namespace, settings: Settings) -> int:
    from tqdm import tqdm

    try:
        from service.tools.replay import ReplayError, replay, wait_for_scoring
    except ImportError as exc:
        raise _needs_extra(exc) from None

    from_s, until_s = time_arg(args.from_, "--from"), time_arg(args.until, "--until")
    key = api_key(args)
    try:
        with tqdm(unit="count", desc="replay", file=sys.stderr, disable=args.quiet) as bar:
            summary = replay(args.feed, url=args.url, key=key, speed=args.speed,
                             from_s=from_s, until_s=until_s, batch=args.batch,
                             progress=bar.update)
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
    try:
        from service.tools.demo import main_demo
    except ImportError as exc:
        raise _needs_extra(exc) from None

    return main_demo(args.feed, args.folder, workers=args.workers)


def cmd_evaluate(args: argparse.Namespace, settings: Settings) -> int:
    try:
        from service.tools import evaluate
    except ImportError as exc:
        raise _needs_extra(exc) from None

    truth = evaluate.load_truth(args.truth)
    key = api_key(args)
    with service_errors(args.url, role="read"):
        alerts = evaluate.fetch_alerts(args.url, key)
        intervals = evaluate.detector_intervals(args.url, key)
    report = evaluate.evaluate(truth, alerts, intervals=intervals)
    if args.json:
        print(orjson.dumps(report, option=orjson.OPT_INDENT_2).decode())
    else:
        evaluate.print_report(report)
    return 0


def cmd_plot(args: argparse.Namespace, settings: Settings) -> int:
    try:
        import httpx

        from service.tools.plots import plot_day
    except ImportError as exc:
        raise _needs_extra(exc) from None

    key = api_key(args)
    headers = {"Authorization": f"Bearer {key}"} if key else {}
    with service_errors(args.url, role="read"), \
            httpx.Client(base_url=args.url, headers=headers, timeout=30) as c:
        r = c.get(f"/v1/detectors/{args.detector}/baseline", params={"date": args.date})
        r.raise_for_status()
        doc = r.json()
        lo, hi = doc["data"][0]["start"], doc["data"][-1]["start"]
        r = c.get("/v1/counts", params={"detector_id": args.detector, "from": lo, "until": hi})
        r.raise_for_status()
        counts = r.json()["data"]
        r = c.get("/v1/alerts", params={"detector_id": args.detector, "limit": 1000})
        r.raise_for_status()
        alerts = r.json()
        r = c.get(f"/v1/detectors/{args.detector}")
        r.raise_for_status()
        det = r.json()
    name = det.get("label") or args.detector
    out = plot_day(doc, counts, alerts["data"], title=f"{name} ({args.detector}), {args.date}",
                   out=args.out, timezone=det.get("timezone"))
    print(out)
    return 0


# ----------------------------------------------------------------------------- registration


def register(sub: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    """Add the tools' commands to ``tallyward``'s subcommands (the entry point's target)."""
    s = sub.add_parser("replay", help="post a recorded feed through the HTTP API in time order")
    s.add_argument("feed", help="feed folder (with counts.csv.gz) or a counts CSV file")
    _server_args(s, role="ingest")
    s.add_argument("--speed", default="max", help="'max' (as fast as the service takes them), "
                                                  "or a factor of real time such as 60x")
    s.add_argument("--from", dest="from_", help="RFC 3339: first interval to send")
    s.add_argument("--until", help="RFC 3339: send intervals before this")
    s.add_argument("--batch", type=int, default=5000, help="items per batch at max speed")
    s.add_argument("--wait-scored", action="store_true",
                   help="afterwards, wait until the service has scored everything")
    s.add_argument("--quiet", action="store_true", help="no progress bar")
    s.set_defaults(func=cmd_replay)

    s = sub.add_parser("demo", help="the main job on the demo network (embedded SQLite)")
    s.add_argument("--feed", help="feed folder; default: seed_feed/ of the working folder or "
                                   "the checkout")
    s.add_argument("--folder", help="working folder; default: a new demo_run/run-<time>/ per "
                                     "run (demo_run/latest points at the newest)")
    s.add_argument("--workers", type=int, default=2, help="fitting processes")
    s.set_defaults(func=cmd_demo)

    s = sub.add_parser("evaluate", help="score a service's alerts against a feed's truth file")
    s.add_argument("--truth", required=True, help="the feed's truth.json (injected faults)")
    _server_args(s, role="read")
    s.add_argument("--json", action="store_true", help="print the report as JSON")
    s.set_defaults(func=cmd_evaluate)

    s = sub.add_parser("plot", help="PNG of a detector's day against its baseline band")
    s.add_argument("detector", help="detector id")
    s.add_argument("--date", required=True, help="local date YYYY-MM-DD")
    s.add_argument("--out", required=True, help="PNG path")
    _server_args(s, role="read")
    s.set_defaults(func=cmd_plot)
