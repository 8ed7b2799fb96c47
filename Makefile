# Two commands on a fresh machine: `make demo` (the main job on embedded SQLite) and `make test`.
# Each creates its own virtual environment in .venv and installs what it needs.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed
DEMO_STAMP := $(VENV)/.installed-demo

.PHONY: demo test test-fast contract bench lint typecheck clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip

# The developer's environment: the product, the demo tools and the test/lint tools.
$(STAMP): pyproject.toml | $(BIN)/python
	$(BIN)/pip install --quiet -e ".[test]"
	touch $(STAMP)

# The product with the optional demo extra only (simulator, replay, evaluation, plots).
$(DEMO_STAMP): pyproject.toml | $(BIN)/python
	$(BIN)/pip install --quiet -e ".[demo]"
	touch $(DEMO_STAMP)

# Each run works in a new demo_run/run-<time>/ (demo_run/latest names it): a database that a
# server started on an earlier run may still use is never replaced.
demo: $(DEMO_STAMP)
	$(BIN)/tallyward demo

# Two pytest processes (pytest-xdist): much of the suite waits on servers, browsers and
# databases, so two share the 2 cores well; each has its own throw-away databases.
test: $(STAMP)
	$(BIN)/python -m pytest -n 2

# The fast tier: pure statistics and logic, no database or process (seconds).
test-fast: $(STAMP)
	$(BIN)/python -m pytest -m "unit and not slow"

# schemathesis against a real server: SQLite, and PostgreSQL when TALLYWARD_TEST_DATABASE_URL is set.
contract: $(STAMP)
	$(BIN)/python -m tests.contract.run_schemathesis

bench: $(STAMP)
	$(BIN)/python bench/bench.py

# ruff, the import contracts of pyproject.toml ([tool.importlinter]: the layers' direction),
# then mypy on service/stats and service/store ([tool.mypy]).
lint: $(STAMP)
	$(BIN)/ruff check service tests bench migrations
	$(BIN)/lint-imports
	$(BIN)/mypy

typecheck: $(STAMP)
	$(BIN)/mypy

clean:
	rm -rf $(VENV) demo_run tallyward.db tallyward.db-wal tallyward.db-shm
