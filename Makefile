# Two entry points: `make serve` (the main job on the demo site) and `make test`.
# Each creates its own virtual environment on first use.
PYTHON ?= python3
VENV ?= .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.sillmark-installed

.PHONY: serve test test-fast browser bench demo clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip
	$(BIN)/pip install --quiet -e '.[test]'
	touch $(STAMP)

serve: $(STAMP)
	$(BIN)/sillmark serve

# Headless Chromium for the browser tests, from Debian's packages (the tests
# drive it through Playwright; no browser is downloaded), and poppler-utils
# (pdftotext, pdfinfo) to read the printed report's PDF. Skipped, loudly, where
# they cannot be installed; the browser tests then skip with the reason.
browser:
	@{ command -v chromium && command -v pdftotext && command -v pdfinfo; } >/dev/null 2>&1 || { \
	  if [ "$$(id -u)" = 0 ] && command -v apt-get >/dev/null 2>&1; then \
	    echo "make: installing chromium and poppler-utils for the browser tests"; \
	    DEBIAN_FRONTEND=noninteractive apt-get update -qq && \
	    DEBIAN_FRONTEND=noninteractive apt-get install -y -qq chromium poppler-utils >/dev/null || \
	    echo "make: COULD NOT INSTALL CHROMIUM OR POPPLER-UTILS: browser tests will be skipped" >&2; \
	  else \
	    echo "make: NO CHROMIUM OR POPPLER-UTILS and no root apt-get: browser tests will be skipped" >&2; \
	  fi; }

test: $(STAMP) browser
	@rc=0; $(BIN)/python -m pytest || rc=$$?; \
	if [ $$rc -eq 5 ]; then echo "make test: pytest collected no tests" >&2; fi; \
	exit $$rc

# The fast subset for development: no slow, cluster or browser tests (a few minutes).
test-fast: $(STAMP)
	$(BIN)/python -m pytest -m "not slow and not cluster and not browser"

bench: $(STAMP)
	$(BIN)/python bench/bench_engine.py

demo: $(STAMP)
	$(BIN)/python demo_dem/build_demo.py

clean:
	rm -rf $(VENV) out .pytest_cache
