# The whole set-up on a fresh machine is one of two commands:
#   make demo   create .venv, install, run the demo end to end
#   make test   create .venv, install what tests need (redis-server, chromium too), run pytest
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed-stamp
DEMO_DATA := data/demo
DEMO_REPORTS := reports/demo

.PHONY: demo demo-online test bench bench-large bench-million fuzz soak redis-server chromium clean

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

# The page tests drive Debian's chromium through chromium-driver (never a downloaded browser build).
chromium:
	@{ command -v chromium >/dev/null 2>&1 && command -v chromedriver >/dev/null 2>&1; } || { \
	  echo "chromium or chromedriver not found: installing them from Debian's packages"; \
	  (apt-get update -qq && apt-get install -y -qq chromium chromium-driver) || \
	  (sudo apt-get update -qq && sudo apt-get install -y -qq chromium chromium-driver); }

# A crash in native code while tests run prints every thread's Python stack instead of a bare signal.
test: $(STAMP) redis-server chromium
	PYTHONFAULTHANDLER=1 $(BIN)/python -m pytest

# A long random schemathesis run against the live OpenAPI document (make test runs a short one).
FUZZ_EXAMPLES ?= 2000
fuzz: $(STAMP)
	FUZZ_EXAMPLES=$(FUZZ_EXAMPLES) $(BIN)/python -m pytest tests/service/api/test_fuzz.py

# Ten minutes at a steady rate while Redis restarts and the model switches (not in CI; see bench/soak.py).
SOAK_RATE ?= 300
soak: $(STAMP) redis-server
	$(BIN)/python -m bench.soak --minutes 10 --rate $(SOAK_RATE) --out reports/bench/soak.json

# The demo shop: scale 3 (about 780,000 training clicks) is what the GRU needs to get near the
# oracle; the scenario itself is fixed. Each loss trains with early stopping on validation MRR@20.
DEMO_SCALE ?= 3
DEMO_LOSSES ?= top1-max bpr-max cross-entropy
DEMO_BEST ?= top1-max
DEMO_TRAIN_FLAGS ?= --epochs 2 --threads 2
SERVE ?= 1
CK := checkpoints/demo

demo: $(STAMP)
	$(BIN)/cairn demo-data --out $(DEMO_DATA)/raw --scale $(DEMO_SCALE)
	$(BIN)/cairn prepare --input $(DEMO_DATA)/raw/clicks.csv --out $(DEMO_DATA)/prepared \
	  --session-column session_id --item-column item_id --time-column timestamp
	for loss in $(DEMO_LOSSES); do \
	  $(BIN)/cairn train --data $(DEMO_DATA)/prepared --out $(CK)/$$loss --loss $$loss $(DEMO_TRAIN_FLAGS) || exit 1; \
	done
	$(BIN)/cairn evaluate --data $(DEMO_DATA)/prepared --scenario $(DEMO_DATA)/raw/scenario.npz \
	  $(foreach loss,$(DEMO_LOSSES),--checkpoint $(CK)/$(loss)/best.pt) --tune --exclude-seen auto \
	  --out $(DEMO_REPORTS)/evaluation.json --report $(DEMO_REPORTS)
	@echo "The decision, with its plots: $(DEMO_REPORTS)/report.html"
	$(BIN)/cairn export --checkpoint $(CK)/$(DEMO_BEST)/best.pt --data $(DEMO_DATA)/prepared \
	  --name garden-gru --version demo --overwrite --metrics $(DEMO_REPORTS)/evaluation.json --names $(DEMO_DATA)/raw/catalogue.csv \
	  --clustered-index always
	# The exported graph through the same evaluation: it must agree with the PyTorch model above
	# (with the exclude-seen setting the evaluation above chose, so the two are comparable); beside it
	# the int8 and clustered rows, the offline cost of serving with CAIRN_SCORING=int8 or clustered.
	$(BIN)/cairn evaluate --data $(DEMO_DATA)/prepared --recommenders '' --artifact model_store/garden-gru/demo --scoring exact int8 clustered \
	  --exclude-seen $$($(BIN)/python -c "import json; print('on' if json.load(open('$(DEMO_REPORTS)/evaluation.json'))['decision']['exclude_seen']['value'] else 'off')") \
	  --bootstrap 200 --out $(DEMO_REPORTS)/evaluation-onnx.json
	$(BIN)/python -m bench.quality --report $(DEMO_REPORTS)/evaluation.json --out $(DEMO_REPORTS)/quality.json
	@if [ "$(SERVE)" = "1" ]; then \
	  item=$$($(BIN)/python -c "import json; print(json.load(open('$(DEMO_DATA)/prepared/item_ids.json'))[0])"); \
	  echo; echo "Starting the service on model_store/garden-gru/demo (memory store). In another terminal:"; \
	  echo "  curl -s -X POST localhost:8000/v1/sessions/visit-1/clicks -H 'content-type: application/json' -d '{\"item_id\": \"$$item\", \"count\": 5}'"; \
	  echo "  curl -s localhost:8000/v1/sessions/visit-1/recommendations"; \
	  echo "The shop: http://127.0.0.1:8000/shop/   Operator view: http://127.0.0.1:8000/operator/"; \
	  echo "OpenAPI page: http://127.0.0.1:8000/docs   Stop with Ctrl-C. Click events go to $(DEMO_DATA)/events."; echo; \
	  CAIRN_PAGES=true CAIRN_EVENTS=$(DEMO_DATA)/events $(BIN)/cairn serve --artifacts model_store --artifact-name garden-gru --artifact-version demo; \
	fi

