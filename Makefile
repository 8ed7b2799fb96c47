# Two commands on a fresh machine: `make demo` (the main job on embedded SQLite) and `make test`.
# Each creates its own virtual environment in .venv and installs what it needs.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: demo test test-fast contract bench lint clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip
	$(BIN)/pip install --quiet -e ".[test]"
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/tallyward demo

test: $(STAMP)
	$(BIN)/python -m pytest

# The fast tier: pure statistics and logic, no database or process (seconds).
test-fast: $(STAMP)
	$(BIN)/python -m pytest -m "unit and not slow"

# schemathesis against a real server: SQLite, and PostgreSQL when TALLYWARD_TEST_DATABASE_URL is set.
contract: $(STAMP)
	$(BIN)/python -m tests.contract.run_schemathesis

bench: $(STAMP)
	$(BIN)/python bench/bench.py

lint: $(STAMP)
	$(BIN)/ruff check service tests bench

clean:
	rm -rf $(VENV) demo_run tallyward.db tallyward.db-wal tallyward.db-shm
