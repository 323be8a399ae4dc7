# Two entry points for people: `make demo` and `make test`. Both bootstrap .venv first.
PYTHON ?= python3
VENV := .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.installed

.PHONY: demo test bench clean chromium

$(PY):
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip

# torch is pinned to the CPU build; a looser requirement would pull a multi-GB CUDA build.
$(STAMP): $(PY) pyproject.toml
	$(PY) -m pip install --quiet "torch==2.13.0"
	$(PY) -m pip install --quiet -e ".[vae,review,test,cluster]"
	touch $(STAMP)

demo: $(STAMP)
	$(VENV)/bin/inspector demo

test: $(STAMP) chromium
	$(PY) -m pytest -q

# The review page's browser test drives Debian's chromium (Playwright's own browser download
# does not work here); install it when missing. Without it that one test is skipped.
chromium:
	@command -v chromium >/dev/null 2>&1 || (apt-get update -q && DEBIAN_FRONTEND=noninteractive apt-get install -y -q chromium) \
		|| echo "warning: could not install chromium; the browser test will be skipped"

bench: $(STAMP)
	$(PY) bench/throughput.py

clean:
	rm -rf $(VENV) inspector-demo inspector-store inspector-out
