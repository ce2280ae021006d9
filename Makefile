# Two commands for a fresh machine: `make demo` and `make test`.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin

.PHONY: demo test lint typecheck bench clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip

$(VENV)/.installed: pyproject.toml | $(BIN)/python
	$(BIN)/pip install --quiet -e .
	touch $@

$(VENV)/.installed-test: pyproject.toml examples/plugin/pyproject.toml | $(BIN)/python
	$(BIN)/pip install --quiet -e '.[test,report]'
	$(BIN)/pip install --quiet --no-deps -e examples/plugin
	touch $(VENV)/.installed $@

demo: $(VENV)/.installed
	$(BIN)/rehear demo

test: $(VENV)/.installed-test
	$(BIN)/python -m pytest

lint: $(VENV)/.installed-test
	$(BIN)/ruff check relay stages tests
	$(BIN)/mypy relay stages

bench: $(VENV)/.installed-test
	$(BIN)/python benchmarks/bench_build_lm.py
	$(BIN)/python benchmarks/bench_lexicon.py --corpus examples/workshop/corpus.jsonl
	$(BIN)/python benchmarks/bench_footprint.py
	$(BIN)/python benchmarks/bench_relay.py

clean:
	rm -rf $(VENV) .pytest_cache .mypy_cache .ruff_cache .rehear-cache
