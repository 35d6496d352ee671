# Two set-up commands for a fresh machine: `make demo` and `make test`.
PY ?= python3
VENV := .venv
BIN := $(VENV)/bin

.PHONY: demo test test-all bench clean

$(BIN)/curate: pyproject.toml
	$(PY) -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip
	$(BIN)/pip install --quiet -e '.[test]'
	touch $(BIN)/curate

demo: $(BIN)/curate
	$(BIN)/python sample_corpus/make_corpus.py --out sample_corpus/images
	$(BIN)/curate run sample_corpus/curate.toml --out demo_out

test: $(BIN)/curate
	$(BIN)/ruff check .
	$(BIN)/python -m pytest -q -p no:cacheprovider

test-all: $(BIN)/curate
	$(BIN)/python -m pytest -q -m '' -p no:cacheprovider

bench: $(BIN)/curate
	$(BIN)/python bench/throughput.py --json
	$(BIN)/python bench/neardup_scale.py --n 1000000 --json

clean:
	rm -rf demo_out sample_corpus/images
