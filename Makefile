# Set-up, demo and tests. `make demo` and `make test` create what they need.
PYTHON ?= $(shell command -v python3.11 2>/dev/null || command -v python3)
VENV   := .venv
BIN    := $(VENV)/bin
DEMO_OUT ?= out/demo

.PHONY: setup demo test lint bench clean

setup: $(VENV)/.installed

$(VENV)/.installed: pyproject.toml
	@bash scripts/ensure_system_libs.sh
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[dev]'
	@touch $@

demo: setup
	$(BIN)/stereomesh demo --out $(DEMO_OUT)

test: setup
	$(BIN)/ruff check stereomesh tests benchmarks
	$(BIN)/python -m pytest -q -ra

lint: setup
	$(BIN)/ruff check stereomesh tests benchmarks
	$(BIN)/ruff format --check stereomesh tests benchmarks

bench: setup
	$(BIN)/python benchmarks/disparity.py

clean:
	rm -rf $(VENV) out .pytest_cache
