# Two commands on a fresh machine: `make demo` and `make test`.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: demo test lint bench models demo-tiles benchmark benchmark-data clean

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/frostvane demo --out out/demo

test: $(STAMP)
	$(BIN)/python -m pytest

# Likely bugs and unused code (ruff; its rules are in pyproject.toml).
lint: $(STAMP)
	$(BIN)/ruff check .

bench: $(STAMP)
	$(BIN)/python tests/benchmarks/bench_features.py

# Regenerate the committed demo tile set and model (see DEVELOPERS.md).
demo-tiles: $(STAMP)
	$(BIN)/frostvane synth demo_tiles --images 8 --tiles-per-image 5 --seed 2026 --force

# The fixed benchmark (train, held-out, shifted, negatives; see README "Benchmark"); about 5 minutes.
BENCH ?= out/bench
benchmark-data: $(STAMP)
	test -f $(BENCH)/benchmark.json || $(BIN)/frostvane benchmark build $(BENCH)

# The shipped model is trained on the benchmark's train set only (never its held-out sets); its benchmark
# table ships beside it (models/demo/benchmark.json, printed by make demo).
models: benchmark-data
	$(BIN)/frostvane train $(BENCH)/train --out models/demo --seed 2026 --workers 2 --force
	$(BIN)/frostvane benchmark run models/demo $(BENCH) --out out/benchmark --force
	cp out/benchmark/benchmark.json models/demo/benchmark.json

# The benchmark table of the shipped model (a few minutes).
benchmark: benchmark-data
	$(BIN)/frostvane benchmark run models/demo $(BENCH) --out out/benchmark --force

clean:
	rm -rf $(VENV) out
