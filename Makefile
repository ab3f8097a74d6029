# The two commands of the README: `make demo` and `make test`. Each creates .venv when needed.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin

.PHONY: demo test check coverage bench clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip

$(VENV)/.installed: pyproject.toml | $(BIN)/python
	$(BIN)/python -m pip install --quiet -e .
	touch $@

$(VENV)/.installed-test: pyproject.toml | $(BIN)/python
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $@ $(VENV)/.installed

demo: $(VENV)/.installed
	$(BIN)/ratebook demo --out data/raw
	$(BIN)/ratebook run configs/demo.yaml --replace

test: $(VENV)/.installed-test
	$(BIN)/python -m pytest -q

check: $(VENV)/.installed
	$(BIN)/ratebook check configs/demo.yaml

# Coverage study of the intervals on the demo design (about 9–11 minutes on 2 cores; not part of
# `make test`, which runs a small version). Needs the test extras for matplotlib.
coverage: $(VENV)/.installed-test
	$(BIN)/python -m pipeline.coverage --samples 500 --persons 40000 --workers 2 --out data/out/coverage

# Performance benchmark (tests/benchmarks/, not part of `make test`): generates inputs of 200k (S),
# 2M (M) and 10M (L) records under data/bench/ (cached by size and seed), times ratebook against a
# read floor, one DuckDB query and a pandas script, and writes data/bench/results-latest.json.
# Choose sizes with BENCH_SIZES="S M"; more options with BENCH_ARGS="--repeats S=5,M=3,L=1".
BENCH_SIZES ?= S M L
bench: $(VENV)/.installed-test
	$(BIN)/python -m tests.benchmarks.bench --sizes $(BENCH_SIZES) $(BENCH_ARGS)

clean:
	rm -rf $(VENV) data/out/* data/raw/demo_* .pytest_cache
