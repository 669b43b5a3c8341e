# The two set-up-from-nothing commands of the README:
#   make demo   builds .venv, generates the invented demo archive, runs backfill + report on it
#   make test   builds .venv, runs make lint and the whole test suite
PYTHON ?= python3
VENV   ?= .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed
# test files run side by side on this many pytest-xdist workers (auto: one per core); 0 = in one process
TEST_WORKERS ?= auto

.PHONY: test lint demo bench fuzz clean venv

$(STAMP): setup.cfg pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip
	$(BIN)/pip install --quiet -e ".[test,report,bench]"
	touch $(STAMP)

venv: $(STAMP)

# the house checks: ruff's linter and formatter, mypy on the package (configured in pyproject.toml)
lint: $(STAMP)
	$(BIN)/ruff check .
	$(BIN)/ruff format --check .
	$(BIN)/mypy

test: lint
	$(BIN)/python -m pytest -q -p no:cacheprovider -n $(TEST_WORKERS) --dist loadgroup

demo: $(STAMP)
	$(BIN)/python -m demo_data.generate --out demo_data/archive
	$(BIN)/python -m pipelines.backfill --config demo_data/footbridge.toml --output demo_output
	$(BIN)/python -m pipelines.report --output demo_output
	@echo "Demo written to demo_output/ (open demo_output/report/index.html)"

bench: $(STAMP)
	$(BIN)/python -m benchmarks.run_all

fuzz: $(STAMP)
	CORRTRANSFORMS_FUZZ_EXAMPLES=500 $(BIN)/python -m pytest -q tests/pipelines/test_reliability_fuzz.py

clean:
	rm -rf $(VENV) demo_output demo_data/archive benchmarks/_work
