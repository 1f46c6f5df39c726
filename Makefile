# leadline developer commands. A fresh machine needs only Python >= 3.11 and make:
#   make demo   - create .venv, install leadline, run the end-to-end demo
#   make test   - create .venv, install with test extras, lint, run the tests
PYTHON ?= python3
VENV ?= .venv
PY := $(VENV)/bin/python
PROTO_DIR := proto
PROTO_OUT := proto/leadline/v1

.PHONY: demo test lint format proto bench bench-quick bench-system bench-system-quick bench-ingest bench-draws clean

$(PY):
	$(PYTHON) -c 'import sys; assert sys.version_info >= (3, 11), "leadline needs Python >= 3.11, found " + sys.version'
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip

# setuptools prints an informational "Editable installation" notice for every editable
# install of a package-dir layout like ours (a caution about a `leadline/` folder in the
# working directory; there is none). It is not a warning about this project: keep it out
# of a first `make demo`. Every other warning still shows.
PIP_INSTALL := PYTHONWARNINGS="ignore:Editable installation" $(PY) -m pip install --quiet

# Stamp files: reinstall only when pyproject.toml changes.
$(VENV)/.installed: pyproject.toml | $(PY)
	$(PIP_INSTALL) -e .
	touch $@

$(VENV)/.installed-test: pyproject.toml | $(PY)
	$(PIP_INSTALL) -e '.[test]'
	touch $(VENV)/.installed $@

demo: $(VENV)/.installed
	$(VENV)/bin/leadline demo

test: $(VENV)/.installed-test lint
	$(PY) -m pytest -q

# mypy --strict reads our three folders under their import names (leadline.service, ...)
# through a tree of links, so it follows the imports between them; error paths show the
# link (.venv/typecheck/leadline/service/x.py is service/x.py).
TYPECHECK := $(VENV)/typecheck

lint: $(VENV)/.installed-test
	$(VENV)/bin/ruff check .
	$(VENV)/bin/ruff format --check .
	mkdir -p $(TYPECHECK)/leadline
	ln -sfn $(CURDIR)/service $(TYPECHECK)/leadline/service
	ln -sfn $(CURDIR)/client $(TYPECHECK)/leadline/client
	ln -sfn $(CURDIR)/proto/leadline/v1 $(TYPECHECK)/leadline/v1
	MYPYPATH=$(TYPECHECK) $(VENV)/bin/mypy -p leadline.service -p leadline.client -m leadline.v1.rules

format: $(VENV)/.installed-test
	$(VENV)/bin/ruff format .
	$(VENV)/bin/ruff check --fix .

# Regenerate the committed protobuf / gRPC code with the pinned grpcio-tools.
proto: $(VENV)/.installed-test
	$(PY) -m grpc_tools.protoc -I$(PROTO_DIR) --python_out=$(PROTO_DIR) \
		--pyi_out=$(PROTO_DIR) --grpc_python_out=$(PROTO_DIR) \
		$(PROTO_OUT)/leadline.proto

bench: $(VENV)/.installed-test
	$(PY) benchmarks/labels.py

bench-quick: $(VENV)/.installed-test
	$(PY) benchmarks/labels.py --quick

# System benchmark: a real `leadline serve` child beside bare sqlite3 / numpy / core figures.
# Full: 1,000,000 items, writes its section of BENCHMARKS.md; quick: 100,000 items.
bench-system: $(VENV)/.installed-test
	$(PY) benchmarks/system.py

bench-system-quick: $(VENV)/.installed-test
	$(PY) benchmarks/system.py --quick

# Ingest and restart at 100k and 1M items beside bare sqlite3 on the same rows.
bench-ingest: $(VENV)/.installed-test
	$(PY) benchmarks/ingest.py

# Draw index vs draw_batch at 100k, 1M and 10M items, plus the label benchmark's quick
# scenarios through both draw paths (BENCHMARKS.md, draws section).
bench-draws: $(VENV)/.installed-test
	$(PY) benchmarks/draws.py

clean:
	rm -rf $(VENV) build dist *.egg-info .pytest_cache .mypy_cache .ruff_cache
