# lensrec developer tasks. `make install` is idempotent; every other target installs first.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed-stamp
OUT ?= demo_output

.PHONY: install demo lab test test-fast validate bench lint clean

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test,cluster,cosmology]'
	$(BIN)/python -m ipykernel install --sys-prefix --name python3 --display-name "Python 3 (lensrec)" >/dev/null
	touch $(STAMP)

install: $(STAMP)

demo: install
	$(BIN)/lensrec demo --out $(OUT) --force

lab: install
	$(BIN)/lensrec lab

test: install
	$(BIN)/python -m pytest -q

test-fast: install
	$(BIN)/python -m pytest -q -m "not slow and not browser and not validate"

# Long physics checks (minutes to an hour); their figures are recorded in docs/validation.md.
validate: install
	$(BIN)/python -m pytest -q -m validate

bench: install
	$(BIN)/python benchmarks/run_all.py $(if $(QUICK),--quick,)

lint: install
	$(BIN)/ruff check lensrec widgets tests benchmarks
	$(BIN)/ruff format --check lensrec widgets tests benchmarks

clean:
	rm -rf $(OUT) test-artifacts .pytest_cache
