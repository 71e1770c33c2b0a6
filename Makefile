# beamdiag: two commands to start.  `make demo` runs the dashboard on demo data,
# `make test` runs the whole test suite.  Everything lives in ./.venv.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
HOST   ?= 127.0.0.1
PORT   ?= 8501
STORE  ?= demo-store

.PHONY: demo test bench lint clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip

$(VENV)/.installed: $(BIN)/python pyproject.toml
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $@

demo: $(VENV)/.installed
	@test -d $(STORE) || $(BIN)/beamdiag demo --store $(STORE)
	@echo "beamdiag dashboard: http://$(HOST):$(PORT)/"
	$(BIN)/beamdiag dashboard --store $(STORE) --host $(HOST) --port $(PORT)

test: $(VENV)/.installed
	$(BIN)/python -m pytest

bench: $(VENV)/.installed
	@for f in bench/bench_*.py; do echo "== $$f"; $(BIN)/python $$f || exit 1; done

lint: $(VENV)/.installed
	$(BIN)/python -m pip install --quiet ruff mypy
	$(BIN)/ruff check diagnostics dashboard tests bench
	$(BIN)/mypy diagnostics

clean:
	rm -rf $(VENV) demo-store .pytest_cache