# After `make demo`: a short online experiment, GRU vs the neighbour table (item-KNN), with simulated
# visitors through the real service; prints the experiment's verdict beside the offline one.
DEMO_VISITS ?= 1500
demo-online: $(STAMP)
	$(BIN)/cairn simulate --scenario $(DEMO_DATA)/raw/scenario.npz --artifact garden-gru/demo \
	  --visits $(DEMO_VISITS) --offline-report $(DEMO_REPORTS)/evaluation.json --out $(DEMO_REPORTS)/online

bench: $(STAMP)
	$(BIN)/python -m bench.ingest --out reports/bench/ingest.json
	$(BIN)/python -m bench.training --out reports/bench/training.json
	$(BIN)/python -m bench.step --out reports/bench/step.json
	$(BIN)/python -m bench.service --out reports/bench/service.json
	$(BIN)/python -m bench.side_by_side --out reports/bench/side_by_side.json
	$(BIN)/python -m bench.resilience --out reports/bench/resilience.json
	$(BIN)/python -m bench.metrics_overhead --out reports/bench/metrics_overhead.json
	$(BIN)/python -m bench.session_knn --out reports/bench/session_knn.json
	$(BIN)/python -m bench.events --out reports/bench/events.json
	$(MAKE) bench-large
	$(MAKE) demo SERVE=0
	$(BIN)/python -m bench.quality --report $(DEMO_REPORTS)/evaluation.json --out reports/bench/quality.json

# The trained model the catalogue rows measure: the demo shop generated into $(1) with demo-data
# options $(2), prepared, one epoch of training into checkpoints/$(3), exported as garden-$(3)/bench
# with the clustered index (and, by default at these sizes, both packed tables for the int4+int8 rows).
define trained_catalogue_model
	$(BIN)/cairn demo-data --out $(1)/raw $(2)
	$(BIN)/cairn prepare --input $(1)/raw/clicks.csv --out $(1)/prepared \
	  --session-column session_id --item-column item_id --time-column timestamp --min-item-clicks 1
	$(BIN)/cairn train --data $(1)/prepared --out checkpoints/$(3) --epochs 1 --patience 0
	$(BIN)/cairn export --checkpoint checkpoints/$(3)/best.pt --data $(1)/prepared --artifacts $(1)/model_store \
	  --name garden-$(3) --version bench --overwrite --clustered-index always
endef

# Large catalogues: a GRU trained on a 200,000-item demo shop (105,402 items reach training), its
# scoring paths offline (Recall@20 exact vs int8 and clustered) and served, beside random 200k/1M artifacts.
LARGE = data/large
bench-large: $(STAMP)
	$(call trained_catalogue_model,$(LARGE),--items 200000 --sessions 400000,large)
	$(BIN)/cairn evaluate --data $(LARGE)/prepared --recommenders '' --artifact $(LARGE)/model_store/garden-large/bench \
	  --scoring exact int8 clustered --cost-clicks 0 --out reports/bench/large-scoring.json
	$(BIN)/python -m bench.catalogue --trained $(LARGE)/model_store/garden-large/bench --trained-data $(LARGE)/prepared \
	  --paths exact int8 int4+int8 clustered --out reports/bench/catalogue.json

# A model trained on the demo shop generated with a million items (631,430 reach training): the
# catalogue benchmark's trained rows at that size. About 20 minutes here, most of it one epoch's
# training and validation (on 20,000 sessions); not part of `make bench`.
MILLION = data/million
bench-million: $(STAMP)
	$(call trained_catalogue_model,$(MILLION),--items 1000000 --sessions 2000000 --popularity-exponent 0.8,million)
	$(BIN)/cairn evaluate --data $(MILLION)/prepared --recommenders '' --artifact $(MILLION)/model_store/garden-million/bench \
	  --scoring exact int8 clustered --sessions 5000 --cost-clicks 0 --out reports/bench/million-scoring.json
	$(BIN)/python -m bench.catalogue --sizes --trained $(MILLION)/model_store/garden-million/bench --trained-data $(MILLION)/prepared \
	  --paths exact int8 int4+int8 clustered --out reports/bench/catalogue-million.json

clean:
	rm -rf $(VENV) reports data checkpoints
