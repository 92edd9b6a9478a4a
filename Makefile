# Everything a new machine needs, from Python 3 and make alone.
PYTHON ?= python3
VENV ?= .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.installed-stamp

.PHONY: demo test test-fast bench clean

$(STAMP): pyproject.toml constraints.txt
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -e '.[dev,cluster]' -c constraints.txt
	touch $(STAMP)

demo: $(STAMP)
	$(VENV)/bin/walktune demo

test: $(STAMP)
	$(PY) -m pytest -q -n 2

test-fast: $(STAMP)
	$(PY) -m pytest -q -n 2 -m "not slow"

bench: $(STAMP)
	$(PY) benchmarks/bench_core.py
	$(PY) benchmarks/bench_tuning.py
	$(PY) benchmarks/bench_inspect.py
	$(PY) benchmarks/bench_report.py
	$(PY) benchmarks/bench_reparam.py
	$(PY) benchmarks/bench_parallel.py
	$(PY) benchmarks/bench_awkward.py

clean:
	rm -rf $(VENV) walktune-demo .pytest_cache
