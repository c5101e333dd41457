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
	@path=$$($(BIN)/lesion run specs/cold-chain.toml --results results | tail -n 1) && \
	  $(BIN)/lesion show "$$path" && \
	  $(BIN)/lesion plot "$$path" --kind curves && \
	  $(BIN)/lesion plot "$$path" --kind arms && \
	  $(BIN)/lesion report "$$path" && \
	  echo "result set: $$path  (try: $(BIN)/lesion replay $$path)"

# Branch coverage of the package, measured in the test process (subprocesses are not counted).
test: $(STAMP)
	$(BIN)/python -m coverage run --branch --source=compiler,runtime -m pytest
	$(BIN)/python -m coverage report --show-missing

test-long: $(STAMP)
	$(BIN)/python -m pytest -m slow

clean:
	rm -rf $(VENV) .pytest_cache .hypothesis .coverage
