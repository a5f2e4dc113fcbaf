# burstlens: every target builds what it needs from nothing.
PY      ?= python3
VENV    := .venv
BIN     := $(VENV)/bin
STAMP   := $(VENV)/.installed
CHROMIUM := /usr/bin/chromium

.PHONY: venv chromium test demo bench reliability clean

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PY) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

venv: $(STAMP)

# The browser tests drive Debian's Chromium; never a downloaded browser build.
chromium:
	@if [ ! -x $(CHROMIUM) ]; then \
	  echo "installing Debian chromium for the browser tests"; \
	  SUDO=$$( [ "$$(id -u)" = 0 ] || echo sudo ); \
	  $$SUDO apt-get update -qq && DEBIAN_FRONTEND=noninteractive $$SUDO apt-get install -y -qq chromium; \
	fi

test: venv chromium
	$(BIN)/ruff check .
	$(BIN)/python -m pytest tests

demo: venv
	$(BIN)/python -m burstlens.service.demo

bench: venv
	$(BIN)/python bench/run.py

# Reliability and security campaign (about 20 minutes; not part of `make test`): real servers on
# 127.0.0.1, bounded fault, bad-input, tenant and load experiments, one table of figures.
reliability: venv
	$(BIN)/python -m reliability.run

clean:
	rm -rf $(VENV) demo_out .pytest_cache
