# Two commands on a fresh machine: `make demo` and `make test` (python3 and make only).
PYTHON ?= python3
VENV   := .venv
PY     := $(VENV)/bin/python
STAMP_BASE := $(VENV)/.installed-base
STAMP_TEST := $(VENV)/.installed-test
OUT ?= runs/demo

.PHONY: demo test test-slow bench venv clean

$(PY):
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip

$(STAMP_BASE): pyproject.toml | $(PY)
	$(PY) -m pip install --quiet -e .
	touch $@

$(STAMP_TEST): pyproject.toml | $(PY)
	$(PY) -m pip install --quiet -e '.[test]'
	touch $@ $(STAMP_BASE)

venv: $(STAMP_BASE)

demo: $(STAMP_BASE)
	$(VENV)/bin/noiseproof demo --out $(OUT)

test: $(STAMP_TEST)
	$(PY) -m pytest -q

test-slow: $(STAMP_TEST)
	$(PY) -m pytest -q -m slow

bench: $(STAMP_TEST)
	$(PY) -m benchmarks

clean:
	rm -rf $(VENV) runs .pytest_cache
