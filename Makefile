# Set-up and checks. `make demo` and `make test` each do all set-up on a fresh machine.
PYTHON ?= python3
VENV   ?= .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed-stamp

.PHONY: demo test lint bench plugin system-deps clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip

$(STAMP): pyproject.toml | $(BIN)/python
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

# Debian packages the tests need (LV2 host tools, headers, speech synthesis for
# fixtures). Installs with apt-get when run as root; otherwise says what is missing.
system-deps:
	@bash build/system-deps.sh

demo: $(STAMP)
	$(BIN)/liftmag demo --force

test: $(STAMP) system-deps
	$(BIN)/ruff check dsp plugin tests build benchmarks
	$(BIN)/python -m pytest -q

lint: $(STAMP)
	$(BIN)/ruff check dsp plugin tests build benchmarks

bench: $(STAMP)
	$(BIN)/python benchmarks/run_all.py

plugin: $(STAMP)
	$(BIN)/python build/build_bundle.py

clean:
	rm -rf build/out build/liftmag.lv2 liftmag-demo .pytest_cache .ruff_cache
