# barrierflow: set-up, run and checks. Needs only python3 (>= 3.11) and make.
PYTHON ?= python3
VENV   := .venv
PY     := $(VENV)/bin/python
STAMP  := $(VENV)/.installed
PREPARED := $(VENV)/.prepared
HOST   ?= 127.0.0.1
PORT   ?= 8050
DEMO   ?= scenarios/daily_patch.toml

.PHONY: run test venv prepare browser lint bench bench-cold bench-fit bench-population clean

$(STAMP): pyproject.toml
	@test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -e ".[dashboard,test,cluster]"
	@touch $(STAMP)

venv: $(STAMP)

# Compiles every numerical kernel once after each change of the code (barrierflow prepare; numba
# keeps them on disk), so that neither the dashboard's first Run nor the test workers wait for it
$(PREPARED): $(STAMP) $(shell find barrierflow -name '*.py' 2>/dev/null)
	$(VENV)/bin/barrierflow prepare
	@touch $(PREPARED)

prepare: $(PREPARED)

# Starts the dashboard on the demo scenario at http://$(HOST):$(PORT)
run: $(PREPARED)
	$(VENV)/bin/barrierflow serve $(DEMO) --host $(HOST) --port $(PORT)

# Debian's chromium and chromium-driver for the browser tests (installed when missing).
browser:
	@if [ ! -x /usr/bin/chromium ] || [ ! -x /usr/bin/chromedriver ]; then \
		echo "installing Debian chromium and chromium-driver for the browser tests"; \
		SUDO=$$( [ "$$(id -u)" = 0 ] || echo "sudo -n" ); \
		$$SUDO apt-get update -qq && DEBIAN_FRONTEND=noninteractive $$SUDO apt-get install -y -qq chromium chromium-driver; \
	fi

test: $(PREPARED) browser
	$(PY) -m ruff check barrierflow dashboard tests
	$(VENV)/bin/lint-imports
	$(PY) -m pytest -n 2 --dist loadfile

lint: $(STAMP)
	$(PY) -m ruff check barrierflow dashboard tests
	$(VENV)/bin/lint-imports

bench: $(PREPARED)
	$(PY) tests/benchmarks/run_benchmark.py

# A fresh clone with an empty cache: set-up time, then the first result of a run and of the dashboard
bench-cold: $(STAMP)
	$(PY) tests/benchmarks/run_benchmark.py --cold

# Speed of barrierflow fit: a two-parameter fit of 3 replicates, a profile-likelihood interval
bench-fit: $(PREPARED)
	$(PY) tests/benchmarks/fit_benchmark.py

# Populations: 1,000 subjects of the demo patch, peak memory up to 100,000, Sobol with 8 parameters
bench-population: $(PREPARED)
	$(PY) tests/benchmarks/population_benchmark.py

clean:
	rm -rf $(VENV) .pytest_cache build *.egg-info
