# Platebook: `make demo` sets up and runs the main job on the demo stock; `make test` runs the suite.
PY ?= python3
VENV := .venv
BIN := $(VENV)/bin
DEMO := demo-out
DEMO_PORT ?= 8150

.PHONY: demo test install install-test install-bench ngspice postgresql chromium bench clean

$(BIN)/python:
	$(PY) -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip

install: $(BIN)/python
	$(BIN)/pip install --quiet -e .

install-bench: $(BIN)/python
	$(BIN)/pip install --quiet -e '.[bench]'

install-test: $(BIN)/python
	$(BIN)/pip install --quiet -e '.[test]'

# ngspice is the independent simulator the export tests check against (Debian package).
ngspice:
	@command -v ngspice >/dev/null 2>&1 || { \
	  echo "installing ngspice (Debian package) for the simulator cross-checks"; \
	  if [ "$$(id -u)" = 0 ]; then SUDO=; else SUDO=sudo; fi; \
	  $$SUDO apt-get update -qq && DEBIAN_FRONTEND=noninteractive $$SUDO apt-get install -y -qq ngspice >/dev/null; }

# PostgreSQL is the ledger's second database: the ledger tests start a throwaway cluster
# (initdb + pg_ctl as an unprivileged user, unix socket only) from Debian's server binaries.
postgresql:
	@ls /usr/lib/postgresql/*/bin/initdb >/dev/null 2>&1 || command -v initdb >/dev/null 2>&1 || { \
	  echo "installing postgresql (Debian package) for the ledger tests"; \
	  if [ "$$(id -u)" = 0 ]; then SUDO=; else SUDO=sudo; fi; \
	  $$SUDO apt-get update -qq && DEBIAN_FRONTEND=noninteractive $$SUDO apt-get install -y -qq postgresql >/dev/null; }

# chromium is the browser the web front end's browser test drives through Playwright (Debian
# package; Playwright's own browser download is never used).
chromium:
	@test -x /usr/bin/chromium || { \
	  echo "installing chromium (Debian package) for the browser test"; \
	  if [ "$$(id -u)" = 0 ]; then SUDO=; else SUDO=sudo; fi; \
	  $$SUDO apt-get update -qq && DEBIAN_FRONTEND=noninteractive $$SUDO apt-get install -y -qq chromium >/dev/null; }

demo: install
	@echo "== Fitting the demo stock (invented data, made by curves/make_demo.py) =="
	$(BIN)/platebook fit curves/stock_high_mu.csv curves/stock_medium_mu.csv curves/stock_power.csv \
	  --model koren --save $(DEMO)/cards --plot $(DEMO)/plots; status=$$?; [ $$status -le 2 ] || exit $$status
	@echo; echo "== Every model on the positive-grid set with grid current and on the digitised datasheet curves =="
	$(BIN)/platebook fit curves/stock_grid_current.csv curves/datasheet_medium_mu_wide.csv --model all \
	  --save $(DEMO)/cards --plot $(DEMO)/plots; status=$$?; [ $$status -le 2 ] || exit $$status
	@echo; echo "== A common-cathode stage with the fitted HM-01:A (invented circuit values) =="
	$(BIN)/platebook stage common-cathode --tube $(DEMO)/cards/HM-01_A.koren.json --bplus 300 --ra 100k \
	  --rk 1.5k --ck 22u --rl 470k --cout 100n --cgk 1.6p --cga 1.7p --cak 0.46p --cload 100p --pa-max 1 \
	  --plot $(DEMO)/stage_cc.png
	@echo; echo "== Its distortion, swept up to grid-current onset =="
	$(BIN)/platebook distortion common-cathode --tube $(DEMO)/cards/HM-01_A.koren.json --bplus 300 --ra 100k \
	  --rk 1.5k --ck 22u --rl 470k --sweep --thd-limit 1% --plot $(DEMO)/thd_cc.png
	@echo; echo "== Matched pairs from the medium-mu stock at its working point =="
	$(BIN)/platebook fit curves/stock_medium_mu.csv --model koren --json > $(DEMO)/fits_medium_mu.json; \
	  status=$$?; [ $$status -le 2 ] || exit $$status
	$(BIN)/platebook match $(DEMO)/fits_medium_mu.json --va 250 --vg -8.5 --tolerance 5 --csv $(DEMO)/pairs.csv
	@echo; echo "== Left and right SRPP stacks from the same stock, one bottle per stack =="
	$(BIN)/platebook match $(DEMO)/fits_medium_mu.json --stack srpp --bplus 400 --rk 1k --stages 2 --same-bottle
	@echo; echo "== An SRPP with the two sections of MM-01 (elevated-heater check) =="
	$(BIN)/platebook stage stack --bottom $(DEMO)/cards/MM-01_A.koren.json --top $(DEMO)/cards/MM-01_B.koren.json \
	  --bplus 400 --rk 1k --r-top 1k --rl 47k --vhk-max 200 --plot $(DEMO)/stage_srpp.png
	@echo; echo "== The web front end over a demo ledger ($(DEMO)/ledger.sqlite; the invented stock) =="
	rm -f $(DEMO)/ledger.sqlite $(DEMO)/ledger.sqlite-wal $(DEMO)/ledger.sqlite-shm
	$(BIN)/platebook stock --db $(DEMO)/ledger.sqlite --user demo type MM --va 250 --vg -8.5
	$(BIN)/platebook stock --db $(DEMO)/ledger.sqlite --user demo type HM --va 250 --vg -2
	$(BIN)/platebook stock --db $(DEMO)/ledger.sqlite --user demo import curves/stock_medium_mu.csv --type MM \
	  >/dev/null; status=$$?; [ $$status -le 2 ] || exit $$status
	$(BIN)/platebook stock --db $(DEMO)/ledger.sqlite --user demo import curves/stock_high_mu.csv --type HM \
	  >/dev/null; status=$$?; [ $$status -le 2 ] || exit $$status
	$(BIN)/platebook stock --db $(DEMO)/ledger.sqlite --user demo import curves/retest_medium_mu.csv --type MM \
	  >/dev/null; status=$$?; [ $$status -le 2 ] || exit $$status
	$(BIN)/platebook stock --db $(DEMO)/ledger.sqlite --user demo type PT --va 300 --vg -61 --single --pa-max 40
	$(BIN)/platebook stock --db $(DEMO)/ledger.sqlite --user demo import curves/stock_power.csv --type PT \
	  >/dev/null; status=$$?; [ $$status -le 2 ] || exit $$status
	@echo "Grading the demo stock against each type's nominal (the median of its sections: no datasheet card given)"
	@for t in MM HM PT; do $(BIN)/platebook stock --db $(DEMO)/ledger.sqlite --user demo grade --type $$t \
	  >/dev/null || exit $$?; done
	@pw=$$($(BIN)/python -c "import secrets; print(secrets.token_urlsafe(12))"); \
	  echo "$$pw" | $(BIN)/platebook users --db $(DEMO)/ledger.sqlite add demo --role editor --password-stdin >/dev/null && \
	  echo "Demo ledger ready. Sign in at http://127.0.0.1:$(DEMO_PORT)/ as 'demo' with password $$pw" && \
	  echo "(an editor account of this demo ledger only; the password is new on every 'make demo')"
	@if [ -n "$$PLATEBOOK_DEMO_NO_SERVE" ]; then echo "PLATEBOOK_DEMO_NO_SERVE is set: not serving"; else \
	  $(BIN)/platebook serve --db $(DEMO)/ledger.sqlite --port $(DEMO_PORT); fi

test: install-test ngspice postgresql chromium
	$(BIN)/python -m pytest -q

bench: install-bench
	$(BIN)/python bench/fit.py
	$(BIN)/python bench/stage.py
	$(BIN)/python bench/match.py --sizes 100,1000,10000
	$(BIN)/python bench/ledger.py

clean:
	rm -rf $(DEMO) .pytest_cache
