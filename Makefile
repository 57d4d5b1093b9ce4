# Two entry points for a fresh machine: `make demo` and `make test`.
# Each creates the local virtual environment .venv on first use. The demo needs the
# package alone; the tests (and lint, bench) also need the test extra and the CPU build
# of PyTorch, installed only when one of those targets runs.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
BASE_STAMP := $(VENV)/.installed-base
TEST_STAMP := $(VENV)/.installed-test

.PHONY: demo test lint bench clean

$(BASE_STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e .
	touch $(BASE_STAMP)

$(TEST_STAMP): $(BASE_STAMP)
	# The torch families are an optional extra; install the CPU wheel by exact
	# version so pip never pulls a CUDA build. Set RETROGRADE_NO_TORCH=1 to skip.
	if [ -z "$$RETROGRADE_NO_TORCH" ]; then $(BIN)/python -m pip install --quiet torch==2.13.0 || echo "torch CPU wheel not available; torch families will be skipped"; fi
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(TEST_STAMP)

demo: $(BASE_STAMP)
	$(BIN)/retrograde demo --dir $(or $(DIR),demo-host)

test: $(TEST_STAMP)
	$(BIN)/python -m pytest -q $(PYTEST_ARGS); status=$$?; \
	if [ $$status -eq 5 ]; then echo "no tests collected"; exit 0; fi; exit $$status

lint: $(TEST_STAMP)
	$(BIN)/ruff check src tests benchmarks
	$(BIN)/ruff format --check src tests benchmarks
	$(BIN)/mypy

bench: $(TEST_STAMP)
	for script in benchmarks/bench_*.py; do $(BIN)/python $$script || exit 1; done

clean:
	rm -rf $(VENV) demo-host
