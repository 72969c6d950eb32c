# Set-up, demo and tests. `make demo` and `make test` create what they need.
PYTHON ?= $(shell command -v python3.11 2>/dev/null || command -v python3)
VENV   := .venv
BIN    := $(VENV)/bin
DEMO_OUT ?= out/demo
# The editor's Python module: a venv of its own (it pins numpy < 2; bpy 5.0 needs 3.11).
BLENDER_VENV := .venv-blender
BPY_VERSION  ?= 5.0.1
PYTHON311    ?= $(shell command -v python3.11 2>/dev/null)

.PHONY: setup blender-venv plugin demo test lint bench clean

setup: $(VENV)/.installed

$(VENV)/.installed: pyproject.toml
	@bash scripts/ensure_system_libs.sh
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[dev]'
	@touch $@

# Never fails the build: without python3.11 or bpy the plugin tests skip and say why.
blender-venv: $(BLENDER_VENV)/.installed

$(BLENDER_VENV)/.installed:
	@if [ -z "$(PYTHON311)" ]; then \
		echo "python3.11 not found: the plugin tests will be skipped"; \
	elif $(PYTHON311) -m venv $(BLENDER_VENV) && \
		$(BLENDER_VENV)/bin/python -m pip install --quiet bpy==$(BPY_VERSION); then \
		touch $@; \
	else \
		echo "bpy==$(BPY_VERSION) could not be installed: the plugin tests will be skipped"; \
	fi

# dist/stereomesh-<version>.zip (the extension) and the core wheel beside it.
plugin: setup
	$(BIN)/python plugin_manifest/build.py --out dist

demo: setup
	$(BIN)/stereomesh demo --out $(DEMO_OUT)

test: setup blender-venv
	$(BIN)/ruff check stereomesh tests benchmarks
	$(BIN)/python -m pytest -q -ra

lint: setup
	$(BIN)/ruff check stereomesh tests benchmarks
	$(BIN)/ruff format --check stereomesh tests benchmarks

bench: setup
	$(BIN)/python benchmarks/disparity.py

clean:
	rm -rf $(VENV) $(BLENDER_VENV) out dist .pytest_cache
