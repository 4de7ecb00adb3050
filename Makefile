# The two commands a new user needs: `make demo` and `make test`.
# Each one creates .venv and installs the package with its test extras from PyPI first.
PYTHON ?= python3
VENV := .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.installed

.PHONY: demo test lint bench clean

$(STAMP): setup.py setup.cfg pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -e '.[test]'
	touch $(STAMP)

demo: $(STAMP)
	$(VENV)/bin/constraint-ctrl demo --out out/demo

test: lint
	$(PY) -m pytest -q test

# ruff with the rules in pyproject.toml; part of `make test`
lint: $(STAMP)
	$(VENV)/bin/ruff check .

bench: $(STAMP)
	$(VENV)/bin/constraint-ctrl bench --json out/bench.json

clean:
	rm -rf $(VENV) out build install log *.egg-info
