# twinfield: two commands set everything up on a fresh machine: `make reduce` and `make test`.
PYTHON ?= python3
VENV   := .venv
PY     := $(VENV)/bin/python
NIGHT  ?=
DEMO   := nights/demo
WORK   ?= work/$(notdir $(if $(NIGHT),$(NIGHT),$(DEMO)))
STAMP  := $(VENV)/.installed
TSTAMP := $(VENV)/.installed-test

.PHONY: reduce test demo-night bench clean venv

$(STAMP): pyproject.toml
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -e .
	touch $@

$(TSTAMP): $(STAMP)
	$(PY) -m pip install --quiet -e '.[test]'
	touch $@

venv: $(STAMP)

$(DEMO)/truth.json: | $(STAMP)
	$(PY) -m pipeline.cli simulate $(DEMO) --scenario demo --seed 1

demo-night: $(STAMP) $(DEMO)/truth.json

reduce: $(STAMP)
ifeq ($(NIGHT),)
	$(MAKE) demo-night
	$(PY) -m pipeline.cli reduce $(DEMO) -o $(WORK)
else
	$(PY) -m pipeline.cli reduce $(NIGHT) -o $(WORK)
endif

test: $(TSTAMP)
	$(PY) -m pytest -q

bench: $(STAMP)
	$(PY) -m pipeline.bench

clean:
	rm -rf work build .pytest_cache

# Monte-Carlo check of the astrometric errors (pulls over many simulated nights); not part of `make test`.
.PHONY: validate
validate: $(STAMP)
	$(PY) -m pipeline.validate --seeds 30 --scenario validate --out build
