# Set-up and checks. Every target creates .venv when it is missing and installs the project into it
# from requirements.lock (exact versions: a run's bits depend on the jax/jaxlib release).
PYTHON ?= $(shell command -v python3.11 || command -v python3)
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed

.PHONY: demo test test-long bench clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip

$(STAMP): $(BIN)/python pyproject.toml requirements.lock
	$(BIN)/python -m pip install --quiet -r requirements.lock
	$(BIN)/python -m pip install --quiet --no-deps -e '.[test]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/lesion run specs/cold-chain.toml --out results --quiet >/dev/null
	$(BIN)/lesion show results/$$($(BIN)/lesion check specs/cold-chain.toml --format json | $(BIN)/python -c 'import json,sys; print(json.load(sys.stdin)["result_set"])')

test: $(STAMP)
	$(BIN)/python -m pytest

test-long: $(STAMP)
	$(BIN)/python -m pytest -m slow

clean:
	rm -rf $(VENV) .pytest_cache .hypothesis
