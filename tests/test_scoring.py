"""Hard limits as normalised violations: gain window, limits, ratings never silently pass."""

from __future__ import annotations

import numpy as np

from optimizer.scoring import binding_limit, limit_margins, limit_table, limit_violations, total_violation
from optimizer.spec import parse_spec

SPEC = parse_spec(
    {
        "name": "t",
        "supply": "12 V",
        "gain": {"target": -10, "tolerance": "1 dB"},
        "source_impedance": 600,
        "load_impedance": "47k",
        "band": ["20 Hz", "20 kHz"],
        "limits": {"swing_min": "4 V", "supply_current_max": "2 mA"},
    }
)


def _metrics(gain: float, swing: float, current: float) -> dict[str, np.ndarray]:
    return {
        "gain": np.array([gain]),
        "swing_vpp": np.array([swing]),
        "supply_current": np.array([current]),
        "f_low": np.array([10.0]),
        "f_high": np.array([1e6]),
        "input_impedance": np.array([1e4]),
        "output_impedance": np.array([1e3]),
        "thd": np.array([1e-3]),
        "noise_ein_v": np.array([1e-6]),
        "q_power": np.array([0.01]),
    }


def _violations(metrics, power=0.01, rating=0.25, active=True):
    return limit_violations(
        SPEC,
        metrics,
        {"p_r_collector": np.array([power])},
        {"p_r_collector": rating, "q_power": 0.5},
        np.array([active]),
    )


def test_a_design_inside_every_limit_is_feasible() -> None:
    v = _violations(_metrics(-10.5, 6.0, 1e-3))
    assert total_violation(v)[0] == 0 and binding_limit(v)[0] == ""


def test_gain_outside_its_window_is_normalised_to_the_tolerance() -> None:
    # -10 V/V +- 1 dB: -13.3 V/V is 2.48 dB high, 1.48 dB past the edge -> violation 1.48.
    v = _violations(_metrics(-13.3, 6.0, 1e-3))
    assert np.isclose(v["gain"][0], 20 * np.log10(1.33) - 1.0, rtol=1e-6)
    assert binding_limit(v)[0] == "gain"


def test_a_stage_that_is_not_active_follows_every_near_miss_that_amplifies() -> None:
    # a saturated stage whose small-signal gain about its bias happens to sit in the window sums
    # to a small violation; an active stage that misses the gain by 40 dB to a large one. The
    # designer's ranking lists the one that amplifies first, and what binds the dead one is its bias
    from optimizer.search.ranking import rank_records

    dead = _violations(_metrics(-10.0, 6.0, 1e-3), active=False)
    far = _violations(_metrics(-0.1, 6.0, 1e-3))
    assert total_violation(dead)[0] < total_violation(far)[0]
    assert binding_limit(dead)[0] == "active" and binding_limit(far)[0] == "gain"
    records = [
        {
            "topology": "divider_ce",
            "device": "q",
            "parts": {"r_collector": value},
            "feasible": False,
            "score": -float(total_violation(v)[0]),
            "total_violation": float(total_violation(v)[0]),
            "violations": {k: float(x[0]) for k, x in v.items() if x[0] > 0},
        }
        for value, v in ((1.0, dead), (2.0, far))
    ]
    assert [r["parts"]["r_collector"] for r in rank_records(records)] == [2.0, 1.0]
    # the shortlist's candidates (a transistor record, no device name) go in the same order
    from optimizer.search.ranking import designer_order

    candidates = [{**{k: v for k, v in r.items() if k != "device"}, "transistor": {"name": "q"}} for r in records]
    feasible = {**candidates[0], "feasible": True, "score": 0.2, "violations": {}, "total_violation": 0.0}
    ordered = sorted([*candidates, feasible], key=designer_order)
    assert [(c["feasible"], c["parts"]["r_collector"]) for c in ordered] == [(True, 1.0), (False, 2.0), (False, 1.0)]


def test_wrong_polarity_swing_current_and_rating_are_each_violations() -> None:
    v = _violations(_metrics(10.0, 2.0, 3e-3), power=0.3)
    assert v["gain_polarity"][0] == 1.0
    assert np.isclose(v["swing_min"][0], 0.5) and np.isclose(v["supply_current_max"][0], 0.5)
    assert np.isclose(v["rating:p_r_collector"][0], 0.2)


