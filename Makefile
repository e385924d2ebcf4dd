# pdgc: two commands do everything on a fresh machine.
#   make demo   create .venv, install, solve, generate, compile and check the demo
#   make test   same install, then the test suite
#   make bench  benchmarks (slow; writes bench/results/)

PYTHON ?= python3
VENV   := .venv
PY     := $(VENV)/bin/python
PDGC   := $(VENV)/bin/pdgc
STAMP  := $(VENV)/.installed-stamp
DEMO_VEHICLE := examples/demo_vehicle.toml
DEMO_OUT := demo-out

.PHONY: install demo test bench clean

install: $(STAMP)

$(STAMP): pyproject.toml
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -e '.[test]'
	touch $(STAMP)

# The committed demo tree is regenerated in place: with deterministic output
# git sees no change unless the generator or the vehicle changed.
DEMO_TREE := generated/demo
DEMO_HORIZON := 50

demo: $(STAMP)
	mkdir -p $(DEMO_OUT)
	$(PDGC) solve $(DEMO_VEHICLE) --state 1500,0,1500,-50,0,-40,1900 --plot $(DEMO_OUT)/demo_plan.png
	@echo "demo plot: $(DEMO_OUT)/demo_plan.png"
	$(PDGC) generate $(DEMO_VEHICLE) --horizon $(DEMO_HORIZON) --out $(DEMO_TREE)
	$(MAKE) -C $(DEMO_TREE)
	./$(DEMO_TREE)/build/pdg_plan_once
	$(PDGC) check $(DEMO_TREE) --cases 50 --json $(DEMO_OUT)/check.json
	rm -rf $(DEMO_OUT)/envelope && $(PDGC) envelope $(DEMO_TREE) --dispersions examples/demo_dispersions.toml --cases 100 --workers 2 --reference-every 20 --no-progress --out $(DEMO_OUT)/envelope
	@echo "envelope report: $(DEMO_OUT)/envelope/report.html"
	rm -rf $(DEMO_OUT)/sim && $(PDGC) simulate $(DEMO_TREE) --runs 20 --seed 1 --errors examples/demo_errors.toml --out $(DEMO_OUT)/sim --quiet
	@echo "closed-loop report: $(DEMO_OUT)/sim/report.html"

test: $(STAMP)
	$(PY) -m pytest -q

bench: $(STAMP)
	$(PY) -m pytest -q bench --benchmark-only -p no:cacheprovider

clean:
	rm -rf $(DEMO_OUT) build .pytest_cache $(DEMO_TREE)/build $(DEMO_TREE)/build-cmake
