# One command to test, one to run the demo; the same locally and in CI.
PY ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: test demo bench lint typecheck clean test-deps dist deb powercut fuzz

$(STAMP): pyproject.toml
	$(PY) -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip
	$(BIN)/pip install --quiet -e '.[dev,plot]'
	rm -rf $(VENV)/spb-peer
	$(BIN)/pip install --quiet --no-warn-conflicts --target $(VENV)/spb-peer \
	  -r tests/spb_peer_requirements.txt
	touch $(STAMP)

# The Debian packages the tests need (mosquitto, prometheus, systemd, openssl, nats-server,
# debootstrap, dpkg-dev, QEMU for the power-cut VM): the list is in .ci/test-deps; as root
# it installs what is missing, otherwise prints the apt-get line.
test-deps:
	@bash .ci/test-deps

# watchkeep_<version>-1_<arch>.deb in dist/ (packaging/debian/README.md). Needs
# python3-venv and dpkg-dev (build-deb names what is missing).
deb:
	/usr/bin/python3 packaging/debian/build-deb --out dist

test: $(STAMP) test-deps
	$(BIN)/ruff check agent simulator tests
	$(BIN)/pytest -q

# DURATION (seconds of wall time) and DEMO_ARGS (e.g. --plain --summary-json F) are optional.
demo: $(STAMP)
	$(BIN)/watchkeep demo --duration $${DURATION:-180} $${DEMO_ARGS:-}

bench: $(STAMP) test-deps
	$(BIN)/python -m tests.bench

# The long power-cut run (tests/faults/powercut.py): one run of CUTS (50) cuts with
# outbox.synchronous FULL, then NORMAL_CUTS (15) with NORMAL for comparison (NORMAL_CUTS=0
# skips it). Results in bench-results/powercut-full.json and powercut-normal.json.
powercut: $(STAMP) test-deps
	$(BIN)/python -m tests.faults.powercut --cuts $${CUTS:-50} --synchronous FULL
	[ "$${NORMAL_CUTS:-15}" = 0 ] || \
	  $(BIN)/python -m tests.faults.powercut --cuts $${NORMAL_CUTS:-15} --synchronous NORMAL

# Coverage-guided fuzzing (tests/fuzz, DEVELOPERS.md "Fuzzing"): every target under
# atheris for FUZZ_SECONDS (60) each, or only FUZZ_TARGETS; corpora, logs and crash
# inputs in .fuzz/<target>/. Prints executions, coverage and crashes per target.
fuzz: $(STAMP)
	$(BIN)/python -m tests.fuzz --seconds $${FUZZ_SECONDS:-60} $${FUZZ_TARGETS:-}

lint: $(STAMP)
	$(BIN)/ruff check agent simulator tests

typecheck: $(STAMP)
	$(BIN)/mypy agent simulator

# The wheel and the sdist, into dist/ (the wheel is built from the sdist, so a file
# missing from the sdist shows up here).
dist: $(STAMP)
	rm -rf dist
	$(BIN)/python -m build --outdir dist .

clean:
	rm -rf $(VENV) build dist *.egg-info .pytest_cache .ruff_cache .mypy_cache
