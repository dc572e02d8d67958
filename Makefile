# Every target creates .venv on first use, so a fresh clone needs nothing but python3 (≥ 3.10).
PYTHON ?= python3
VENV   ?= .venv
PY     := $(VENV)/bin/python
STAMP  := $(VENV)/.installed-stamp

.PHONY: demo test bench lint clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -e '.[dev]'
	touch $(STAMP)

demo: $(STAMP)
	$(VENV)/bin/kridge demo

test: $(STAMP)
	$(PY) -m pytest -q

# every figure of one run goes to one JSON file; compare two with bench/compare.py
BENCH_JSON ?= bench/results/$(shell date +%Y%m%d-%H%M%S).json
bench: $(STAMP)
	$(PY) bench/engine_bench.py --json $(BENCH_JSON)
	$(PY) bench/http_bench.py --json $(BENCH_JSON)
	$(PY) bench/tuning_bench.py --json $(BENCH_JSON)
	$(PY) bench/sizing_bench.py --json $(BENCH_JSON)
	@echo "all figures in $(BENCH_JSON)"

lint: $(STAMP)
	$(VENV)/bin/ruff check .

clean:
	rm -rf $(VENV) kridge-store .pytest_cache .ruff_cache
