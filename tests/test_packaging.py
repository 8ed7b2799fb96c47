"""Packaging: what the wheel holds, how the demo tools plug in, where the migrations are found."""

from __future__ import annotations

import subprocess
import sys
import tomllib
from importlib.metadata import entry_points

from service.store import migrations as migrate
from tests.conftest import REPO

PYPROJECT = tomllib.loads((REPO / "pyproject.toml").read_text(encoding="utf-8"))


def test_pyproject_names_every_package_of_service_and_nothing_else() -> None:
    """The wheel's package list is exactly the folders of service/ plus the migrations."""
    folders = {".".join(p.parent.relative_to(REPO).parts)
               for p in (REPO / "service").rglob("__init__.py")}
    listed = set(PYPROJECT["tool"]["setuptools"]["packages"])
    assert listed == folders | {"service.migrations", "service.migrations.versions"}
    mapped = PYPROJECT["tool"]["setuptools"]["package-dir"]["service.migrations"]
    assert (REPO / mapped / "env.py").is_file()


def test_demo_dependencies_are_an_optional_extra() -> None:
    """httpx and matplotlib are the demo extra's, not the product's, dependencies."""
    required = " ".join(PYPROJECT["project"]["dependencies"])
    extra = " ".join(PYPROJECT["project"]["optional-dependencies"]["demo"])
    for name in ("httpx", "matplotlib"):
        assert name not in required and name in extra


def test_tool_commands_are_registered_through_the_entry_point_group() -> None:
    """The installed entry point adds replay, demo, evaluate and plot to ``tallyward``."""
    from service.cli import COMMANDS_GROUP, build_parser

    names = [ep.value for ep in entry_points(group=COMMANDS_GROUP)]
    assert "service.tools.commands:register" in names
    sub = next(a for a in build_parser()._actions if a.dest == "command")
    assert {"replay", "demo", "evaluate", "plot", "serve", "fit"} <= set(sub.choices)


def test_registering_tool_commands_imports_no_demo_only_dependency() -> None:
    """``tallyward --help`` works without the demo extra: registration loads no httpx or
    matplotlib."""
    code = ("import sys; from service.cli import build_parser; build_parser(); "
            "print(sorted(m for m in ('httpx', 'matplotlib') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], cwd=REPO, capture_output=True, text=True,
                         check=True).stdout
    assert out.strip() == "[]"


def test_migrations_folder_is_found_on_first_use_and_env_overrides_it(tmp_path,
                                                                      monkeypatch) -> None:
    """The Alembic folder is looked up when first needed; TALLYWARD_MIGRATIONS_DIR wins."""
    migrate.migrations_dir.cache_clear()
    try:
        assert (migrate.migrations_dir() / "env.py").is_file()
        migrate.migrations_dir.cache_clear()
        (tmp_path / "env.py").write_text("# elsewhere\n")
        monkeypatch.setenv("TALLYWARD_MIGRATIONS_DIR", str(tmp_path))
        assert migrate.migrations_dir() == tmp_path
    finally:
        migrate.migrations_dir.cache_clear()
