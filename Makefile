# Two entry points for a fresh machine: `make demo` and `make test`.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed

.PHONY: demo test lint bench clean sample-data

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip
	$(BIN)/pip install --quiet -e '.[dev]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/flowpipe inspect sample_data/demo_global.nc sample_data/demo_regional.nc

test: $(STAMP)
	$(BIN)/ruff check flowpipe tests benchmarks sample_data
	$(BIN)/pytest -n 2 tests

lint: $(STAMP)
	$(BIN)/ruff check flowpipe tests benchmarks sample_data

sample-data: $(STAMP)
	$(BIN)/python sample_data/make_sample_data.py

bench: $(STAMP)
	for b in benchmarks/bench_*.py; do $(BIN)/python $$b || exit 1; done

clean:
	rm -rf $(VENV) out .pytest_cache
