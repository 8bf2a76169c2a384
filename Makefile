# Two entry points on a fresh machine: `make demo` and `make test`.
# Both create .venv (if absent) and install the project into it.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed

.PHONY: demo test bench clean

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

demo: $(STAMP)
	@for spec in specs/*.yaml; do $(BIN)/stagefit check $$spec || exit $$?; echo; done
	$(BIN)/stagefit catalogs
	@echo
	$(BIN)/stagefit evaluate specs/contact_pickup_buffer.yaml --topology divider_ce \
	    --set r_top=270k --set r_bottom=51k --set r_collector=11k --set r_emitter=1k3

test: $(STAMP)
	$(BIN)/python -m pytest -q

clean:
	rm -rf $(VENV) build *.egg-info
