"""Test-suite set-up: the helpers beside the tests (ngspice harness, design sets)
are importable as plain modules."""
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
