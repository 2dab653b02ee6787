# barrierflow: set-up, run and checks. Needs only python3 (>= 3.11) and make.
PYTHON ?= python3
VENV   := .venv
PY     := $(VENV)/bin/python
STAMP  := $(VENV)/.installed
HOST   ?= 127.0.0.1
PORT   ?= 8050
DEMO   ?= scenarios/daily_patch.toml

.PHONY: run test venv browser lint bench bench-fit bench-population clean

$(STAMP): pyproject.toml
	@test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -e ".[dashboard,test,cluster]"
	@touch $(STAMP)

venv: $(STAMP)

# Starts the dashboard on the demo scenario at http://$(HOST):$(PORT)
run: $(STAMP)
	$(VENV)/bin/barrierflow serve $(DEMO) --host $(HOST) --port $(PORT)

# Debian's chromium and chromium-driver for the browser tests (installed when missing).
browser:
	@if [ ! -x /usr/bin/chromium ] || [ ! -x /usr/bin/chromedriver ]; then \
		echo "installing Debian chromium and chromium-driver for the browser tests"; \
		SUDO=$$( [ "$$(id -u)" = 0 ] || echo "sudo -n" ); \
		$$SUDO apt-get update -qq && DEBIAN_FRONTEND=noninteractive $$SUDO apt-get install -y -qq chromium chromium-driver; \
	fi

test: $(STAMP) browser
	$(PY) -m ruff check barrierflow dashboard tests
	$(VENV)/bin/lint-imports
	$(PY) -m pytest -n 2 --dist loadfile

lint: $(STAMP)
	$(PY) -m ruff check barrierflow dashboard tests
	$(VENV)/bin/lint-imports

bench: $(STAMP)
	$(PY) tests/benchmarks/run_benchmark.py

# Speed of barrierflow fit: a two-parameter fit of 3 replicates, a profile-likelihood interval
bench-fit: $(STAMP)
	$(PY) tests/benchmarks/fit_benchmark.py

# Populations: 1,000 subjects of the demo patch, peak memory up to 100,000, Sobol with 8 parameters
bench-population: $(STAMP)
	$(PY) tests/benchmarks/population_benchmark.py

clean:
	rm -rf $(VENV) .pytest_cache build *.egg-info
