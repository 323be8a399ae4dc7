# Two entry points for people: `make demo` and `make test`. Both bootstrap .venv first.
PYTHON ?= python3
VENV := .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.installed

.PHONY: demo test bench clean

$(PY):
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip

# torch is pinned to the CPU build; a looser requirement would pull a multi-GB CUDA build.
$(STAMP): $(PY) pyproject.toml
	$(PY) -m pip install --quiet "torch==2.13.0"
	$(PY) -m pip install --quiet -e ".[vae,review,test]"
	touch $(STAMP)

demo: $(STAMP)
	$(VENV)/bin/inspector demo

test: $(STAMP)
	$(PY) -m pytest -q

bench: $(STAMP)
	$(PY) bench/throughput.py

clean:
	rm -rf $(VENV) inspector-demo inspector-store inspector-out
