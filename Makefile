# Two entry points for a newcomer: `make demo` and `make test`. Both build .venv first.
# Needs only Python >= 3.11 with venv and pip; everything else comes from the package index.
PYTHON ?= $(shell command -v python3.11 2>/dev/null || command -v python3 2>/dev/null)
VENV   := .venv
PY     := $(VENV)/bin/python
STAMP  := $(VENV)/.installed
# One BLAS thread per process: the finder runs in several worker processes at once.
THREADS := OMP_NUM_THREADS=1 OPENBLAS_NUM_THREADS=1 MKL_NUM_THREADS=1

.PHONY: demo test bench wire clean example-c example-fortran

$(STAMP): pyproject.toml
	@test -n "$(PYTHON)" || { echo "need python3.11 on PATH (or make PYTHON=/path/to/python3.11)"; exit 1; }
	@$(PYTHON) -c 'import sys; sys.exit(sys.version_info < (3, 11))' || \
		{ echo "need Python >= 3.11; $(PYTHON) is $$($(PYTHON) -V 2>&1)"; exit 1; }
	@echo "setting up $(VENV) with $(PYTHON) and installing penumbra-horizons[dev] (about a minute the first time)"
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -e '.[dev]'
	touch $(STAMP)

demo: $(STAMP)
	$(THREADS) $(VENV)/bin/penumbra demo --workdir penumbra-demo-output

test: $(STAMP)
	$(THREADS) $(PY) -m pytest -q -n 2 --dist loadfile --durations=25

bench: $(STAMP)
	$(THREADS) $(PY) tests/benchmarks/bench_finder.py

# The C and Fortran examples (client/native/examples) against a server of their own on a free
# loopback port, stopped afterwards. The library and examples build into client/native/build.
example-c: $(STAMP)
	$(MAKE) -C client/native PY=$(abspath $(PY)) examples-c
	$(THREADS) $(PY) client/native/examples/with_local_server.py -- client/native/build/bl_pair_evolution_c

example-fortran: $(STAMP)
	$(MAKE) -C client/native PY=$(abspath $(PY)) examples-fortran
	$(THREADS) $(PY) client/native/examples/with_local_server.py -- client/native/build/bl_pair_evolution_f

wire: $(STAMP)
	$(PY) -m penumbra_server.tools.regenerate_wire

clean:
	rm -rf $(VENV) penumbra-demo-output client/native/build
