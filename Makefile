# Two commands set everything up on a fresh machine with Python >= 3.10, pip and a C++ compiler:
#   make demo   -- create .venv, install kalmax, run the main job on built-in (invented) data
#   make test   -- create/update .venv with the test extras and run the whole test suite
PYTHON ?= python3
VENV   ?= .venv
PY      = $(VENV)/bin/python
PIP     = $(PY) -m pip --disable-pip-version-check
STAMP   = $(VENV)/.installed

.PHONY: demo test bench bench-parallel device-check venv clean

$(PY):
	$(PYTHON) -m venv $(VENV)

# The compiled CPU kernel (kalmax/_src/cpu) is built without build isolation:
# the build then uses this venv's setuptools and needs no download. It needs no
# jax at build time: the XLA FFI headers are vendored from the oldest jaxlib
# that pyproject.toml allows (see setup.py for why).
KERNEL_SRC = setup.py $(wildcard kalmax/_src/cpu/*.cc kalmax/_src/cpu/*.h)

$(STAMP): $(PY) pyproject.toml $(KERNEL_SRC)
	$(PIP) install -q --upgrade pip "setuptools>=77"
	$(PIP) install -q --no-build-isolation -e ".[test]"
	touch $(STAMP)

venv: $(STAMP)

demo: $(STAMP)
	$(PY) -m kalmax.demo

test: $(STAMP)
	$(PY) -m pytest -q -n auto --durations=20 tests

bench: $(STAMP)
	$(PY) benchmarks/run.py

# Parallel-in-time vs sequential solves on one CPU core; device_check on a GPU/TPU if present.
bench-parallel: $(STAMP)
	$(PY) benchmarks/parallel.py

device-check: $(STAMP)
	$(PY) benchmarks/device_check.py

clean:
	rm -rf $(VENV) build *.egg-info
