# Every target bootstraps .venv itself, so a fresh clone needs only `make demo` or `make test`.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: install install-spark test demo lint serve openapi bench bench-quick fuzz clean

install: $(STAMP)

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[dev,postgres]'
	touch $(STAMP)

# The Spark engine of `inrush pull` (pyspark, about 300 MB; needs Java 17+). CI installs it so
# the Spark tests run; without it they are skipped with the reason.
install-spark: install
	$(BIN)/python -m pip install --quiet -e '.[dev,postgres,spark]'

test: install
	$(BIN)/python -m pytest -q

lint: install
	$(BIN)/ruff check detectors service tests benchmarks

# `make demo DEMO_FLAGS=--pull` feeds the demo from its unit-level Parquet logs (inrush pull).
demo: install
	$(BIN)/inrush demo $(DEMO_FLAGS)

serve: install
	$(BIN)/inrush serve

openapi: install
	$(BIN)/inrush openapi --output openapi/openapi.json

bench: install
	$(BIN)/python -m benchmarks.run --full
	$(BIN)/python -m benchmarks.sensitivity_check

bench-quick: install
	$(BIN)/python -m benchmarks.run --quick

fuzz: install
	INRUSH_FUZZ_EXAMPLES=2000 $(BIN)/python -m pytest -q tests/reliability/test_fuzz.py

clean:
	rm -rf $(VENV) .pytest_cache .ruff_cache build *.egg-info
