"""`tallyward demo` never replaces a database that a server may be using: each run gets a new
folder, and a --folder that already holds a database is refused with the reason."""

from __future__ import annotations

import os
import subprocess
import sys

from service.tools.demo import new_run_folder
from tests.conftest import REPO


def test_each_run_gets_a_new_folder_and_latest_names_it(tmp_path) -> None:
    """Two runs in the same second get two folders; `latest` names the newest, absolutely."""
    parent = tmp_path / "demo_run"
    first = new_run_folder(parent)
    (first / "tallyward.db").write_bytes(b"in use")
    second = new_run_folder(parent)
    assert first != second and first.parent == second.parent == parent
    assert (parent / "latest").read_text().strip() == str(second)
    assert (first / "tallyward.db").read_bytes() == b"in use"


def test_demo_refuses_a_folder_that_holds_a_database(tmp_path) -> None:
    """`tallyward demo --folder DIR` with DIR/tallyward.db present exits 1 saying why, and
    leaves the database as it was."""
    folder = tmp_path / "run"
    folder.mkdir()
    (folder / "tallyward.db").write_bytes(b"served elsewhere")
    env = {k: v for k, v in os.environ.items() if not k.startswith("TALLYWARD_")}
    r = subprocess.run([sys.executable, "-m", "service.cli", "demo", "--folder", str(folder)],
                       cwd=REPO, env=env, capture_output=True, text=True, timeout=120)
    assert r.returncode == 1 and "Traceback" not in r.stderr
    assert "already holds a demo database" in r.stderr and "server may be using it" in r.stderr
    assert (folder / "tallyward.db").read_bytes() == b"served elsewhere"
