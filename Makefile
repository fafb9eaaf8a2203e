# Two commands on a fresh machine: `make demo` and `make test`.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed
SPARK_STAMP := $(VENV)/.installed-spark

.PHONY: demo test lint bench clean

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

# The tests also cover the Spark engine (local[2]): pyspark comes with the spark extra.
$(SPARK_STAMP): $(STAMP)
	$(BIN)/python -m pip install --quiet -e '.[test,spark]'
	touch $(SPARK_STAMP)

demo: $(STAMP)
	$(BIN)/replay demo --out demo-output

lint: $(STAMP)
	$(BIN)/ruff check .

# Two pytest workers (the machine's 2 cores); a test file stays on one worker, so the
# replay loop builds it compiles (7-9 s each, per process) are compiled once.
test: $(SPARK_STAMP)
	$(BIN)/ruff check .
	$(BIN)/python -m pytest -n 2 --dist loadfile

bench: $(STAMP)
	$(BIN)/replay bench

clean:
	rm -rf $(VENV) demo-output
