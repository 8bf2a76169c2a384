"""Test-suite set-up: the helpers beside the tests (ngspice harness, design sets)
are importable as plain modules."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

# PostgreSQL for the shared-storage tests: `postgres_server`, `postgres_url` (tests/pg_fixture.py)
from pg_fixture import postgres_server, postgres_url  # noqa: E402,F401
