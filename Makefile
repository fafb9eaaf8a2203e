# Two commands on a fresh machine: `make demo` and `make test`.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: demo test lint bench test-spark clean

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/replay demo --out demo-output

lint: $(STAMP)
	$(BIN)/ruff check .

test: $(STAMP)
	$(BIN)/ruff check .
	$(BIN)/python -m pytest

bench: $(STAMP)
	$(BIN)/replay bench

clean:
	rm -rf $(VENV) demo-output
