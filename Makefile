# Everything a fresh machine needs: `make demo` and `make test` create .venv/ and install into it
# the first time (a stamp file makes later runs a fast no-op until pyproject.toml changes).
PY      ?= python3.11
VENV    := .venv
BIN     := $(VENV)/bin
STAMP   := $(VENV)/.installed

.PHONY: install demo test bench clean

$(BIN)/python:
	$(PY) -m venv $(VENV)

$(STAMP): pyproject.toml | $(BIN)/python
	$(BIN)/pip install -q --upgrade-strategy only-if-needed -e '.[test]'
	touch $(STAMP)

install: $(STAMP)

demo: $(STAMP)
	$(BIN)/align demo --out runs/demo

# tests/test_architecture.py runs the import contracts too (pyproject.toml [tool.importlinter])
test: $(STAMP)
	$(BIN)/python -m pytest -q

# throughput (tools/bench.py, several minutes on 2 cores), then memory (tools/bench_memory.py) when present,
# then gallery search (tools/bench_index.py; needs ~12 GB of memory at its default 1M x 1280), then scale
# (tools/bench_scale.py; prepares ~25 GB of stored-vector datasets under bench_out/scale once)
bench: $(STAMP)
	$(BIN)/python tools/bench.py
	@if [ -f tools/bench_memory.py ]; then $(BIN)/python tools/bench_memory.py; fi
	$(BIN)/python tools/bench_index.py  # gallery search at 1M x 1280: approximate index build, p50/p95, recall@10
	$(BIN)/python tools/bench_scale.py  # 100k / 1M / 4M stored-vector pairs; pack and feature build, 1 vs 2 processes

clean:
	rm -rf runs features demo_work bench_out
