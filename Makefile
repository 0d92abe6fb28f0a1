# Two entry points for a fresh machine: `make demo` and `make test`.
PY      ?= python3
VENV    := .venv
BIN     := $(VENV)/bin
STAMP   := $(VENV)/.installed
TSTAMP  := $(VENV)/.installed-test

.PHONY: demo test bench clean

$(BIN)/python:
	$(PY) -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip

$(STAMP): pyproject.toml | $(BIN)/python
	$(BIN)/pip install --quiet -e .
	touch $@

$(TSTAMP): pyproject.toml | $(BIN)/python
	$(BIN)/pip install --quiet -e '.[test]'
	touch $@ $(STAMP)

demo: $(STAMP)
	$(BIN)/python scripts/demo.py

test: $(TSTAMP)
	scripts/ensure-chromium
	$(BIN)/python -m pytest

bench: $(STAMP)
	$(BIN)/python scripts/bench

clean:
	rm -rf $(VENV) runs outputs
