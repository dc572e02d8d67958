# Every target creates .venv on first use, so a fresh clone needs nothing but python3 (≥ 3.10).
PYTHON ?= python3
VENV   ?= .venv
PY     := $(VENV)/bin/python
# [dev]: everything (tests, benchmarks, lint); it includes [train], so it satisfies the demo
STAMP  := $(VENV)/.installed-stamp
# [train]: only what `kridge demo` imports (training, the report, the service)
DEMO_STAMP := $(VENV)/.demo-stamp
# e.g. make demo DEMO_ARGS=--smoke: make the example calls, print the answers, exit
DEMO_ARGS ?=

.PHONY: demo test bench lint clean

$(PY):
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip

$(DEMO_STAMP): pyproject.toml | $(PY)
	$(PY) -m pip install --quiet -e '.[train]'
	touch $(DEMO_STAMP)

$(STAMP): pyproject.toml | $(PY)
	$(PY) -m pip install --quiet -e '.[dev]'
	touch $(STAMP) $(DEMO_STAMP)

demo: $(DEMO_STAMP)
	$(VENV)/bin/kridge demo $(DEMO_ARGS)

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
