# dipshape — every target creates .venv with python3 -m venv and installs into it, so each works
# on a fresh machine with nothing else installed.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
PY     := $(BIN)/python
STAMP  := $(VENV)/.installed
PYTEST_ARGS ?=

.PHONY: demo test test-slow lint bench clean

$(PY):
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip

# Runtime + test + dev extras; re-run when pyproject.toml changes.
$(STAMP): pyproject.toml | $(PY)
	$(PY) -m pip install --quiet -e '.[test,dev]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/dipshape demo

test: $(STAMP)
	$(PY) -m pytest -m "not slow" $(PYTEST_ARGS)

test-slow: $(STAMP)
	$(PY) -m pytest -m slow $(PYTEST_ARGS)

lint: $(STAMP)
	$(BIN)/ruff check features training service tests bench demo_data

bench: $(STAMP)
	$(PY) bench/simulate.py
	@for f in bench/detect.py bench/features.py bench/score.py bench/service.py bench/load.py \
		bench/batch.py bench/real_lc.py; do \
		if [ -f $$f ]; then $(PY) $$f; fi; \
	done

clean:
	rm -rf $(VENV) demo_out .pytest_cache .ruff_cache
