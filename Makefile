# One way to build, test and demo. Every target creates .venv on first use.
PY ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: demo test bench lint clean soak

$(STAMP): pyproject.toml
	$(PY) -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip
	$(BIN)/pip install --quiet -e '.[collector,sim,test,dev]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/listenpost demo

test: $(STAMP)
	$(BIN)/ruff check agent collector listenpost tests bench
	$(BIN)/ruff format --check --quiet agent collector listenpost tests bench systemd replay_logs
	$(BIN)/mypy listenpost/core
	$(BIN)/python -m pytest -n 2 --dist loadscope

bench: $(STAMP)
	$(BIN)/python -m bench

soak: $(STAMP)
	$(BIN)/python -m pytest -m soak
	$(BIN)/python -m tests.soak

lint: $(STAMP)
	$(BIN)/ruff check agent collector listenpost tests bench
	$(BIN)/ruff format --check agent collector listenpost tests bench systemd replay_logs

clean:
	rm -rf $(VENV) .pytest_cache
