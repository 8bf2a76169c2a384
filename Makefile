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

test: $(STAMP)
	$(BIN)/python -m pytest -q

clean:
	rm -rf $(VENV) build *.egg-info
