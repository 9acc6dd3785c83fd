# Every target creates the virtual environment it needs; nothing else is assumed installed.
PYTHON ?= python3
VENV   ?= .venv
PY     := $(VENV)/bin/python
STAMP  := $(VENV)/.installed

.PHONY: venv demo test test-all lint typecheck bench sensitivity clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install -q --upgrade pip
	# CPU wheel pinned on purpose: an open bound pulls a multi-GB CUDA build.
	$(PY) -m pip install -q torch==2.13.0
	$(PY) -m pip install -q -e ".[dev]"
	touch $(STAMP)

venv: $(STAMP)

demo: $(STAMP)
	$(PY) experiments/quickstart.py

test: $(STAMP)
	$(PY) -m pytest -q -p no:cacheprovider

test-all: $(STAMP)
	$(PY) -m pytest -q -p no:cacheprovider -m ""

lint: $(STAMP)
	$(PY) -m ruff check stepsize_tower tests experiments
	$(PY) -m ruff format --check stepsize_tower tests experiments

typecheck: $(STAMP)
	$(PY) -m mypy

bench: $(STAMP)
	$(PY) experiments/step_cost.py

sensitivity: $(STAMP)
	$(PY) experiments/sensitivity.py

clean:
	rm -rf $(VENV) experiments/out runs *.egg-info
