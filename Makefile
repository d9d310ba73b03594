# Everything a fresh clone needs: `make demo` and `make test` create .venv and install first.
PYTHON ?= python3
VENV   := .venv
PY     := $(VENV)/bin/python
STAMP  := $(VENV)/.installed

.PHONY: demo lint test test-fast bench bench-efficiency bench-ledger install clean

$(STAMP): pyproject.toml
	@test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -e '.[test]'
	@touch $(STAMP)

install: $(STAMP)

demo: $(STAMP)
	$(VENV)/bin/ldpt demo --dir demo_out

# The gate both test targets run first: ruff (with the complexity limit), then mypy; configured in pyproject.toml.
lint: $(STAMP)
	$(PY) -m ruff check ldptransform tests benchmarks
	$(PY) -m mypy

# Every test, the long statistical studies (marker `slow`) included: what CI runs.
test: $(STAMP) lint
	$(PY) -m pytest -q -n 2 --dist worksteal

# The quick loop: everything but the tests marked `slow`.
test-fast: $(STAMP) lint
	$(PY) -m pytest -q -n 2 --dist worksteal -m "not slow"

bench: $(STAMP)
	$(PY) benchmarks/bench_privatize.py

bench-efficiency: $(STAMP)
	$(PY) benchmarks/bench_efficiency.py

bench-ledger: $(STAMP)
	$(PY) benchmarks/bench_ledger.py

clean:
	rm -rf $(VENV) demo_out .pytest_cache .mypy_cache .ruff_cache build dist *.egg-info
