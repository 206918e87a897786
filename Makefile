# Every target sets up .venv itself: a fresh machine needs only Python 3.10+.
PYTHON ?= python3
VENV   := .venv
PY     := $(VENV)/bin/python
STAMP  := $(VENV)/.installed

.PHONY: venv demo test bench clean clean-cache

$(STAMP): pyproject.toml
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip setuptools wheel
	$(PY) -m pip install --quiet -e ".[test,bench]"
	touch $(STAMP)

venv: $(STAMP)

demo: $(STAMP)
	$(VENV)/bin/galerkit demo

test: $(STAMP)
	$(PY) -m pytest -q

bench: $(STAMP)
	$(PY) benchmarks/compare.py
	$(PY) benchmarks/compare_poisson.py

clean: clean-cache
	rm -rf $(VENV) build *.egg-info

# numba caches compiled kernels beside the sources; a kernel that calls a
# function from another file is not recompiled when only that file changes.
clean-cache:
	find kernel bindings -name '*.nbi' -o -name '*.nbc' | xargs rm -f
