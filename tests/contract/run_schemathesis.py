"""Contract run: schemathesis against a real ``tallyward serve`` on a loopback port.

For each database (SQLite always; PostgreSQL when TALLYWARD_TEST_DATABASE_URL is set, or as
chosen with --database) it builds a small fitted network with an open alert, starts the server,
and runs every operation of the published OpenAPI document through schemathesis with an admin
key, a fixed seed and a bounded number of examples. Exits non-zero when schemathesis reports a
failure (or the setup fails), and prints how many test cases each run generated.

    .venv/bin/python -m tests.contract.run_schemathesis [--database sqlite|postgresql|all]
        [--max-examples N] [--seed N] [-- more st run options, e.g. --phases fuzzing]
"""

from __future__ import annotations

import argparse
import json
import os
import re
import subprocess
import sys
import tempfile
import time
import warnings
from collections import Counter
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import httpx

from service.config import Settings
from service.pipeline import fit as fitting
from service.store import keys as security
from service.store import migrations as migrate
from service.store.engine import make_engine
from service.store.scratch import scratch_database
from tests.factories import load_network, small_network

with warnings.catch_warnings():  # conftest's test-client import warns outside pytest's filters
    warnings.simplefilter("ignore")
    from tests.conftest import LiveServer, auth

DETECTORS = ("bra3-nb-t1", "bra3-nb-t2")
DEAD = "bra3-nb-t1"  # reports zeros for two hours of the live day: opens an alert
# Every check but three: positive_data_acceptance (whether a schema-valid request succeeds
# depends on stored state: a registered detector, a start on its interval grid, a fitted
# baseline, which no schema can express), object_level_authorization (keys do not own
# resources here) and max_response_time (a timing limit, not a contract).
CHECKS = ",".join((
    "not_a_server_error", "status_code_conformance", "content_type_conformance",
    "response_headers_conformance", "response_schema_conformance", "negative_data_rejection",
    "missing_required_header", "unsupported_method", "allow_header_conformance",
    "use_after_free", "ensure_resource_availability", "ignored_auth",
))

# Examples per operation. A fit refits every detector with history (about a second each, far
# more on a busy machine), so it gets a fifth of the examples and no stateful scenarios.
FIT_SHARE = 5
CONFIG = """\
[generation]
max-examples = {max_examples}

[[operations]]
include-name = "POST /v1/baselines/fit"
generation = {{ max-examples = {fit_examples} }}
phases = {{ stateful = {{ enabled = false }} }}
"""


@contextmanager
def database(backend: str, workdir: Path) -> Iterator[str]:
    """A migrated, empty database of ``backend``, removed afterwards."""
    if backend == "sqlite":
        url = f"sqlite:///{workdir / 'contract.db'}"
        migrate.upgrade(url)
        yield url
        return
    server_url = os.environ.get("TALLYWARD_TEST_DATABASE_URL")
    if not server_url:
        raise SystemExit("--database postgresql needs TALLYWARD_TEST_DATABASE_URL")
    with scratch_database(server_url, "tallyward_contract") as url:
        yield url


def seed(url: str) -> tuple[str, list[dict[str, object]]]:
    """Two weeks of history for two detectors, fitted; returns an admin key and the live
    day's counts (to be posted over HTTP so the server's own scorer opens an alert)."""
    settings = Settings(database_url=url)
    engine = make_engine(settings)
    try:
        net = small_network(DETECTORS, history_days=14, test_days=1, seed=3)
        load_network(engine, net, until_s=net.test_start_s)
        fitting.fit_many(settings, engine, as_of_s=net.test_start_s)
        key = security.create_key(engine, name="contract-admin", role="admin")
    finally:
        engine.dispose()
    ids = [d.detector_id for d in net.detectors]
    dead_from = net.test_start_s + 7 * 3600
    live = []
    for d, t, c in zip(net.detector_index, net.start_s, net.count, strict=True):
        if t < net.test_start_s:
            continue
        dead = ids[int(d)] == DEAD and dead_from <= t < dead_from + 7200
        live.append({"detector_id": ids[int(d)], "count": 0 if dead else int(c),
                     "start": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(int(t)))})
    return key, live


def post_live_day(server: LiveServer, key: str, live: list[dict[str, object]]) -> None:
    with httpx.Client(base_url=server.url, headers=auth(key), timeout=60) as c:
        for lo in range(0, len(live), 500):
            r = c.post("/v1/counts", json={"counts": live[lo : lo + 500]})
            if r.status_code != 200:
                raise SystemExit(f"seeding the live day failed: {r.status_code} {r.text[:500]}")
        deadline = time.monotonic() + 120  # a bound on waiting for the scorer
        while c.get("/v1/health").json()["scoring_backlog"] and time.monotonic() < deadline:
            time.sleep(0.2)
        alerts = c.get("/v1/alerts").json()["data"]
        if not alerts:
            raise SystemExit("seeding opened no alert; the alert routes would only see 404s")


