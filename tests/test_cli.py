"""The `tallyward` command line, run as a subprocess as scripts and monitoring would."""

from __future__ import annotations

import gzip
import os
import stat
import subprocess
import sys

import pytest
from sqlalchemy import func, select

from service.cli import build_parser
from service.errors import TallywardError
from service.store import tables as models
from service.tools.commands import api_key
from tests.conftest import REPO, LiveServer
from tests.factories import count_items, make_detector


def run(args: list[str], database_url: str, *, env: dict[str, str] | None = None
        ) -> subprocess.CompletedProcess[str]:
    env = {**{k: v for k, v in os.environ.items() if not k.startswith("TALLYWARD_")},
           **(env or {})}
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


def test_migrate_creates_a_new_sqlite_file_readable_by_its_owner_only(tmp_path) -> None:
    """A database file made by `migrate` has mode 0600 even under a permissive umask."""
    path = tmp_path / "fresh.db"
    old = os.umask(0o022)
    try:
        r = run(["migrate"], f"sqlite:///{path}")
    finally:
        os.umask(old)
    assert r.returncode == 0, r.stderr
    assert stat.S_IMODE(path.stat().st_mode) == 0o600


@pytest.mark.parametrize("host", ["0.0.0.0", "::", "192.0.2.10"])
def test_serve_refuses_loopback_open_on_a_network_address(sqlite_url, host) -> None:
    """`serve --host 0.0.0.0` with TALLYWARD_AUTH=loopback-open exits 2 and says why."""
    r = run(["serve", "--host", host, "--port", "1"], sqlite_url,
            env={"TALLYWARD_AUTH": "loopback-open"})
    assert r.returncode == 2
    assert "loopback-open" in r.stderr and "TALLYWARD_AUTH=required" in r.stderr


def test_serve_warns_loudly_in_loopback_open_mode(sqlite_url) -> None:
    """On loopback, demo mode starts but prints a warning about proxies on the same host."""
    server = LiveServer(sqlite_url, env={"TALLYWARD_AUTH": "loopback-open"}).start()
    server.stop()
    stderr = server.stderr()
    assert "WARNING" in stderr and "proxy" in stderr


def key_args(*extra: str):  # type: ignore[no-untyped-def]
    return build_parser().parse_args(["evaluate", "--truth", "truth.json", *extra])


def test_api_key_comes_from_a_key_file(tmp_path, capsys) -> None:
    """--key-file reads the key (one line, surrounding whitespace ignored) without warnings."""
    path = tmp_path / "key"
    path.write_text("tw_from_file\n")
    path.chmod(0o600)
    assert api_key(key_args("--key-file", str(path))) == "tw_from_file"
    assert capsys.readouterr().err == ""


def test_api_key_file_readable_by_others_is_used_with_a_warning(tmp_path, capsys) -> None:
    """A group- or world-readable key file still works, with a warning to chmod it."""
    path = tmp_path / "key"
    path.write_text("tw_from_file")
    path.chmod(0o644)
    assert api_key(key_args("--key-file", str(path))) == "tw_from_file"
    assert "chmod 600" in capsys.readouterr().err


@pytest.mark.parametrize("content", ["", "two words", "tw_a\ntw_b\n"])
def test_api_key_file_that_is_not_one_key_is_refused(tmp_path, content) -> None:
    """An empty key file, or one holding more than a key, stops with a clear error."""
    path = tmp_path / "key"
    path.write_text(content)
    with pytest.raises(TallywardError, match="one line holding the key"):
        api_key(key_args("--key-file", str(path)))


def test_api_key_comes_from_the_environment(monkeypatch) -> None:
    """$TALLYWARD_API_KEY supplies the key; the earlier $TALLYWARD_KEY is still read."""
    monkeypatch.setenv("TALLYWARD_KEY", "tw_old_name")
    assert api_key(key_args()) == "tw_old_name"
    monkeypatch.setenv("TALLYWARD_API_KEY", "tw_from_env")
    assert api_key(key_args()) == "tw_from_env"


def test_api_key_on_the_command_line_warns_about_the_process_list(capsys) -> None:
    """--key still works but says other users can read it."""
    assert api_key(key_args("--key", "tw_visible")) == "tw_visible"
    assert "process list" in capsys.readouterr().err


def test_key_and_key_file_together_are_refused(tmp_path) -> None:
    """Giving both --key and --key-file is a usage error."""
    with pytest.raises(SystemExit):
        key_args("--key", "tw_a", "--key-file", str(tmp_path / "key"))


def test_replay_with_key_file_posts_through_a_live_server(live_server, engine, keys,
                                                          tmp_path) -> None:
    """`replay --key-file` authenticates with the key read from the file."""
    make_detector(engine, "D1")
    feed = tmp_path / "counts.csv"
    feed.write_text("detector_id,start,count\n" + "".join(
        f"D1,{i['start']},{i['count']}\n" for i in count_items("D1", n=30)))
    key_file = tmp_path / "ingest.key"
    key_file.write_text(keys["ingest"] + "\n")
    key_file.chmod(0o600)
    r = run(["replay", str(feed), "--url", live_server.url, "--key-file", str(key_file),
             "--quiet"], live_server.env["TALLYWARD_DATABASE_URL"])
    assert r.returncode == 0, r.stderr
    with engine.connect() as conn:
        assert conn.execute(select(func.count()).select_from(models.counts)).scalar_one() == 30
