# Two entry points: `make serve` (the main job on the demo site) and `make test`.
# Each creates its own virtual environment on first use.
PYTHON ?= python3
VENV ?= .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.sillmark-installed

.PHONY: serve test bench demo clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip
	$(BIN)/pip install --quiet -e '.[test]'
	touch $(STAMP)

serve: $(STAMP)
	$(BIN)/sillmark analyse demo_dem/riverbend.tif --outlet nodata --outlet edge --out out/riverbend

test: $(STAMP)
	@rc=0; $(BIN)/python -m pytest || rc=$$?; \
	if [ $$rc -eq 5 ]; then echo "make test: pytest collected no tests" >&2; fi; \
	exit $$rc

bench: $(STAMP)
	$(BIN)/python bench/bench_engine.py

demo: $(STAMP)
	$(BIN)/python demo_dem/build_demo.py

clean:
	rm -rf $(VENV) out .pytest_cache
