# Two set-up commands for a fresh machine: `make demo` and `make test`.
PY ?= python3
VENV := .venv
BIN := $(VENV)/bin

.PHONY: demo test test-all bench clean chromium

$(BIN)/curate: pyproject.toml
	$(PY) -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip
	$(BIN)/pip install --quiet -e '.[test]'
	touch $(BIN)/curate

demo: $(BIN)/curate
	$(BIN)/python sample_corpus/make_corpus.py --out sample_corpus/images
	$(BIN)/curate run sample_corpus/curate.toml --out demo_out

# The browser tests open the report in Debian's headless chromium; install it once if missing.
chromium:
	@if ! command -v chromium >/dev/null 2>&1 && ! command -v chromium-browser >/dev/null 2>&1; then \
	  sudo=""; if [ "$$(id -u)" -ne 0 ]; then sudo="sudo"; fi; \
	  $$sudo apt-get update && DEBIAN_FRONTEND=noninteractive $$sudo apt-get install -y chromium; \
	fi

test: $(BIN)/curate chromium
	$(BIN)/ruff check .
	$(BIN)/python -m pytest -q -p no:cacheprovider

test-all: $(BIN)/curate chromium
	$(BIN)/python -m pytest -q -m '' -p no:cacheprovider

bench: $(BIN)/curate
	$(BIN)/python bench/throughput.py --json
	$(BIN)/python bench/neardup_scale.py --n 1000000 --json

clean:
	rm -rf demo_out sample_corpus/images
