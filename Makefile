# The whole set-up on a fresh machine is one of two commands:
#   make demo   create .venv, install, run the demo end to end
#   make test   create .venv, install what tests need (redis-server too), run pytest
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed-stamp
DEMO_DATA := data/demo
DEMO_REPORTS := reports/demo

.PHONY: demo test bench redis-server clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	# torch first, pinned: this exact CPU build lies on disk; any other spec pulls a CUDA build.
	$(BIN)/pip install -q torch==2.13.0
	$(BIN)/pip install -q -e '.[train,dev]'
	touch $(STAMP)

redis-server:
	@command -v redis-server >/dev/null 2>&1 || { \
	  echo "redis-server not found: installing it from Debian's packages"; \
	  (apt-get update -qq && apt-get install -y -qq redis-server) || \
	  (sudo apt-get update -qq && sudo apt-get install -y -qq redis-server); }

test: $(STAMP) redis-server
	$(BIN)/python -m pytest

demo: $(STAMP)
	$(BIN)/cairn demo-data --out $(DEMO_DATA)/raw
	$(BIN)/cairn prepare --input $(DEMO_DATA)/raw/clicks.csv --out $(DEMO_DATA)/prepared \
	  --session-column session_id --item-column item_id --time-column timestamp
	$(BIN)/cairn evaluate --data $(DEMO_DATA)/prepared --scenario $(DEMO_DATA)/raw/scenario.npz \
	  --out $(DEMO_REPORTS)/evaluation.json

bench: $(STAMP)
	$(BIN)/python -m service.bench.ingest --out reports/bench/ingest.json

clean:
	rm -rf $(VENV) reports data checkpoints
