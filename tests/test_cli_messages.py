"""The command line answers ordinary mistakes with a one-line message and a documented exit
status (0 done, 1 the work failed, 2 bad usage), never a traceback. Each case runs
`tallyward` as a real subprocess."""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
from pathlib import Path

import pytest

from service import __version__
from service.cli import build_parser
from tests.conftest import REPO, free_port

TRUTH = REPO / "seed_feed" / "truth.json"


def tallyward(args: list[str], *, env: dict[str, str] | None = None, database_url: str | None
              = None, cwd: Path = REPO) -> subprocess.CompletedProcess[str]:
    base = {k: v for k, v in os.environ.items() if not k.startswith("TALLYWARD_")}
    if database_url:
        base["TALLYWARD_DATABASE_URL"] = database_url
    return subprocess.run([sys.executable, "-m", "service.cli", *args], cwd=cwd,
                          env={**base, **(env or {})}, capture_output=True, text=True,
                          timeout=120)


def one_clear_line(r: subprocess.CompletedProcess[str]) -> str:
    """stderr of a failed command: no traceback, and the message on one line."""
    assert "Traceback" not in r.stderr, r.stderr
    lines = [line for line in r.stderr.splitlines() if line.strip()]
    assert len(lines) == 1, r.stderr
    return lines[0]


def test_version_prints_the_package_version() -> None:
    """`tallyward --version` prints the version and exits 0."""
    r = tallyward(["--version"])
    assert r.returncode == 0 and r.stdout.strip() == f"tallyward {__version__}"


def test_every_option_has_help_and_shows_its_default() -> None:
    """Every option of every command has help text, and `--help` shows each default."""
    parser = build_parser()
    missing = []

    def walk(p: argparse.ArgumentParser, path: str) -> None:
        for action in p._actions:
            if isinstance(action, argparse._SubParsersAction):
                for name, child in action.choices.items():
                    walk(child, f"{path} {name}")
            elif not isinstance(action, argparse._HelpAction | argparse._VersionAction):
                if not action.help:
                    missing.append(f"{path} {action.dest}")
                elif action.default not in (None, False, argparse.SUPPRESS):
                    text = p.format_help()
                    assert f"(default: {action.default})" in text, (path, action.dest)

    walk(parser, "tallyward")
    assert not missing


def test_help_documents_exit_statuses() -> None:
    """`tallyward --help` documents the exit statuses 0, 1 and 2."""
    r = tallyward(["--help"])
    assert r.returncode == 0
    assert "exit status" in r.stdout and "bad usage" in r.stdout


def test_bad_setting_names_the_environment_variable(sqlite_url) -> None:
    """A bad TALLYWARD_* value exits 2 naming the variable as the README documents it."""
    r = tallyward(["keys", "list"], database_url=sqlite_url,
                  env={"TALLYWARD_FALSE_ALERTS_PER_WEEK": "-1"})
    assert r.returncode == 2
    line = one_clear_line(r)
    assert "TALLYWARD_FALSE_ALERTS_PER_WEEK" in line and "'-1'" in line


@pytest.mark.parametrize("argv, option, bar", [
    (["fit", "--as-of", "yesterday"], "--as-of", "fit baselines"),
    (["replay", "seed_feed", "--from", "yesterday"], "--from", "replay"),
])
def test_time_that_is_not_a_time_fails_before_the_progress_bar(sqlite_url, argv, option,
                                                               bar) -> None:
    """`fit --as-of yesterday` (and `replay --from yesterday`) is bad usage (2), told before
    any progress bar is drawn."""
    r = tallyward(argv, database_url=sqlite_url)
    assert r.returncode == 2
    line = one_clear_line(r)
    assert line.startswith(f"error: {option}:") and "RFC 3339" in line
    assert f"{bar}:" not in r.stderr


def test_import_detectors_of_a_non_json_file(sqlite_url, tmp_path) -> None:
    """`import-detectors` on a file that is not JSON says so and what it expects (exit 1)."""
    path = tmp_path / "detectors.csv"
    path.write_text("detector_id,lanes\nD1,2\n")
    r = tallyward(["import-detectors", str(path)], database_url=sqlite_url)
    assert r.returncode == 1
    line = one_clear_line(r)
    assert "is not JSON" in line and "FeatureCollection" in line


def test_command_on_a_missing_database_file_names_the_setting(tmp_path) -> None:
    """`keys create` against a SQLite file that does not exist says which setting to fix and
    leaves no empty database file behind."""
    path = tmp_path / "nowhere.db"
    r = tallyward(["keys", "create", "--role", "read", "--name", "x"],
                  database_url=f"sqlite:///{path}")
    assert r.returncode == 1
    line = one_clear_line(r)
    assert "TALLYWARD_DATABASE_URL" in line and "tallyward migrate" in line
    assert not path.exists()


def test_command_on_a_database_without_schema_says_migrate(tmp_path) -> None:
    """A database file without the schema is told apart from one that is down."""
    path = tmp_path / "empty.db"
    path.write_bytes(b"")
    r = tallyward(["keys", "list"], database_url=f"sqlite:///{path}")
    assert r.returncode == 1
    line = one_clear_line(r)
    assert "no Tallyward schema" in line and "tallyward migrate" in line


def test_evaluate_with_the_server_down(tmp_path) -> None:
    """`evaluate` against a port nobody listens on says it cannot reach the service (1)."""
    url = f"http://127.0.0.1:{free_port()}"
    r = tallyward(["evaluate", "--truth", str(TRUTH), "--url", url])
    assert r.returncode == 1
    line = one_clear_line(r)
    assert "cannot reach the service" in line and url in line


def test_evaluate_without_a_key(live_server) -> None:
    """`evaluate` without a key against a server that requires keys says how to give one (1)."""
    r = tallyward(["evaluate", "--truth", str(TRUTH), "--url", live_server.url])
    assert r.returncode == 1
    line = one_clear_line(r)
    assert "API key" in line and "TALLYWARD_API_KEY" in line


def test_evaluate_json_into_a_closed_pipe(live_server, keys) -> None:
    """`evaluate --json | head`: a reader that closed the pipe ends the command quietly (0),
    through a real shell pipe and through a pipe closed before anything is written."""
    env = {**{k: v for k, v in os.environ.items() if not k.startswith("TALLYWARD_")},
           "TALLYWARD_API_KEY": keys["read"]}
    args = [sys.executable, "-m", "service.cli", "evaluate", "--truth", str(TRUTH), "--url",
            live_server.url, "--json"]
    proc = subprocess.Popen(args, cwd=REPO, env=env, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE)
    assert proc.stdout is not None and proc.stderr is not None
    proc.stdout.close()  # the reader is gone before the report is written
    stderr = proc.stderr.read().decode()
    assert proc.wait(120) == 0, stderr
    assert "Traceback" not in stderr and "BrokenPipe" not in stderr
    shell = subprocess.run(["bash", "-c", 'set -o pipefail; "$@" | head -n 2', "sh", *args],
                           cwd=REPO, env=env, capture_output=True, text=True, timeout=120)
    assert shell.returncode == 0, shell.stderr
    assert shell.stdout.splitlines()[0] == "{" and "Traceback" not in shell.stderr


@pytest.mark.parametrize("argv", [["fit", "--workers", "many"], ["no-such-command"]])
def test_bad_usage_exits_2(argv) -> None:
    """An option of the wrong type or an unknown command is bad usage (2)."""
    r = tallyward(argv)
    assert r.returncode == 2 and "Traceback" not in r.stderr
