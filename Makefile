# potfield: make demo | make test | make bench
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.potfield-installed
DEMOS  := surveys/demo-magnetic surveys/demo-gravity surveys/demo-observatory

.PHONY: venv demo lint test bench clean-demo

$(STAMP): pyproject.toml
	@test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e ".[test]"
	@# tidegravity (test-only reference library) pins old numpy/pandas in its metadata; its code
	@# runs on current ones, so it is installed without its pins.
	$(BIN)/python -m pip install --quiet --no-deps "tidegravity==0.5.0"
	@touch $(STAMP)

venv: $(STAMP)

demo: $(STAMP)
	@for d in $(DEMOS); do \
	  if [ -f $$d/survey.toml ]; then $(BIN)/potfield run $$d || exit $$?; fi; \
	done
	@echo "Demo results: surveys/*/out/report.html (tables in out/tables, grids in out/grids)"

lint: $(STAMP)
	$(BIN)/ruff check src tests benchmarks
	$(BIN)/ruff format --check src tests benchmarks

test: lint
	$(BIN)/python -m pytest -q -n 2 --dist loadfile

bench: $(STAMP)
	$(BIN)/python benchmarks/run.py

clean-demo:
	rm -rf surveys/*/out
