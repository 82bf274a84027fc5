# Two commands do all the set-up: `make run` and `make test`.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
PORT ?= 8000
STAMP := $(VENV)/.installed

.PHONY: install browser run test lint fuzz faults bench openapi check-tables clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)

$(STAMP): $(BIN)/python pyproject.toml requirements.lock
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -r requirements.lock
	$(BIN)/python -m pip install --quiet --no-deps -e .
	touch $(STAMP)

install: $(STAMP)

# The same gunicorn configuration as production (service/serving/gunicorn.conf.py), without
# the proxy in front: see README "Deploying".
run: install
	$(BIN)/annuity-service serve --port $(PORT)

# Debian's Chromium and its chromedriver, for the /docs test in a real browser
# (tests/browser); installed when missing (CI runs as root on a fresh Debian machine).
SUDO := $(shell [ "$$(id -u)" = 0 ] || echo sudo)
browser:
	@if [ ! -x /usr/bin/chromium ] || [ ! -x /usr/bin/chromedriver ]; then \
		echo "installing chromium and chromium-driver from Debian's packages (apt-get) ..."; \
		$(SUDO) apt-get update -qq && \
		DEBIAN_FRONTEND=noninteractive $(SUDO) apt-get install -y -qq chromium chromium-driver; \
	fi

# ANNUITY_REQUIRE_BROWSER: the browser test fails rather than skips without Chromium.
test: install browser
	ANNUITY_REQUIRE_BROWSER=1 $(BIN)/python -m pytest -q

fuzz: install
	$(BIN)/python -m tests.live.fuzz --max-examples 300

# Runs against nginx + gunicorn on loopback; installs Debian's nginx (apt-get) when missing.
faults: install
	$(BIN)/python -m tests.live.faults

lint: install
	$(BIN)/ruff check service tests bench

openapi: install
	$(BIN)/annuity-service write-openapi

check-tables: install
	$(BIN)/annuity-service check-tables tables

# Every benchmark side by side (about eight minutes); writes bench/results/latest.md, latest.json
# and the floors plots (PNG; matplotlib comes with requirements.lock).
bench: install
	$(BIN)/python -m bench.run

clean:
	rm -rf $(VENV)
