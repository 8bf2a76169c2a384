"""The worst case's stacked model calls against the plain path: one model call per corner."""

from __future__ import annotations

import itertools
from dataclasses import replace

import numpy as np
import pytest

from check_devices import check_npn
from optimizer.tolerance import supply_points, worst_case
from optimizer.topologies import get_topology
from optimizer.topologies.base import Conditions

DEVICE = check_npn("t-npn-corners", vceo_max=45)
TWO_DESIGNS = {  # two common-practice divider stages (the 9 V one of test_spread_and_sizing, and one at about 0.7 mA)
    "r_top": np.array([75e3, 68e3]),
    "r_bottom": np.array([10e3, 10e3]),
    "r_collector": np.array([10e3, 6.8e3]),
    "r_emitter": np.array([1e3, 680.0]),
    "c_in": np.array([10e-6, 4.7e-6]),
    "c_out": np.array([10e-6, 22e-6]),
}
SINGLE = (
    TWO_DESIGNS,
    Conditions(supply=9.0, source_impedance=600.0, load_impedance=100e3, band=(20.0, 20e3)),
    (8.0, 10.0),
)
# a split supply, +-6 V nominal, each rail over its own range (the ground's place moves per
# corner); the base returns to ground through r_bottom alone (r_top absent, 0), the emitter
# resistor to the negative rail sets about 0.8 and 1.1 mA
SPLIT = (
    {
        **TWO_DESIGNS,
        "r_top": np.zeros(2),
        "r_bottom": np.array([10e3, 22e3]),
        "r_collector": np.array([4.7e3, 3.3e3]),
        "r_emitter": np.array([6.8e3, 4.7e3]),
    },
    Conditions(supply=12.0, source_impedance=600.0, load_impedance=100e3, band=(20.0, 20e3), below_ground=0.5),
    ((5.5, 6.5), (5.0, 7.0)),
)
METRICS = ("gain", "swing_vpp", "input_impedance", "supply_current", "f_low", "f_high", "noise_ein_v")


def corner_by_corner(topology, parts, roles, tolerances, conditions, temperatures, supply_range) -> dict:
    """(low, high) of each metric over every corner (the parts of ``roles`` at their tolerance
    edges), each corner its own model call on scalar conditions: the plain path the stacked
    calls must agree with."""
    n = next(iter(parts.values())).size
    seen: dict[str, list[np.ndarray]] = {}
    for temperature, (supply, below, _) in itertools.product(temperatures, supply_points(supply_range, conditions)):
        at = replace(conditions, temperature=temperature, supply=supply, below_ground=below)
        for hfe, signs in itertools.product(
            DEVICE.spread_edges(temperature), itertools.product((-1.0, 1.0), repeat=len(roles))
        ):
            corner = {**parts, **{r: parts[r] * (1.0 + s * tolerances[r]) for r, s in zip(roles, signs)}}
            metrics = topology.evaluate(corner, DEVICE, at, hfe=np.full(n, hfe), full=True).metrics
            for key in METRICS:
                seen.setdefault(key, []).append(np.asarray(metrics[key], dtype=float))
    return {k: (np.min(np.stack(v), axis=0), np.max(np.stack(v), axis=0)) for k, v in seen.items()}


@pytest.mark.parametrize("parts, conditions, supply_range", [SINGLE, SPLIT], ids=["single", "split"])
def test_stacked_corners_match_one_call_per_corner(parts: dict, conditions: Conditions, supply_range) -> None:
    topology = get_topology("divider_ce")
    tolerances = {"r_top": 0.05, "r_bottom": 0.01, "r_collector": 0.05, "r_emitter": 0.01, "c_in": 0.2, "c_out": 0.1}
    roles = ("r_bottom", "r_emitter", "c_in")  # 8 part corners (all six: 64, the same code path)
    stacked = worst_case(topology, parts, DEVICE, conditions, tolerances, (0.0, 50.0), supply_range, roles=roles)
    plain = corner_by_corner(topology, parts, roles, tolerances, conditions, (0.0, 50.0), supply_range)
    assert stacked["active_all"][0].all()
    for metric in ("gain", "supply_current", "f_low"):  # the corners do move these
        assert np.all(stacked[metric][1] > stacked[metric][0])
    for metric in METRICS:
        np.testing.assert_allclose(stacked[metric][0], plain[metric][0], rtol=1e-12, err_msg=metric)
        np.testing.assert_allclose(stacked[metric][1], plain[metric][1], rtol=1e-12, err_msg=metric)


