# Two commands set everything up on a fresh machine with Python >= 3.10, pip and a C++ compiler:
#   make demo   -- create .venv, install kalmax, run the main job on built-in (invented) data
#   make test   -- create/update .venv with the test extras and run the whole test suite
PYTHON ?= python3
VENV   ?= .venv
PY      = $(VENV)/bin/python
PIP     = $(PY) -m pip --disable-pip-version-check
STAMP   = $(VENV)/.installed

.PHONY: demo test bench venv clean

$(PY):
	$(PYTHON) -m venv $(VENV)

$(STAMP): $(PY) pyproject.toml
	$(PIP) install -q --upgrade pip
	$(PIP) install -q -e ".[test]"
	touch $(STAMP)

venv: $(STAMP)

demo: $(STAMP)
	$(PY) -m kalmax.demo

test: $(STAMP)
	$(PY) -m pytest -q tests

bench: $(STAMP)
	$(PY) benchmarks/run.py

clean:
	rm -rf $(VENV) build *.egg-info
