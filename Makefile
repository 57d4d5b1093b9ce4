# Two entry points for a fresh machine: `make demo` and `make test`.
# Each creates the local virtual environment .venv on first use.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: demo test lint bench clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	# The torch families are an optional extra; install the CPU wheel by exact
	# version so pip never pulls a CUDA build. Set RETROGRADE_NO_TORCH=1 to skip.
	if [ -z "$$RETROGRADE_NO_TORCH" ]; then $(BIN)/python -m pip install --quiet torch==2.13.0 || echo "torch CPU wheel not available; torch families will be skipped"; fi
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/retrograde demo --dir $(or $(DIR),demo-host)

test: $(STAMP)
	$(BIN)/python -m pytest -q $(PYTEST_ARGS); status=$$?; \
	if [ $$status -eq 5 ]; then echo "no tests collected"; exit 0; fi; exit $$status

lint: $(STAMP)
	$(BIN)/ruff check src tests benchmarks
	$(BIN)/ruff format --check src tests benchmarks
	$(BIN)/mypy

bench: $(STAMP)
	for script in benchmarks/bench_*.py; do $(BIN)/python $$script || exit 1; done

clean:
	rm -rf $(VENV) demo-host
