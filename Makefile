# Platebook: `make demo` sets up and runs the main job on the demo stock; `make test` runs the suite.
PY ?= python3
VENV := .venv
BIN := $(VENV)/bin
DEMO := demo-out

.PHONY: demo test install install-test ngspice bench clean

$(BIN)/python:
	$(PY) -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip

install: $(BIN)/python
	$(BIN)/pip install --quiet -e .

install-test: $(BIN)/python
	$(BIN)/pip install --quiet -e '.[test]'

# ngspice is the independent simulator the export tests check against (Debian package).
ngspice:
	@command -v ngspice >/dev/null 2>&1 || { \
	  echo "installing ngspice (Debian package) for the simulator cross-checks"; \
	  if [ "$$(id -u)" = 0 ]; then SUDO=; else SUDO=sudo; fi; \
	  $$SUDO apt-get update -qq && DEBIAN_FRONTEND=noninteractive $$SUDO apt-get install -y -qq ngspice >/dev/null; }

demo: install
	@echo "== Fitting the demo stock (invented data, made by curves/make_demo.py) =="
	$(BIN)/platebook fit curves/stock_*.csv --model koren --save $(DEMO)/cards --plot $(DEMO)/plots; \
	  status=$$?; [ $$status -le 2 ] || exit $$status

test: install-test ngspice
	$(BIN)/python -m pytest -q

bench: install
	$(BIN)/python bench/fit.py

clean:
	rm -rf $(DEMO) .pytest_cache
