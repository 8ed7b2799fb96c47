"""The `tallyward` command line, run as a subprocess as scripts and monitoring would."""

from __future__ import annotations

import gzip
import os
import subprocess
import sys

from sqlalchemy import func, select

from service import models
from tests.conftest import REPO
from tests.factories import count_items, make_detector


def run(args: list[str], database_url: str) -> subprocess.CompletedProcess[str]:
    env = {k: v for k, v in os.environ.items() if not k.startswith("TALLYWARD_")}
    env["TALLYWARD_DATABASE_URL"] = database_url
    return subprocess.run([sys.executable, "-m", "service.cli", *args], cwd=REPO, env=env,
                          capture_output=True, text=True, timeout=120)


def test_keys_create_prints_the_key_alone(database_url) -> None:
    """`keys create` prints only the new key on stdout; `keys list` shows it without the key."""
    r = run(["keys", "create", "--role", "read", "--name", "wall-board"], database_url)
    assert r.returncode == 0, r.stderr
    key = r.stdout.strip()
    assert key.startswith("tw_") and len(r.stdout.splitlines()) == 1
    listed = run(["keys", "list"], database_url)
    assert "wall-board" in listed.stdout and key not in listed.stdout
    assert run(["keys", "revoke", "wall-board"], database_url).returncode == 0
    assert "active" not in run(["keys", "list"], database_url).stdout.split("\n", 2)[2]


def test_import_counts_streams_gzip_csv_and_reports_rejects_by_line(database_url, engine,
                                                                      tmp_path) -> None:
    """`import-counts` loads a .csv.gz in chunks and names the file line of each rejected row."""
    make_detector(engine, "D1")
    rows = ["detector_id,start,count"] + [f"D1,{i['start']},{i['count']}"
                                          for i in count_items("D1", n=250)]
    rows.insert(100, "D1,2026-11-16T06:00:07Z,5")  # misaligned: file line 101
    path = tmp_path / "counts.csv.gz"
    with gzip.open(path, "wt", newline="") as f:
        f.write("\r\n".join(rows) + "\r\n")
    r = run(["import-counts", str(path), "--chunk", "64", "--quiet"], database_url)
    assert r.returncode == 1
    assert "line 101" in r.stderr and "interval grid" in r.stderr
    assert "250" in r.stdout  # accepted column of the summary table
    with engine.connect() as conn:
        assert conn.execute(select(func.count()).select_from(models.counts)).scalar_one() == 250


def test_migrate_command_reaches_head(database_url) -> None:
    """`migrate` is idempotent at head."""
    r = run(["migrate"], database_url)
    assert r.returncode == 0 and "head" in r.stderr