def test_limit_table_and_margins_against_a_hand_worked_design() -> None:
    # worked by hand for SPEC (-10 V/V +- 1 dB, band 20 Hz..20 kHz, swing >= 4 V, current <= 2 mA):
    # margin = (value - limit)/limit for an "at least", (limit - value)/limit for an "at most"
    one = {"gain_error_db": -0.5, "f_low": 10.0, "f_high": 1e5, "swing_vpp": 6.0, "supply_current": 1.5e-3}
    expected = {
        "gain_tolerance": ("max", 1.0, 0.5, 0.5),
        "band_low": ("max", 20.0, 10.0, 0.5),
        "band_high": ("min", 2e4, 1e5, 4.0),
        "swing_min": ("min", 4.0, 6.0, 0.5),
        "supply_current_max": ("max", 2e-3, 1.5e-3, 0.25),
    }
    table = {row["limit"]: row for row in limit_table(SPEC, one)}
    assert set(table) == set(expected)
    for name, (kind, limit, value, margin) in expected.items():
        row = table[name]
        assert (row["kind"], row["limit_value"], row["value"]) == (kind, limit, value), row
        assert np.isclose(row["margin"], margin, rtol=1e-12), row
    # a withheld figure (a design not active has no swing): no margin, never a crash
    table = {row["limit"]: row for row in limit_table(SPEC, {**one, "swing_vpp": None, "gain_error_db": None})}
    assert table["swing_min"]["margin"] is None and table["gain_tolerance"]["margin"] is None
    # the score's margin term: the smallest over the optional limits only (swing 0.1, current 0.25 here)
    arrays = {k: np.array([v, v]) for k, v in one.items()} | {
        "gain": np.array([-10.0, -10.0]),
        "swing_vpp": np.array([4.4, 6.0]),
    }
    assert np.allclose(limit_margins(SPEC, arrays), [0.1, 0.25], rtol=1e-12)


def test_violations_of_missing_infinite_and_zero_figures_follow_the_plain_rules() -> None:
    """_below and _above against their rules applied one value at a time: the normalised
    excess (shortfall) past the limit, none where met, VIOLATION_CAP (1e6) at most and where
    there is no figure (NaN); a maximum of 0 met by 0 and violated by anything above it."""
    from optimizer.scoring import VIOLATION_CAP, _above, _below

    values = np.array([0.0, -0.0, 1.0, 2.5, -3.0, 1e300, -1e300, np.inf, -np.inf, np.nan, 5e-324, 0.2499])

    def plain_below(x: float, m: float) -> float:
        if x != x:
            return VIOLATION_CAP
        if m == 0:
            return VIOLATION_CAP if x > 0 else 0.0
        return min(max((x - m) / m, 0.0), VIOLATION_CAP) if abs(x) != np.inf else (VIOLATION_CAP if x > 0 else 0.0)

    def plain_above(x: float, m: float) -> float:
        if x != x:
            return VIOLATION_CAP
        return min(max((m - x) / m, 0.0), VIOLATION_CAP) if abs(x) != np.inf else (VIOLATION_CAP if x < 0 else 0.0)

    with np.errstate(over="ignore"):  # the plain rules' 1e300 / 1e-9
        for limit in (0.0, 0.25, 1.0, 3.3, 1e-9, 2e6):
            assert list(_below(values, limit)) == [plain_below(float(x), limit) for x in values]
            per_element = np.resize([limit, 1.0, 0.0], values.size)
            assert list(_below(values, per_element)) == [plain_below(float(x), m) for x, m in zip(values, per_element)]
            if limit > 0:
                assert list(_above(values, limit)) == [plain_above(float(x), limit) for x in values]
            for x in (0.0, 2.5, float("nan"), float("inf")):  # a figure as a Python float
                assert float(_below(x, limit)) == plain_below(x, limit)


def test_meeting_every_limit_is_a_summed_violation_of_zero() -> None:
    """meets_every_limit against total_violation(...) == 0 on violations of 0, small, large,
    infinite and NaN (no figure), one or several per build."""
    from optimizer.scoring import meets_every_limit

    rng = np.random.default_rng(3)
    pool = np.array([0.0, 0.0, 0.0, 0.0, 1e-300, 0.25, 1e6, np.inf, np.nan])
    violations = {f"limit{k}": rng.choice(pool, size=(40, 25)) for k in range(6)}
    expected = total_violation(violations) == 0
    assert 0 < np.count_nonzero(expected) < expected.size  # both verdicts
    assert np.array_equal(meets_every_limit(violations), expected)
    assert np.array_equal(meets_every_limit({"one": violations["limit0"]}), violations["limit0"] == 0)
