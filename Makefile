# One command to test, one to run the demo; the same locally and in CI.
PY ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: test demo bench lint typecheck clean check-mosquitto check-nats

$(STAMP): pyproject.toml
	$(PY) -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip
	$(BIN)/pip install --quiet -e '.[dev,plot]'
	rm -rf $(VENV)/spb-peer
	$(BIN)/pip install --quiet --no-warn-conflicts --target $(VENV)/spb-peer \
	  -r tests/spb_peer_requirements.txt
	touch $(STAMP)

check-mosquitto:
	@command -v mosquitto >/dev/null 2>&1 || [ -x /usr/sbin/mosquitto ] || { \
	  if [ "$$(id -u)" = 0 ]; then apt-get update -qq && apt-get install -y -qq mosquitto; \
	  else echo "mosquitto is missing: run 'sudo apt-get install -y mosquitto' and try again" >&2; exit 1; fi; }

# The fleet test's clustered upstream broker (tests/integration/test_fleet_nats.py).
check-nats:
	@command -v nats-server >/dev/null 2>&1 || [ -x /usr/sbin/nats-server ] || { \
	  if [ "$$(id -u)" = 0 ]; then apt-get update -qq && apt-get install -y -qq nats-server; \
	  else echo "nats-server is missing: run 'sudo apt-get install -y nats-server' and try again" >&2; exit 1; fi; }

test: $(STAMP) check-mosquitto check-nats
	$(BIN)/ruff check agent simulator tests
	$(BIN)/pytest -q

# DURATION (seconds of wall time) and DEMO_ARGS (e.g. --plain --summary-json F) are optional.
demo: $(STAMP)
	$(BIN)/watchkeep demo --duration $${DURATION:-180} $${DEMO_ARGS:-}

bench: $(STAMP) check-mosquitto
	$(BIN)/python -m tests.bench

lint: $(STAMP)
	$(BIN)/ruff check agent simulator tests

typecheck: $(STAMP)
	$(BIN)/mypy agent simulator

clean:
	rm -rf $(VENV) build *.egg-info .pytest_cache .ruff_cache .mypy_cache
