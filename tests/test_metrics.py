"""The metrics table is the one source: every metric a candidate carries has a row, and the
tables that used to restate it (limits, objectives, units, axes, columns, OpenAPI, docs) read it."""

from __future__ import annotations

from pathlib import Path

from api.openapi import openapi_document
from optimizer.metrics import BY_KEY, LIMIT_METRICS, METRICS, markdown_table
from optimizer.search import search
from optimizer.spec import Limits, parse_spec
from optimizer.topologies.base import METRICS as MODEL_METRICS

SPEC = {
    "name": "metrics",
    "supply": "12 V",
    "gain": {"target": -8, "tolerance": "1 dB"},
    "source_impedance": 600,
    "load_impedance": "47k",
    "band": ["20 Hz", "20 kHz"],
    "topologies": ["divider_ce"],
    "parts": {"resistor_series": "E6", "resistor_range": ["1k", "100k"]},
    "search": {"trials": 32, "seed": 1},
}


def test_every_metric_of_a_candidate_has_one_row() -> None:
    assert len(BY_KEY) == len(METRICS)  # keys are unique
    candidate = search(parse_spec(SPEC), top=1).candidates[0]
    assert set(candidate["metrics"]) == set(BY_KEY)
    assert set(MODEL_METRICS) <= set(BY_KEY)


def test_every_limit_of_the_spec_reads_a_metric() -> None:
    # hand-built: the spec's optional per-metric limits (DESIGN.md), each with its sense
    assert dict((name, (metric, sign)) for name, metric, sign in LIMIT_METRICS) == {
        "input_impedance_min": ("input_impedance", 1),
        "output_impedance_max": ("output_impedance", -1),
        "swing_min": ("swing_vpp", 1),
        "supply_current_max": ("supply_current", -1),
        "thd_max": ("thd", -1),
        "noise_ein_max": ("noise_ein_v", -1),
        "psrr_min_db": ("psrr_db", 1),
        "phase_margin_min_deg": ("phase_margin_deg", 1),
    }
    assert {name for name, _, _ in LIMIT_METRICS} <= set(Limits.model_fields)


def test_openapi_describes_every_metric() -> None:
    schema = openapi_document()["components"]["schemas"]["Candidate"]["properties"]["metrics"]
    assert set(schema["properties"]) == set(BY_KEY)
    assert "(ohm)" in schema["properties"]["input_impedance"]["description"]


def test_the_docs_page_is_the_table() -> None:
    page = (Path(__file__).resolve().parents[1] / "docs" / "metrics.md").read_text(encoding="utf-8")
    assert page.endswith(markdown_table())


def test_a_corner_at_the_end_of_the_response_search_is_shown_as_beyond_it() -> None:
    # corners past physics.SWEEP are reported at its ends: 1e8 Hz means "somewhere above", not 100 MHz
    from optimizer.physics import SWEEP
    from optimizer.report import show

    assert show("f_high", SWEEP[1]) == "above 100 MHz"
    assert show("f_low", SWEEP[0]) == "below 100 mHz"
    assert show("f_high", 2e4) == "20 kHz" and show("f_low", 19.9) == "19.9 Hz"
