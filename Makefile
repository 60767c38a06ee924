# Every target creates .venv and installs the project into it when missing,
# so `make demo` and `make test` are the whole set-up on a fresh machine.
PY ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: demo test lint bench clean

$(STAMP): pyproject.toml
	test -d $(VENV) || $(PY) -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip
	$(BIN)/pip install --quiet -e '.[test,dev]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/aftercast demo

test: $(STAMP)
	$(BIN)/python -m pytest

lint: $(STAMP)
	$(BIN)/ruff check src tests bench
	$(BIN)/ruff format --check src tests bench
	$(BIN)/mypy

bench: $(STAMP)
	$(BIN)/python bench/run_all.py

clean:
	rm -rf $(VENV) build *.egg-info src/*.egg-info
