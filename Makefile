# Two commands on a fresh machine: `make demo` and `make test`.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: demo test bench models demo-tiles clean

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/frostvane demo --out out/demo

test: $(STAMP)
	$(BIN)/python -m pytest

bench: $(STAMP)
	$(BIN)/python tests/benchmarks/bench_features.py

# Regenerate the committed demo tile set and model (see DEVELOPERS.md).
demo-tiles: $(STAMP)
	$(BIN)/frostvane synth demo_tiles --images 8 --tiles-per-image 5 --seed 2026 --force

models: $(STAMP)
	$(BIN)/frostvane train demo_tiles --out models/demo --seed 2026 --force

clean:
	rm -rf $(VENV) out
