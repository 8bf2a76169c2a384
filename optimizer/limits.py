"""Bounds on what one request may ask for (documented in the README's operations section).

A module of plain numbers, so that the CLI's argument parser (``stagefit --help``) reads
them without importing pydantic, pandas or the models.
"""

MAX_TRIALS = 1_000_000  # trials in one search
MAX_BATCH = 1024  # trials asked and evaluated together (memory grows with it)
MAX_NAME = 200  # characters in a spec name
MAX_DESCRIPTION = 4000  # characters in a spec description
MAX_SAMPLES = 20_000  # Monte Carlo builds of one evaluated design
MAX_TOP = 1000  # ranked designs shown or returned at once
MAX_UNITS = 100_000  # stages kitted in one BOM
