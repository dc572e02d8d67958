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

bench: $(STAMP)
	$(PY) bench/engine_bench.py
	$(PY) bench/http_bench.py
	$(PY) bench/tuning_bench.py
	$(PY) bench/sizing_bench.py

lint: $(STAMP)
	$(VENV)/bin/ruff check .

clean:
	rm -rf $(VENV) kridge-store .pytest_cache .ruff_cache
