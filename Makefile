# quakefolio: `make demo`, `make test`, `make bench`. Needs only python3 (>= 3.11) and pip.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed
export QUAKEFOLIO_STATE := $(CURDIR)/.quakefolio

.PHONY: demo demo-scenario test bench venv clean

venv: $(STAMP)

$(STAMP): pyproject.toml requirements.lock
	@$(PYTHON) -c 'import sys; assert sys.version_info >= (3, 11), "quakefolio needs Python >= 3.11"'
	@echo "setting up $(VENV) (pinned dependencies from requirements.lock; log in $(VENV)/install.log)"
	@$(PYTHON) -m venv $(VENV)
	@$(BIN)/python -m pip install -c requirements.lock -e ".[test]" > $(VENV)/install.log 2>&1 \
		|| (tail -n 40 $(VENV)/install.log; echo "dependency install failed; full log: $(VENV)/install.log"; exit 1)
	@touch $(STAMP)

demo: $(STAMP)
	$(BIN)/quakefolio run demo_portfolio/quakefolio.toml

# scenario earthquake of the demo's largest fault, fields conditioned on the invented station records
demo-scenario: $(STAMP)
	$(BIN)/quakefolio scenario demo_portfolio/quakefolio.toml demo_portfolio/scenario_quarnel.toml \
		--stations demo_portfolio/stations_quarnel.csv

# the suite runs in TEST_WORKERS processes (pytest-xdist), one test file per process at a time, the longest
# files first (tests/conftest.py HEAVY_FILES; xdist would otherwise order them by their number of tests)
TEST_WORKERS ?= 2

test: $(STAMP)
	$(BIN)/python -m pytest -n $(TEST_WORKERS) --dist loadfile --no-loadscope-reorder

bench: $(STAMP)
	$(BIN)/python benchmarks/run_all.py

clean:
	rm -rf $(VENV) .quakefolio demo_portfolio/output
