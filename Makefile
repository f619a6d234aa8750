# Two entry points: `make demo` (set up, then triage sample_data/) and `make test` (set up, lint, tests).
PY ?= python3.11
VENV ?= .venv
BIN = $(VENV)/bin

.PHONY: setup demo demo-speech test lint bench clean

$(BIN)/.installed: pyproject.toml
	@command -v $(PY) >/dev/null 2>&1 || { echo "need $(PY) on PATH (or: make PY=python3 ...)"; exit 2; }
	test -x $(BIN)/python || $(PY) -m venv $(VENV)
	$(BIN)/pip install -q torch==2.13.0
	$(BIN)/pip install -q -e '.[test,speech,cluster]'
	touch $@

setup: $(BIN)/.installed

demo: setup
	$(BIN)/triage run --model sample_data/model --data sample_data/devset.tsv --out reports/demo

# a seeded random tiny Whisper on synthesized tones: the mechanics of a speech run (its outputs are noise)
demo-speech: setup
	$(BIN)/python examples/speech_demo.py

lint: setup
	$(BIN)/ruff check triage tests benchmarks
	$(BIN)/lint-imports

test: lint
	$(BIN)/python -m pytest -q

bench: setup
	$(BIN)/python -m benchmarks.bench

clean:
	rm -rf $(VENV) build *.egg-info
