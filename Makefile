# Ramiform: one entry point for setting up, serving, testing and benchmarking.
PYTHON ?= $(shell command -v python3.11 || command -v python3)
VENV   := .venv
BIN    := $(VENV)/bin
PORT   ?= 8000
HOST   ?= 127.0.0.1
STAMP  := $(VENV)/.installed

.PHONY: install serve test test-fast benchmark library clean

$(STAMP): requirements.lock pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -r requirements.lock
	$(BIN)/python -m pip install --quiet --no-deps -e .
	touch $(STAMP)

install: $(STAMP)

serve: install
	$(BIN)/ramiform serve --host $(HOST) --port $(PORT)

# The whole suite, slow science checks included.
test: install
	bash scripts/system-deps.sh
	$(BIN)/python -m pytest -n 2 --dist loadgroup

# Everything except checks marked slow, for a quick edit-test loop.
test-fast: install
	$(BIN)/python -m pytest -n 2 -m "not slow and not browser"

benchmark: install
	for b in benchmarks/bench_*.py; do echo "== $$b"; $(BIN)/python $$b || exit 1; done

library: install
	$(BIN)/ramiform library build --out reference_sets/default --preset default

clean:
	rm -rf $(VENV) .pytest_cache
