"""A split supply's two rails move independently in the worst case and the Monte Carlo builds
(optimizer/tolerance.py, Spec.supply_spread): V+ and V- each over its own min..max, so the span
and the ground's place in it vary per build. A bias that depends on the rail ratio (the collector
of a split-supply common emitter: V+ less Ic*Rc, with Ic set by V-) spreads wider than a model
that moves only the span finds; one such corner is simulated in ngspice (Debian)."""

from __future__ import annotations

import shutil
import sys
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest

from optimizer.spec import parse_spec
from optimizer.tolerance import SUPPLY_BINS, Builds, supply_points, worst_case
from optimizer.topologies import get_topology
from optimizer.topologies.base import Conditions

sys.path.insert(0, str(Path(__file__).resolve().parent))
from spice_designs import check_device  # noqa: E402

SPEC = parse_spec(
    {
        "name": "t",
        "supply": {"positive": {"nominal": "12 V", "min": "11 V", "max": "13 V"}, "negative": "-12 V"},
        "gain": -10,
        "load_impedance": "47k",
        "band": ["20 Hz", "20 kHz"],
    }
)
CONDITIONS = Conditions(supply=SPEC.supply, source_impedance=600.0, load_impedance=47e3, below_ground=0.5)
DEVICE = check_device(200.0)  # hFE 200 exactly: the supply is the only thing that moves
PARTS = {
    "r_bottom": np.array([20e3]),
    "r_collector": np.array([6.2e3]),
    "r_emitter": np.array([470.0]),
    "r_emitter_dc": np.array([10e3]),
    "c_in": np.array([1e-6]),
    "c_out": np.array([1e-6]),
    "c_emitter": np.array([220e-6]),
}


def test_spread_names_each_rail_over_its_own_range() -> None:
    # V+ 11..13 V as written, V- -12 V -+5 % (11.4..12.6 V), the span's ends their sums
    (pos, neg) = SPEC.supply_spread
    assert pos == pytest.approx((11.0, 13.0)) and neg == pytest.approx((11.4, 12.6))
    assert (SPEC.supply_min, SPEC.supply_max) == pytest.approx((pos[0] + neg[0], pos[1] + neg[1]))
    corners = {levels: (span, g) for span, g, levels in supply_points(SPEC.supply_spread, CONDITIONS)}
    assert corners[(1, 0)] == pytest.approx((13.0 + 11.4, 11.4 / 24.4))  # V+ at its max, V- at its smallest
    single = parse_spec({"name": "t", "supply": "12 V", "gain": -10, "load_impedance": "47k", "band": [20, 2e4]})
    assert single.supply_spread == pytest.approx((11.4, 12.6))  # a single rail: its span alone


def test_monte_carlo_draws_the_rails_independently() -> None:
    builds = Builds.draw(2000, 3, (0.0, 50.0), SPEC.supply_spread, CONDITIONS)
    assert builds.below_ground is not None
    v_pos = builds.supply * (1.0 - builds.below_ground)
    v_neg = builds.supply * builds.below_ground
    pairs = set(zip(np.round(v_pos, 6), np.round(v_neg, 6)))
    assert len(pairs) == SUPPLY_BINS**2  # every level of V+ with every level of V-
    assert abs(np.corrcoef(v_pos, v_neg)[0, 1]) < 0.1  # independent, not one span scaled
    # the builds are in one group (the ground's place is per element), or one per temperature
    assert sorted(np.concatenate([idx for _, idx in builds.groups()])) == list(range(2000))
    assert sorted(np.concatenate([idx for _, idx in builds.groups(by_temperature=True)])) == list(range(2000))


def test_the_grounds_place_per_element_gives_each_place_its_own_figures() -> None:
    """The builds and corners of a split supply go to the models in one call, the span and the
    ground's place per element: every figure (the supply rejection of each rail and the usable
    swing among them) equals that of a call at each place alone."""
    stage = get_topology("divider_ce_split")
    points = [(24.0, 0.5), (24.4, 11.4 / 24.4), (23.6, 12.6 / 23.6), (25.6, 12.6 / 25.6)]
    spans, places = (np.array(column) for column in zip(*points))
    parts = {k: np.repeat(v, len(points)) for k, v in PARTS.items()}
    at_once = stage.evaluate(parts, DEVICE, replace(CONDITIONS, supply=spans, below_ground=places), thd_solve=True)
    for k, (span, place) in enumerate(points):
        alone = stage.evaluate(PARTS, DEVICE, replace(CONDITIONS, supply=span, below_ground=place), thd_solve=True)
        for key, value in {**alone.metrics, **alone.ratings, **alone.operating_point}.items():
            whole = {**at_once.metrics, **at_once.ratings, **at_once.operating_point}[key]
            np.testing.assert_allclose(whole[k], value[0], rtol=1e-12, err_msg=key)
    with pytest.raises(ValueError, match="one supply arrangement"):  # a positive rail beside a split one
        stage.evaluate(parts, DEVICE, replace(CONDITIONS, supply=spans, below_ground=np.array([0.0, 0.5, 0.5, 0.5])))


def test_rail_ratio_spreads_the_collector_wider_than_the_span_alone() -> None:
    stage = get_topology("divider_ce_split")
    rails = worst_case(stage, PARTS, DEVICE, CONDITIONS, {}, (27.0, 27.0), SPEC.supply_spread)
    span_only = worst_case(stage, PARTS, DEVICE, CONDITIONS, {}, (27.0, 27.0), (SPEC.supply_min, SPEC.supply_max))
    width = float(rails["v_collector"][1][0] - rails["v_collector"][0][0])
    width_span = float(span_only["v_collector"][1][0] - span_only["v_collector"][0][0])
    # with the span alone, V+ rises with |V-| and the larger Ic eats most of it: a narrower spread
    assert width > 2.0 * width_span
    # the collector's highest is at V+ max with V- at its smallest magnitude (the least Ic)
    corner = replace(CONDITIONS, supply=13.0 + 11.4, below_ground=11.4 / 24.4)
    v_c = stage.operating_point(PARTS, DEVICE, corner)["v_collector"][0]
    assert float(rails["v_collector"][1][0]) == pytest.approx(v_c, abs=1e-9)


@pytest.mark.skipif(shutil.which("ngspice") is None, reason="ngspice not installed: apt-get install ngspice")
@pytest.mark.parametrize("v_pos, v_neg", [(13.0, -11.4), (11.0, -12.6)], ids=["V+max-V-least", "V+min-V-most"])
def test_a_rail_corner_agrees_with_ngspice(v_pos: float, v_neg: float) -> None:
    from spice_harness import spice_operating_point

    span = v_pos - v_neg
    corner = replace(CONDITIONS, supply=span, below_ground=-v_neg / span)
    stage = get_topology("divider_ce_split")
    op = stage.operating_point(PARTS, DEVICE, corner)
    values = {k: float(v[0]) for k, v in PARTS.items()}
    simulated = spice_operating_point(stage.name, values, {**DEVICE.spice_model(), "polarity": "npn"}, corner)
    # ngspice (Debian) at the true rails: Ic within the agreement tolerance (3 %), the collector
    # within 20 mV or 1 % of the span (the node-voltage check of tests/test_spice_agreement.py)
    assert float(op["ic"][0]) == pytest.approx(simulated["ic"], rel=0.03)
    assert float(op["v_collector"][0]) == pytest.approx(simulated["v_collector"], abs=max(0.02, 0.01 * span))
