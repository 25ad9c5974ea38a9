# cairn: the two commands of the README are `make demo` and `make test`.
PY ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed-$(shell cksum requirements.lock | cut -d' ' -f1)

.PHONY: venv demo test test-fast bench lock lint loadtest faulttest clean

$(STAMP): requirements.lock
	@test -x $(BIN)/python || $(PY) -m venv $(VENV)
	$(BIN)/pip install -q --disable-pip-version-check -r requirements.lock
	@rm -f $(VENV)/.installed-*
	@touch $(STAMP)

venv: $(STAMP)

# Build the demo study, then serve it with one Celery worker until Ctrl-C.
demo: $(STAMP)
	$(BIN)/python manage.py migrate --noinput
	$(BIN)/python manage.py demo

# The whole suite. pytest's exit code 5 (nothing collected) counts as a failure.
test: $(STAMP)
	@$(BIN)/python -m pytest; rc=$$?; \
	if [ $$rc -eq 5 ]; then echo "make test: pytest collected no tests" >&2; exit 1; fi; exit $$rc

# Everything but the browser and real-service tests, for a quick loop while coding.
test-fast: $(STAMP)
	$(BIN)/python -m pytest -q -m "not browser and not postgres and not redis"

# One JSON object per figure per line; ONLY=<prefix> keeps the figures starting with it.
bench: $(STAMP)
	$(BIN)/python tests/benchmarks/run.py $(if $(ONLY),--only $(ONLY),)

lint: $(STAMP)
	$(BIN)/ruff check .
	$(BIN)/python manage.py makemigrations --check --dry-run

lock: $(STAMP)
	$(BIN)/pip freeze --exclude-editable | grep -v '^-e' > requirements.lock

clean:
	rm -rf var/

# Load and fault tests (not part of make test): private PostgreSQL (54329), Redis (63790),
# gunicorn and a Celery worker on loopback; one JSON object per figure per line.
loadtest: $(STAMP)
	$(BIN)/python -m tests.load.run

faulttest: $(STAMP)
	$(BIN)/python -m tests.faults.run
