# Two entry points for a fresh machine: `make demo` and `make test`.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed

.PHONY: demo test lint bench clean sample-data coastlines

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip
	$(BIN)/pip install --quiet -e '.[dev]'
	touch $(STAMP)

demo: $(STAMP) coastlines
	$(BIN)/flowpipe inspect sample_data/demo_global.nc sample_data/demo_regional.nc
	$(BIN)/flowpipe run configs/demo.toml
	@echo "demo outputs: out/demo/ (open out/demo/report.html)"

# Offline coastlines for the maps, from Debian (maps still work without them, with a warning).
coastlines:
	@if [ ! -d /usr/share/cartopy/data ] && [ "$$(id -u)" = 0 ] && command -v apt-get >/dev/null; then \
		apt-get update -qq && apt-get install -y -qq python-cartopy-data || \
		echo "flowpipe: could not install python-cartopy-data; maps will have no coastlines"; \
	fi

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
