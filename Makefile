# Two entry points on a fresh machine: `make demo` and `make test`.
# Both create .venv (if absent) and install the project into it.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed

.PHONY: demo test lint typecheck fuzz bench clean cluster

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/stagefit check specs/bench_stock_preamp.yaml
	@echo
	$(BIN)/stagefit search specs/bench_stock_preamp.yaml --top 5 --front \
	    --plot runs/front.svg --plot runs/response.svg --plot runs/transfer.svg
	@echo
	$(BIN)/stagefit bom specs/bench_stock_preamp.yaml --rank 1 --units 12
	@echo
	@echo "the textbook hand design of the same spec, for comparison:"
	$(BIN)/stagefit evaluate specs/bench_stock_preamp.yaml --topology divider_ce \
	    --set r_top=270k --set r_bottom=18k --set r_collector=8k2 --set r_emitter=220
	@echo
	@$(BIN)/python -c "from optimizer.spec import load_spec; from optimizer.search import spec_search_id; \
	sid = spec_search_id(load_spec('specs/bench_stock_preamp.yaml')); \
	print('the demo search in the browser: http://127.0.0.1:8750/searches/' + sid); \
	print('start the view with:  $(BIN)/stagefit serve --open ' + sid)"

test: $(STAMP)
	$(BIN)/python -m pytest -q

# ruff: the lint rules and the format of pyproject.toml ([tool.ruff])
lint: $(STAMP)
	$(BIN)/ruff check .
	$(BIN)/ruff format --check .

# mypy over the package and the service ([tool.mypy] in pyproject.toml)
typecheck: $(STAMP)
	$(BIN)/mypy

# every benchmark in turn: each prints its figures (target, measured, met).
# BENCH_MODE=full (default): every benchmark at its full sizes, each rewriting its results file in
#   benchmarks/results/ (long: the search and reliability ones take tens of minutes);
# BENCH_MODE=quick: a smoke run for a CI-sized machine (2 cores, under 5 minutes), small sizes (a results file
#   names the mode it was made in; the quick search benchmark prints only).
# (bench_scale runs in the full list; its quick mode, 4k and 16k trials: make bench BENCH_MODE=quick BENCHES=bench_scale)
# One alone: make bench BENCHES=bench_models
BENCH_MODE ?= full
BENCHES_full := bench_startup bench_finish bench_models spice_agreement bench_search bench_loop bench_scale bench_robustness bench_workers bench_api \
    bench_pages bench_reliability
BENCHES_quick := bench_startup bench_search bench_loop bench_workers
BENCHES ?= $(BENCHES_$(BENCH_MODE))
bench: $(STAMP)
	set -e; for b in $(BENCHES); do echo "== benchmarks/$$b.py (BENCH_MODE=$(BENCH_MODE))"; \
	    BENCH_MODE=$(BENCH_MODE) $(BIN)/python benchmarks/$$b.py; done

# the REST fuzz at ten times the CI size (about 25,000 generated requests; benchmarks/results/reliability.md)
fuzz: $(STAMP)
	STAGEFIT_FUZZ_EXAMPLES=800 $(BIN)/python -m pytest -q -s tests/test_api_server.py -k fuzz

# Redis (the shared storage) + two workers + one queued search on this machine: trials/s per worker, logs checked
cluster: $(STAMP)
	bash scripts/try_cluster.sh

clean:
	rm -rf $(VENV) build *.egg-info
