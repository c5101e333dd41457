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

# The suite in TEST_WORKERS processes (pytest-xdist), each taking whole test files so a module's
# fixtures compute once; every process pins XLA:CPU to one thread (tests/conftest.py), so two
# workers on two cores nearly halve the time. Branch coverage of the package is measured in every
# test process and combined by pytest-cov (subprocesses the tests start are not counted).
TEST_WORKERS ?= 2
test: $(STAMP)
	$(BIN)/python -m pytest -n $(TEST_WORKERS) --dist loadfile \
	  --cov=compiler --cov=runtime --cov-branch --cov-report=term-missing

test-long: $(STAMP)
	$(BIN)/python -m pytest -m slow

clean:
	rm -rf $(VENV) .pytest_cache .hypothesis .coverage
