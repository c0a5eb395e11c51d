# Two commands for a fresh machine: `make demo` and `make test`.
PYTHON ?= python3
VENV := .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.installed

.PHONY: demo test bench clean

$(STAMP): pyproject.toml
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -e '.[test]'
	touch $(STAMP)

demo: $(STAMP)
	$(PY) -m benchkit.demo --out out/demo

test: $(STAMP)
	$(PY) -m pytest

bench: $(STAMP)
	$(PY) -m pip install --quiet -e '.[test,bench]'
	.ci/with-postgres $(PY) -m benchkit.benchmarks --out out/bench

clean:
	rm -rf out .pytest_cache
