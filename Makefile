# Two commands set everything up on a fresh clone: `make demo` and `make test`.
PYTHON ?= python3
VENV := .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.installed-stamp
DEMO_OUT ?= demo-output

.PHONY: install demo test bench validate fuzz clean

$(STAMP): pyproject.toml setup.py $(wildcard ecl_quant/native/*.c ecl_quant/native/*.h)
	@test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -e '.[test,bench]'
	@touch $(STAMP)

install: $(STAMP)

demo: $(STAMP)
	$(PY) -m ecl_quant batch sample_frames/manifest.csv --out $(DEMO_OUT) --force
	@echo "Report: $(abspath $(DEMO_OUT))/report.html"

test: $(STAMP)
	$(PY) -m pytest -q

bench: $(STAMP)
	$(PY) benchmarks/run.py

validate: $(STAMP)
	$(PY) -m ecl_quant validate --out validate-output --force

fuzz: $(STAMP)
	ECL_QUANT_FUZZ_EXAMPLES=2000 $(PY) -m pytest -q tests/test_fuzz.py

clean:
	rm -rf $(VENV) $(DEMO_OUT) validate-output .pytest_cache benchmarks/.cache
