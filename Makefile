# Two set-up commands: `make demo` and `make test`. Both create .venv and install everything
# (Debian's PETSc/SLEPc stack included, when run as root) through scripts/bootstrap.sh, which
# checks before it installs: a second run installs nothing.
VENV ?= .venv
PYTHON ?= python3
BIN := $(VENV)/bin

.PHONY: venv demo test lint bench clean

venv:
	@PYTHON=$(PYTHON) bash scripts/bootstrap.sh $(VENV)

demo: venv
	GAPLINE_PROGRESS=plain $(BIN)/gapline run configs/demo.toml --store demo-store.zarr
	$(BIN)/gapline show demo-store.zarr

lint: venv
	$(BIN)/ruff check .

test: lint
	$(BIN)/python -m pytest

bench: venv
	$(BIN)/python benchmarks/assemble.py
	$(BIN)/python benchmarks/spmv.py
	$(BIN)/python benchmarks/driven_torus.py

clean:
	rm -rf demo-store.zarr .pytest_cache build *.egg-info
