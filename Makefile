# Two commands set everything up on a fresh machine: `make demo` and `make test`.
# Both create a local virtual environment in .venv and install what they need into it.

PYTHON ?= python3.11
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed

.PHONY: test demo bench clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e ".[test,fast]"
	touch $(STAMP)

# pytest exits 5 when it collected no test: that must fail, not pass silently.
# The tests run in one worker process per core (at most 4), a test file per worker at a time,
# so a file's shared fixtures (fitted models) are made once; --durations lists the slowest.
test: $(STAMP)
	$(BIN)/python -m pytest -q -p no:cacheprovider -n auto --maxprocesses 4 --dist loadfile \
		--durations 15; rc=$$?; \
	if [ $$rc -eq 5 ]; then echo "pytest collected no tests: failing on purpose"; exit 1; fi; exit $$rc

demo: $(STAMP)
	$(BIN)/bayeslong demo

bench: $(STAMP)
	$(BIN)/python bench/likelihood_scaling.py
	$(BIN)/python bench/ml_vs_reference.py

clean:
	rm -rf $(VENV) bayeslong-demo build *.egg-info