def run_schemathesis(server: LiveServer, key: str, *, max_examples: int, seed_value: int,
                     workdir: Path, extra: list[str]) -> tuple[int, int | None]:
    """Returns schemathesis's exit code and the number of test cases it generated."""
    config = workdir / "schemathesis.toml"
    config.write_text(CONFIG.format(max_examples=max_examples,
                                    fit_examples=max(1, max_examples // FIT_SHARE)))
    command = [
        str(Path(sys.executable).with_name("st")), "--config-file", str(config),
        "run", f"{server.url}/openapi.json",
        "--header", f"Authorization: Bearer {key}",
        "--checks", CHECKS, "--seed", str(seed_value),
        "--generation-database", "none", "--request-timeout", "30",
        "--workers", "1", "--no-color",
        "--report", "junit", "--report-dir", str(workdir / "report"), *extra,
    ]
    shown = [part if not part.startswith("Authorization:") else "Authorization: Bearer ***"
             for part in command]
    print("$", " ".join(shown), flush=True)
    proc = subprocess.run(command, cwd=workdir, stdout=subprocess.PIPE, stderr=subprocess.STDOUT,
                          text=True, env={**os.environ, "NO_COLOR": "1"})
    # Its closing banner looks like pytest's ("==== 1 warning in 30s ===="); printed bare, a
    # reader of CI logs could take it for the test suite's own closing line.
    print(re.sub(r"(?m)^=+ (.+?) =+$", r"schemathesis: \1", proc.stdout), flush=True)
    found = re.search(r"(\d+) generated", proc.stdout)
    return proc.returncode, int(found.group(1)) if found else None


def print_server_errors(path: Path) -> None:
    """The server's own account of its 500s: each distinct exception, the paths and a count."""
    found: Counter[tuple[str, str]] = Counter()
    for line in path.read_text(errors="replace").splitlines() if path.exists() else []:
        try:
            record = json.loads(line)
        except ValueError:
            continue
        if isinstance(record, dict) and record.get("exc"):
            raised = [x for x in record["exc"].splitlines() if re.match(r"[A-Za-z_][\w.]*: ", x)]
            last = raised[-1] if raised else record["exc"].strip().splitlines()[-1]
            found[(str(record.get("path")), last[:300])] += 1
    for (where, exception), times in found.most_common():
        print(f"server error x{times} on {where}: {exception}")


def contract_run(backend: str, *, max_examples: int, seed_value: int, extra: list[str]) -> bool:
    started = time.monotonic()
    with tempfile.TemporaryDirectory(prefix="tallyward-contract-") as tmp:
        workdir = Path(tmp)
        with database(backend, workdir) as url:
            key, live = seed(url)
            server = LiveServer(url, env={"TALLYWARD_CLOCK": "data"}).start()
            server_log = workdir / "server.log"
            try:
                post_live_day(server, key, live)
                code, cases = run_schemathesis(server, key, max_examples=max_examples,
                                               seed_value=seed_value, workdir=workdir,
                                               extra=extra)
            finally:
                server.stop()
                server_log.write_text(server.stderr())
            if code != 0:
                print_server_errors(server_log)
    verdict = "ok" if code == 0 else f"FAILED (schemathesis exit {code})"
    print(f"contract [{backend}]: {cases if cases is not None else 'unknown number of'} "
          f"test cases over every operation in {time.monotonic() - started:.0f} s: {verdict}",
          flush=True)
    return code == 0 and cases is not None and cases > 0


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--database", choices=("sqlite", "postgresql", "all"), default="all",
                        help="'all': SQLite, and PostgreSQL when TALLYWARD_TEST_DATABASE_URL is set")
    parser.add_argument("--max-examples", type=int, default=40, help="test cases per operation")
    parser.add_argument("--seed", type=int, default=20261116)
    parser.add_argument("st_args", nargs="*", help="more `st run` options, after --")
    args = parser.parse_args(argv)
    backends = [args.database] if args.database != "all" else (
        ["sqlite"] + (["postgresql"] if os.environ.get("TALLYWARD_TEST_DATABASE_URL") else []))
    results = [contract_run(b, max_examples=args.max_examples, seed_value=args.seed,
                            extra=args.st_args) for b in backends]
    return 0 if all(results) else 1


if __name__ == "__main__":
    sys.exit(main())
