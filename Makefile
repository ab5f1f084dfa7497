# Plumbline: `make serve` and `make test` are all a fresh machine needs.
PYTHON ?= python3
VENV   ?= .venv
BIN    := $(VENV)/bin
HOST   ?= 127.0.0.1
PORT   ?= 5000
STAMP  := $(VENV)/.installed

.PHONY: serve test check lint bench calibrate dist wheel-smoke venv vendor clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip

$(STAMP): $(BIN)/python pyproject.toml
	$(BIN)/python -m pip install --quiet -e ".[test]"
	touch $(STAMP)

venv: $(STAMP)

serve: $(STAMP)
	$(BIN)/plumbline db upgrade
	$(BIN)/plumbline demo load --if-empty
	$(BIN)/plumbline serve --host $(HOST) --port $(PORT)

# The whole suite: SQLite always; PostgreSQL too when PLUMBLINE_TEST_DATABASE_URL is set.
test: $(STAMP)
	$(BIN)/python -m pytest -q

lint: $(STAMP)
	$(BIN)/ruff check app tests migrations

# Lint, then the whole suite.
check: lint test

# The wheel carries templates/, static/ and migrations/ inside the package (see DEVELOPERS.md).
dist: $(STAMP)
	rm -rf dist build
	$(BIN)/python -m pip wheel --quiet --no-deps --wheel-dir dist .

# Install the wheel into a fresh venv outside the checkout, migrate, load the demo, serve it
# and fetch the login page, its stylesheet and a chart library.
wheel-smoke: dist
	PYTHON=$(PYTHON) bash .ci/wheel-smoke dist/plumbline-*.whl

# The app's modules are byte-compiled first, as an installed wheel's are (pip compiles what it
# installs): an editable checkout run with PYTHONDONTWRITEBYTECODE set would otherwise compile
# every module again in each timed command, which the scripting anchor's libraries never do.
bench: $(STAMP)
	$(BIN)/python -m compileall -q app
	$(BIN)/python tests/bench/run.py

# False-alarm and detection rates of the residual checks on three common designs; rewrites
# app/data/calibration.json, which the review page shows beside a fit of the same design.
calibrate: $(STAMP)
	$(BIN)/python tests/bench/calibrate.py

clean:
	rm -rf $(VENV) instance/plumbline.db* .pytest_cache dist build

# Re-fetch the chart libraries from the npm registry (only when upgrading them).
vendor:
	rm -rf /tmp/plumbline-vendor && mkdir -p /tmp/plumbline-vendor
	cd /tmp/plumbline-vendor && npm init -y >/dev/null && \
	  npm install --silent vega@6.4.0 vega-lite@6.4.1 vega-embed@7.3.0 vega-interpreter@2.3.2 esbuild@0 && \
	  echo "export { expressionInterpreter } from 'vega-interpreter';" > entry.js && \
	  npx esbuild entry.js --bundle --minify --format=iife --global-name=vegaInterpreter --outfile=vega-interpreter.min.js
	cp /tmp/plumbline-vendor/node_modules/vega/build/vega.min.js \
	   /tmp/plumbline-vendor/node_modules/vega-lite/build/vega-lite.min.js \
	   /tmp/plumbline-vendor/node_modules/vega-embed/build/vega-embed.min.js \
	   /tmp/plumbline-vendor/vega-interpreter.min.js static/vendor/
	sed -i 's#//\# sourceMappingURL=.*##' static/vendor/*.js
