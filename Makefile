# Every target sets up .venv itself: a fresh machine needs only Python 3.10+.
PYTHON ?= python3
VENV   := .venv
PY     := $(VENV)/bin/python
STAMP  := $(VENV)/.installed

.PHONY: venv warm-up demo test test-slow mutants bench clean clean-cache mpi test-mpi

$(STAMP): pyproject.toml
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip setuptools wheel
	$(PY) -m pip install --quiet -e ".[test,bench]"
	touch $(STAMP)

venv: $(STAMP)

# Compile the common kernels once, ahead of the first run (`galerkit warm-up`);
# redone when a kernel source changes (numba recompiles only what changed).
WARM := $(VENV)/.warm
$(WARM): $(STAMP) $(wildcard kernel/*.py bindings/*.py bindings/*/*.py)
	$(VENV)/bin/galerkit --quiet warm-up
	touch $(WARM)

warm-up: $(WARM)

demo: $(WARM)
	$(VENV)/bin/galerkit demo

test: $(WARM)
	$(PY) -m pytest -q

# the convergence runs marked slow (tests/test_rates.py); `make test` leaves them out
test-slow: $(WARM)
	$(PY) -m pytest -q -m slow

# mutation check of the suite: small faults in a temporary copy of the kernel, one at
# a time; a fast selection of tests must fail on each (tests/mutants.py)
mutants: $(WARM)
	$(PY) tests/mutants.py

# Optional distributed engine (galerkit[mpi]): MPICH and LAPACK from Debian,
# PETSc and petsc4py built from their source distributions (no wheels exist;
# about 25 minutes on 2 cores the first time, then pip's wheel cache makes it
# quick), mpi4py built against the same MPICH.
SUDO      := $(shell [ "$$(id -u)" = 0 ] || echo sudo)
MPI_DEBS  := libmpich-dev mpich liblapack-dev libblas-dev patchelf
PETSC_VER := 3.26.1
MPI_STAMP := $(VENV)/.installed-mpi

$(MPI_STAMP): $(STAMP)
	if ! command -v mpicc >/dev/null || ! dpkg -s liblapack-dev libblas-dev patchelf >/dev/null 2>&1; then \
	  $(SUDO) apt-get update -qq && \
	  DEBIAN_FRONTEND=noninteractive $(SUDO) apt-get install -y -qq --no-install-recommends $(MPI_DEBS); fi
	$(PY) -m pip install --quiet cython setuptools wheel numpy
	MPICC=mpicc $(PY) -m pip install --quiet --no-binary=mpi4py "mpi4py>=4"
	$(PY) -m pip install --no-build-isolation petsc==$(PETSC_VER)
	PETSC_DIR=$$($(PY) -c "import petsc; print(petsc.get_petsc_dir())") \
	  $(PY) -m pip install --no-build-isolation petsc4py==$(PETSC_VER)
	# a petsc4py wheel from pip's cache names the absolute PETSc folder of the venv
	# it was first built in; point it at this venv's PETSc, then check it loads
	SO=$$(find $(VENV) -path '*/petsc4py/lib/PETSc*.so' | head -n 1) && \
	  patchelf --set-rpath '$$ORIGIN/../../petsc/lib' "$$SO" && \
	  sed -i "s|^PETSC_DIR *=.*|PETSC_DIR  = $$($(PY) -c 'import petsc; print(petsc.get_petsc_dir())')|" \
	    "$$(dirname "$$SO")/petsc.cfg"
	$(PY) -c "import petsc4py; petsc4py.init([]); from petsc4py import PETSc; PETSc.Sys.getVersion()"
	$(PY) -m pip install --quiet --no-build-isolation -e ".[test,bench,mpi,mpi-test]"
	touch $(MPI_STAMP)

mpi: $(MPI_STAMP)

# Only the distributed engine's tests (mpiexec with 1, 2 and 3 ranks);
# `make test` runs them too once `make mpi` has installed the engine.
test-mpi: $(MPI_STAMP)
	GALERKIT_REQUIRE_MPI=1 $(PY) -m pytest -q tests/test_partition.py tests/test_distributed.py

bench: $(STAMP)
	$(PY) benchmarks/compare.py
	$(PY) benchmarks/compare_poisson.py
	$(PY) benchmarks/compare_solvers.py

clean: clean-cache
	rm -rf $(VENV) build *.egg-info

# numba caches compiled kernels beside the sources; a kernel that calls a
# function from another file is not recompiled when only that file changes.
clean-cache:
	find kernel bindings -name '*.nbi' -o -name '*.nbc' | xargs rm -f
	rm -f $(WARM)
