# pdgc: two commands do everything on a fresh machine.
#   make demo   create .venv, install, solve, generate, compile and check the demo
#   make test   same install, then the test suite
#   make bench  benchmarks (slow; writes bench/results/)
#   make lock   re-resolve requirements.lock after editing pyproject.toml's
#               dependencies (keeps every pin it can); make lock-upgrade moves
#               every pin to the newest release (P=name: that package only)

PYTHON ?= python3
VENV   := .venv
PY     := $(VENV)/bin/python
PDGC   := $(VENV)/bin/pdgc
STAMP  := $(VENV)/.installed-stamp
# Exact versions and sha256 of every distribution, transitive ones and the
# build backend included (pip-compile --generate-hashes; DEVELOPERS.md,
# "Pinned dependencies").
LOCK   := requirements.lock
LOCK_VENV := .venv-lock
PIP_TOOLS := pip-tools==7.6.2
LOCK_FLAGS := --quiet --generate-hashes --allow-unsafe --strip-extras --all-build-deps \
	--extra test --no-emit-index-url --no-emit-find-links
DEMO_VEHICLE := examples/demo_vehicle.toml
DEMO_OUT := demo-out

.PHONY: install demo test bench clean lock lock-upgrade

install: $(STAMP)

# A new venv each time the lock or pyproject.toml changes, so that it holds
# exactly the locked set (pip install never removes what a lock dropped).
# The venv's own pip (the one Python ships) installs the lock in hash-checking
# mode: every distribution must match a locked sha256. pdgc itself goes in
# last, editable, with no dependencies and the locked setuptools.
$(STAMP): pyproject.toml $(LOCK)
	$(PYTHON) -m venv --clear $(VENV)
	$(PY) -m pip install --quiet --require-hashes -r $(LOCK)
	$(PY) -m pip install --quiet --no-deps --no-build-isolation -e .
	touch $(STAMP)

$(LOCK_VENV)/bin/pip-compile:
	$(PYTHON) -m venv --clear $(LOCK_VENV)
	$(LOCK_VENV)/bin/pip install --quiet $(PIP_TOOLS)

lock: $(LOCK_VENV)/bin/pip-compile
	$(LOCK_VENV)/bin/pip-compile $(LOCK_FLAGS) --output-file $(LOCK) pyproject.toml

lock-upgrade: $(LOCK_VENV)/bin/pip-compile
	$(LOCK_VENV)/bin/pip-compile $(LOCK_FLAGS) $(if $(P),--upgrade-package $(P),--upgrade) \
		--output-file $(LOCK) pyproject.toml

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
