# Every target creates the virtual environment it needs; nothing else is assumed installed.
PYTHON ?= python3
VENV   ?= .venv
PY     := $(VENV)/bin/python
STAMP  := $(VENV)/.installed

.PHONY: venv extras demo demo-script test test-all lint typecheck bench sensitivity field clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install -q --upgrade pip
	# CPU wheel pinned on purpose: an open bound pulls a multi-GB CUDA build.
	$(PY) -m pip install -q torch==2.13.0
	$(PY) -m pip install -q -e ".[dev]"
	touch $(STAMP)

venv: $(STAMP)

# Optional framework integrations (Lightning, Hugging Face) and the Dask executor of the
# recipe runner; their tests skip without them.
extras: $(STAMP)
	$(PY) -m pip install -q -e ".[lightning,hf,dask]" torch==2.13.0

demo: $(STAMP)
	$(VENV)/bin/stepsize-tower run recipes/quickstart.yaml --out runs/quickstart
	$(VENV)/bin/stepsize-tower report runs/quickstart

demo-script: $(STAMP)
	$(PY) experiments/quickstart.py

test: $(STAMP)
	$(PY) -m pytest -q -p no:cacheprovider

test-all: $(STAMP)
	$(PY) -m pytest -q -p no:cacheprovider -m ""

lint: $(STAMP)
	$(PY) -m ruff check stepsize_tower tests experiments recipes
	$(PY) -m ruff format --check stepsize_tower tests experiments recipes

typecheck: $(STAMP)
	$(PY) -m mypy

bench: $(STAMP)
	$(PY) experiments/step_cost.py

sensitivity: $(STAMP)
	$(PY) experiments/sensitivity.py --seeds 0 1 2 --tasks logreg_cancer lsq_raw mlp_digits cnn_digits char_gru

# Field benchmark (experiments/field/): four practitioner-style tasks, 2 seeds, one thread;
# several hours on a shared 2-core machine; resumable (finished runs are skipped).
field: $(STAMP)
	$(PY) -m experiments.field --seeds 0 1

clean:
	rm -rf $(VENV) experiments/out runs *.egg-info
