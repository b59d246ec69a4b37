# Two commands do all the set-up on a fresh machine: `make test` and `make demo`.
# Both create .venv with the interpreter named by PYTHON (3.11 or newer) and install clampd
# into it in editable mode with the extras they need.

PYTHON ?= python3
VENV ?= .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed-dev

.PHONY: test demo lint typecheck bench venv clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install -q --upgrade pip

$(STAMP): pyproject.toml | $(BIN)/python
	$(BIN)/python -m pip install -q -e '.[dev]'
	touch $(STAMP)

venv: $(STAMP)

# mypy cannot follow setuptools' editable-install finder, so it reads the sources through
# a link tree that gives the top-level folders their import names (clampd.protocol, ...).
.typecheck/clampd:
	mkdir -p .typecheck/clampd
	ln -sfn ../../protocol .typecheck/clampd/protocol
	ln -sfn ../../daemon .typecheck/clampd/daemon
	ln -sfn ../../simulators .typecheck/clampd/simulators

lint: $(STAMP)
	$(BIN)/ruff check .
	$(BIN)/ruff format --check .

typecheck: $(STAMP) .typecheck/clampd
	$(BIN)/mypy -p clampd.protocol -p clampd.daemon -p clampd.simulators
	$(BIN)/mypy tests

# Two workers halve the wall time on a 2-core board or CI machine (measured: ~21 min -> ~12 min
# on a loaded machine); PYTEST_WORKERS=0 runs in one process.
PYTEST_WORKERS ?= 2

test: $(STAMP)
	$(BIN)/python -m pytest -n $(PYTEST_WORKERS)

demo: $(STAMP)
	$(BIN)/clampd demo

bench: $(STAMP)
	$(BIN)/python -m pytest -p benchmark tests/benchmarks --benchmark-only

clean:
	rm -rf $(VENV) .typecheck build *.egg-info .pytest_cache .mypy_cache .ruff_cache .hypothesis