def test_a_part_absent_from_every_candidate_adds_no_corners(monkeypatch) -> None:
    """SPLIT's r_top is 0 in both designs (absent): its tolerance corners would repeat the others,
    so the stacked calls leave it out, with the same figures as one call per corner over it."""
    import optimizer.tolerance as tolerance

    parts, conditions, supply_range = SPLIT
    topology = get_topology("divider_ce")
    tolerances = {"r_top": 0.05, "r_bottom": 0.01, "r_collector": 0.05, "r_emitter": 0.01, "c_in": 0.2, "c_out": 0.1}
    roles = ("r_top", "r_bottom", "c_in")
    spread: list[tuple[str, ...]] = []
    corner_result = tolerance._corner_result
    monkeypatch.setattr(tolerance, "_corner_result", lambda *a, **k: spread.append(a[6]) or corner_result(*a, **k))
    stacked = worst_case(topology, parts, DEVICE, conditions, tolerances, (0.0, 50.0), supply_range, roles=roles)
    assert spread and all("r_top" not in r and "r_bottom" in r for r in spread)
    plain = corner_by_corner(topology, parts, roles, tolerances, conditions, (0.0, 50.0), supply_range)
    for metric in METRICS:
        np.testing.assert_allclose(stacked[metric][0], plain[metric][0], rtol=1e-12, err_msg=metric)
        np.testing.assert_allclose(stacked[metric][1], plain[metric][1], rtol=1e-12, err_msg=metric)


@pytest.mark.parametrize("parts, conditions, supply_range", [SINGLE, SPLIT], ids=["single", "split"])
def test_builds_without_the_noise_pass_keep_every_other_figure(
    parts: dict, conditions: Conditions, supply_range
) -> None:
    """evaluate(noise=False), what a spec's Monte Carlo builds run on when it limits neither noise
    nor supply rejection, against the plain full evaluation: the same corners, core metrics,
    operating point and ratings; only the noise and PSRR figures left NaN. And the yield judged
    on a limit those passes do not touch is the same with and without them."""
    from optimizer.tolerance import monte_carlo_yield

    topology = get_topology("divider_ce")
    at = replace(conditions, supply=np.full(2, conditions.supply))
    plain = topology.evaluate(parts, DEVICE, at, full=True)
    lean = topology.evaluate(parts, DEVICE, at, full=True, noise=False)
    skipped = {"noise_ein_v", "noise_figure_db", "psrr_db", "psrr_ripple_db", "psrr_mid_db"}
    assert np.all(np.isfinite(plain.metrics["noise_ein_v"])) and np.all(np.isfinite(plain.metrics["psrr_db"]))
    for key, value in plain.metrics.items():
        if key in skipped:
            assert np.all(np.isnan(lean.metrics[key])), key
        else:
            np.testing.assert_array_equal(lean.metrics[key], value, err_msg=key)
    for got, want in ((lean.operating_point, plain.operating_point), (lean.ratings, plain.ratings)):
        for key, value in want.items():
            np.testing.assert_array_equal(got[key], value, err_msg=key)
    tolerances = {"r_top": 0.05, "r_bottom": 0.01, "r_collector": 0.05, "r_emitter": 0.01, "c_in": 0.2, "c_out": 0.1}
    low, _ = worst_case(topology, parts, DEVICE, conditions, tolerances, (0.0, 50.0), supply_range)["f_low"]

    def passes(sample: dict[str, np.ndarray], rows: slice) -> np.ndarray:  # a band limit in between the corners
        return sample["f_low"] < 1.05 * low[rows, None]

    yields = [
        monte_carlo_yield(
            topology, parts, DEVICE, conditions, tolerances, (0.0, 50.0), passes, 400, 7, True, supply_range, noise
        )
        for noise in (True, False)
    ]
    assert np.all((yields[0] > 0) & (yields[0] < 1))  # the limit splits the builds: the comparison means something
    np.testing.assert_array_equal(yields[0], yields[1])
