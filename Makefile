# Skydrift developer entry points. `make serve` and `make test` work on a fresh machine
# with Python 3.11+ and make: they create .venv and install the project first.

PYTHON ?= python3
VENV   ?= .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed-stamp

.PHONY: venv serve test lint openapi bench demo clean

venv: $(STAMP)

$(STAMP): pyproject.toml
	@test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[dev]'
	@touch $(STAMP)

serve: venv
	$(BIN)/gunicorn --config deploy/gunicorn.conf.py service.wsgi:app

lint: venv
	$(BIN)/ruff check service tests benchmarks deploy
	$(BIN)/ruff format --check service tests benchmarks deploy

test: lint
	$(BIN)/python -m pytest -q

openapi: venv
	$(BIN)/skydrift openapi --output openapi/openapi.json

bench: venv
	$(BIN)/python -m benchmarks.run

demo: venv
	$(BIN)/python shared/demo/run.py

# Deployment: `make container-test` builds the image from deploy/Dockerfile and runs
# deploy/smoke.sh against the running container (needs Docker, or root with Debian's dockerd
# and debootstrap: see deploy/container-test.sh). `make test` never needs a container engine.
.PHONY: container-test smoke lock

container-test: venv
	PYTHON=$(BIN)/python deploy/container-test.sh

smoke: venv
	PYTHON=$(BIN)/python deploy/smoke.sh

lock: venv
	$(BIN)/python deploy/lock.py

clean:
	rm -rf $(VENV) build *.egg-info .pytest_cache .ruff_cache .hypothesis
