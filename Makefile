# spanwatch: two commands on a fresh machine with Python 3.11+.
#   make demo   set up a virtual environment and run the demo on embedded defaults
#   make test   set up a virtual environment and run the whole test suite (lint, doctests, pytest)
PYTHON ?= python3
VENV ?= .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.installed

.PHONY: setup test demo bench clean

setup: $(STAMP)

$(STAMP): pyproject.toml
	@$(PYTHON) -c 'import sys; sys.exit(0 if sys.version_info >= (3, 11) else "spanwatch needs Python 3.11 or newer")'
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -e '.[test]'
	touch $(STAMP)

test: $(STAMP)
	$(PY) -m ruff check .
	$(VENV)/bin/pytest

demo: $(STAMP)
	$(VENV)/bin/spanwatch demo

bench: $(STAMP)
	$(PY) benchmarks/replay_throughput.py
	$(PY) benchmarks/replay_floor.py --line q2
	$(PY) benchmarks/recording_formats.py

clean:
	rm -rf $(VENV) .pytest_cache .ruff_cache
