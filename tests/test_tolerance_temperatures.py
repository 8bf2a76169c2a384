"""A temperature per element: the Monte Carlo builds, the corners and the bias spread of every
temperature in one model call, against the plain path of one call per temperature (scalar
conditions). The same arithmetic per element, so the figures agree to rounding (1e-12)."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest

from optimizer import robustness, scoring, tolerance
from optimizer.spec import parse_spec
from optimizer.tolerance import TEMPERATURE_BINS, Builds, bias_spread, monte_carlo_yield
from optimizer.topologies import get_topology
from spice_designs import check_designs, fb_split_designs, jfet_check_designs, polarity_designs
from test_tolerance import DEVICE, SINGLE, SPLIT

TEMPERATURES = np.array([-20.0, 27.0, 70.0])  # degC
TOLERANCES = {"r_top": 0.05, "r_bottom": 0.01, "r_collector": 0.05, "r_emitter": 0.01, "c_in": 0.2, "c_out": 0.1}


def _one_per_kind() -> list:
    """One design per topology, device polarity, supply arrangement and decoupling RC, over
    every stage model (the ngspice agreement set's designs)."""
    seen, out = set(), []
    for d in check_designs() + jfet_check_designs() + polarity_designs() + fb_split_designs():
        key = (d.topology, d.device.polarity, d.conditions.below_ground, "r_decouple" in d.parts)
        if key not in seen:
            seen.add(key)
            out.append(d)
    return out


def _same(got: np.ndarray, want: np.ndarray, what: str) -> None:
    got, want = np.asarray(got), np.asarray(want)
    if got.dtype == bool:
        np.testing.assert_array_equal(got, want, err_msg=what)
    else:
        np.testing.assert_allclose(got, want, rtol=1e-12, atol=0.0, equal_nan=True, err_msg=what)


@pytest.mark.parametrize("design", _one_per_kind(), ids=lambda d: d.name)
def test_a_temperature_per_candidate_matches_one_call_per_temperature(design) -> None:
    """evaluate (full metrics, the quasi-static THD's static transfer) with the design at three
    temperatures in one call, the temperature an array, against a call per temperature."""
    topology = get_topology(design.topology)
    k = TEMPERATURES.size
    parts = {role: np.full(k, float(v)) for role, v in design.parts.items()}
    at = replace(design.conditions, temperature=TEMPERATURES)
    hfe = np.full(k, design.device.spread_typ)
    merged = topology.evaluate(parts, design.device, at, hfe=hfe, full=True, thd_solve=True)
    for j, t in enumerate(TEMPERATURES):
        # the same batch at one temperature (the band corners' refinement steps depend on the
        # batch's size at the 1e-12 level, temperatures aside)
        one = topology.evaluate(
            parts, design.device, replace(design.conditions, temperature=float(t)), hfe=hfe, full=True, thd_solve=True
        )
        for part in ("metrics", "operating_point", "ratings"):
            for key, value in getattr(one, part).items():
                _same(getattr(merged, part)[key][j], value[j], f"{design.name} {part} {key} at {t} degC")
    # the temperature does move the figures: the comparison means something
    assert np.ptp(merged.operating_point["ic"]) > 0


def _recorded_builds(topology, parts, conditions, temperatures, supply_range, full, threshold, samples, seed):
    """(yield, every build's figures by name, shape (candidates, samples)) of monte_carlo_yield
    judged on supply_current < ``threshold`` (A), the figures taken from what ``passes`` sees:
    its calls come in the order of the builds' groups, one block of rows each."""
    n = next(iter(parts.values())).size
    groups = iter(Builds.draw(samples, seed, temperatures, supply_range, conditions).groups())
    seen: dict[str, np.ndarray] = {}

    def passes(sample: dict[str, np.ndarray], rows: slice) -> np.ndarray:
        assert rows == slice(0, n)
        *_, idx = next(groups)
        for key, value in sample.items():
            seen.setdefault(key, np.zeros((n, samples), dtype=value.dtype))[:, idx] = value
        return sample["supply_current"] < threshold[:, None]

    fraction = monte_carlo_yield(
        topology, parts, DEVICE, conditions, TOLERANCES, temperatures, passes, samples, seed, full, supply_range
    )
    assert next(groups, None) is None  # every group seen
    return fraction, seen


@pytest.mark.parametrize("full", [False, True], ids=["core", "full"])
@pytest.mark.parametrize("parts, conditions, supply_range", [SINGLE, SPLIT], ids=["single", "split"])
def test_monte_carlo_builds_of_all_temperatures_match_one_range_per_temperature(
    parts: dict, conditions, supply_range, full: bool
) -> None:
    """Every build's figures and the yield from the merged call against monte_carlo_yield run
    once per temperature level with a one-temperature range (the same builds otherwise: the
    draws of the other variables do not depend on the range)."""
    topology = get_topology("divider_ce")
    samples, seed, span = 240, 11, (0.0, 50.0)
    threshold = topology.evaluate(parts, DEVICE, replace(conditions, supply=np.full(2, conditions.supply))).metrics[
        "supply_current"
    ]
    fraction, merged = _recorded_builds(topology, parts, conditions, span, supply_range, full, threshold, samples, seed)
    temperature = Builds.draw(samples, seed, span, supply_range, conditions).temperature
    levels = np.linspace(*span, TEMPERATURE_BINS)
    assert set(np.unique(temperature)) == set(levels)
    plain: dict[str, np.ndarray] = {}
    for t in levels:
        _, alone = _recorded_builds(topology, parts, conditions, (t, t), supply_range, full, threshold, samples, seed)
        at = temperature == t
        for key, value in alone.items():
            plain.setdefault(key, np.zeros_like(value))[:, at] = value[:, at]
    assert merged.keys() == plain.keys()
    for key in merged:
        _same(merged[key], plain[key], key)
    passed = (plain["supply_current"] < threshold[:, None]) & plain["active"]
    np.testing.assert_array_equal(fraction, passed.mean(axis=1))
    assert np.all((fraction > 0.05) & (fraction < 0.95))  # the limit splits the builds
    assert np.ptp(merged["ic"][0, temperature == levels[0]]) > 0  # and the temperature moves them


@pytest.mark.parametrize("full", [False, True], ids=["core", "full"])
@pytest.mark.parametrize("parts, conditions, supply_range", [SINGLE, SPLIT], ids=["single", "split"])
def test_monte_carlo_call_per_temperature_gives_the_merged_yield(
    monkeypatch, parts: dict, conditions, supply_range, full: bool
) -> None:
    """Builds filling more than tolerance.MERGED_CALLS model calls take a call per temperature
    (the temperature a scalar): the same yield as every temperature in one call."""
    topology = get_topology("divider_ce")
    threshold = topology.evaluate(parts, DEVICE, replace(conditions, supply=np.full(2, conditions.supply))).metrics[
        "supply_current"
    ]
    calls: list[object] = []

    def passes(sample: dict[str, np.ndarray], rows: slice) -> np.ndarray:
        return sample["supply_current"] < threshold[rows, None]

    def yield_with(merged_calls: float) -> np.ndarray:
        monkeypatch.setattr(tolerance, "MERGED_CALLS", merged_calls)
        real = topology.evaluate

        def counted(parts, device, at, **kwargs):
            calls.append(at.temperature)
            return real(parts, device, at, **kwargs)

        monkeypatch.setattr(topology, "evaluate", counted)
        try:
            return monte_carlo_yield(
                topology, parts, DEVICE, conditions, TOLERANCES, (0.0, 50.0), passes, 300, 5, full, supply_range
            )
        finally:
            monkeypatch.setattr(topology, "evaluate", real)

    merged = yield_with(np.inf)
    assert all(np.ndim(t) == 1 for t in calls)  # a temperature per element
    calls.clear()
    by_temperature = yield_with(0)
    assert calls and all(np.ndim(t) == 0 for t in calls)  # one temperature per call
    assert len({float(t) for t in calls}) == TEMPERATURE_BINS
    np.testing.assert_array_equal(by_temperature, merged)
    assert np.all((merged > 0.05) & (merged < 0.95))  # the limit splits the builds


def test_bias_spread_of_both_temperatures_matches_each_alone() -> None:
    """bias_spread over a temperature range (its corners of both ends in one call) against the
    ranges of each end alone, combined: the same low and high Ic and output voltage."""
    topology = get_topology("divider_ce")
    for parts, conditions, supply_range in (SINGLE, SPLIT):
        both = bias_spread(topology, parts, DEVICE, conditions, TOLERANCES, (0.0, 50.0), supply_range)
        ends = [bias_spread(topology, parts, DEVICE, conditions, TOLERANCES, (t, t), supply_range) for t in (0.0, 50.0)]
        for key, pick in (
            ("ic_low", np.minimum),
            ("ic_high", np.maximum),
            ("v_out_low", np.minimum),
            ("v_out_high", np.maximum),
        ):
            _same(both[key], pick(ends[0][key], ends[1][key]), key)
        assert np.all(both["ic_high"] > np.maximum(ends[0]["ic_high"], ends[1]["ic_low"]))


@pytest.mark.parametrize("swing_limit", [False, True], ids=["no-swing-min", "swing-min"])
@pytest.mark.parametrize("full", [False, True], ids=["screen", "final"])
def test_judge_of_all_temperatures_matches_one_range_per_temperature(
    monkeypatch, full: bool, swing_limit: bool
) -> None:
    """robustness.judge's yield (the search's screen, and a ranked design's full assessment)
    build by build against judge run once per temperature level with a one-temperature range;
    on a spec without a swing limit (no swing solved) and with one (judged against it)."""
    parts, conditions, _ = SINGLE
    topology = get_topology("divider_ce")
    nominal_at = replace(conditions, supply=np.full(2, conditions.supply))
    first = topology.evaluate(parts, DEVICE, nominal_at).metrics
    spec = parse_spec(
        {
            "name": "merged builds",
            "supply": "9 V",
            "gain": {"target": float(first["gain"][0]), "tolerance": "3 dB"},
            "source_impedance": conditions.source_impedance,
            "load_impedance": conditions.load_impedance,
            "band": ["20 Hz", "20 kHz"],
            "temperature": ["0 °C", "50 °C"],
            # between the two designs' currents, near the first's: it splits the first's builds
            "limits": {
                "supply_current_max": f"{1e3 * 1.03 * float(first['supply_current'][0]):.5f} mA",
                # near the first design's swing: it splits some of the builds that pass the current limit
                **({"swing_min": f"{0.97 * float(first['swing_vpp'][0]):.4f} V"} if swing_limit else {}),
            },
        }
    )
    at = scoring.conditions_from_spec(spec)
    limits = scoring.rating_limits(
        spec, {r: 0.25 for r in topology.resistors}, {c: 50.0 for c in ("c_in", "c_out")}, DEVICE
    )
    result = topology.evaluate(parts, DEVICE, at, full=full)
    nominal = scoring.limit_violations(
        spec, result.metrics, result.ratings, limits, result.operating_point["active"], core_only=not full
    )
    builds = 300
    draw = Builds.draw(builds, robustness.BUILDS_SEED, tuple(spec.temperature), spec.supply_spread, at)
    real = robustness.monte_carlo_yield

    def judged(temperature: tuple[float, float]) -> tuple[robustness.Judgement, np.ndarray]:
        """judge at ``temperature``, with every build's verdict (candidates, builds) recorded."""
        verdicts = np.ones((2, builds), dtype=bool)
        groups = iter(Builds.draw(builds, robustness.BUILDS_SEED, temperature, spec.supply_spread, at).groups())
        idx, calls = np.zeros(0, dtype=int), 0

        def recording(*args, **kwargs):
            passes = args[6]

            def recorded(sample: dict[str, np.ndarray], rows: slice) -> np.ndarray:
                # one call per group of builds (both designs in one block) where the spec does not
                # limit the swing; where it does, judge solves the swing last: each group's builds
                # are first judged with an unbounded swing (every swing_vpp infinite), then the
                # swing judged where they pass
                nonlocal idx, calls
                if calls % (2 if swing_limit else 1) == 0:
                    assert np.all(np.isinf(sample["swing_vpp"])) == swing_limit
                    idx = next(groups)[-1]
                calls += 1
                verdict = passes(sample, rows)
                verdicts[rows, idx] &= verdict & sample["active"]
                return verdict

            return real(*args[:6], recorded, *args[7:], **kwargs)

        monkeypatch.setattr(robustness, "monte_carlo_yield", recording)
        one = spec.model_copy(update={"temperature": temperature})
        return robustness.judge(
            one, topology, parts, DEVICE, at, TOLERANCES, limits, nominal, full=full, builds=builds
        ), verdicts

    merged, verdicts = judged(tuple(spec.temperature))
    plain = np.zeros_like(verdicts)
    for t in np.linspace(*spec.temperature, TEMPERATURE_BINS):
        _, alone = judged((t, t))
        plain[:, draw.temperature == t] = alone[:, draw.temperature == t]
    np.testing.assert_array_equal(verdicts, plain)
    np.testing.assert_array_equal(merged.yield_fraction, plain.mean(axis=1))
    assert 0.05 < merged.yield_fraction[0] < 0.95  # the limit splits the builds


def test_swing_solved_last_gives_the_same_builds_and_yield() -> None:
    """monte_carlo_yield with a swing_floor (the usable swing solved only for the builds that pass
    with an unbounded one, and there only as far as telling its side of the floor) against the
    plain path that solves it for every build: the same yield, the same side of the floor
    wherever it was judged, NaN where it was not; and evaluate's swing_where against the plain
    evaluate."""
    topology = get_topology("divider_ce")
    parts, conditions, supply_range = SINGLE
    nominal = topology.evaluate(parts, DEVICE, replace(conditions, supply=np.full(2, conditions.supply))).metrics
    gain_max, swing_min = np.abs(nominal["gain"]), 0.97 * float(nominal["swing_vpp"].min())

    def passes(sample: dict[str, np.ndarray], rows: slice) -> np.ndarray:  # a gain and a swing limit
        return (np.abs(sample["gain"]) < gain_max[rows, None]) & (sample["swing_vpp"] >= swing_min)

    seen: list[dict[str, np.ndarray]] = []

    def recorded(sample: dict[str, np.ndarray], rows: slice) -> np.ndarray:
        seen.append(sample)
        return passes(sample, rows)

    args = (topology, parts, DEVICE, conditions, TOLERANCES, (0.0, 50.0), recorded, 400, 3, False, supply_range)
    plain = monte_carlo_yield(*args)
    last = monte_carlo_yield(*args, swing_floor=swing_min)
    np.testing.assert_array_equal(last, plain)
    assert np.any((plain > 0.05) & (plain < 0.95))
    every, unbounded, lean = seen  # one call of the plain path, two of the swing floor's
    assert np.all(np.isinf(unbounded["swing_vpp"]))
    solved = (np.abs(every["gain"]) < gain_max[:, None]) & every["active"]
    assert 0 < solved.mean() < 1  # the gain limit alone fails some builds: their swing is skipped
    short = np.isnan(lean["swing_vpp"]) & solved  # told short of the floor, not solved
    assert short.any() and np.all(every["swing_vpp"][short] < swing_min)
    assert np.all(np.isnan(lean["swing_vpp"][~solved]))
    np.testing.assert_array_equal(lean["swing_vpp"][solved] >= swing_min, every["swing_vpp"][solved] >= swing_min)
    for key in every:
        if key != "swing_vpp":
            np.testing.assert_array_equal(lean[key], every[key], err_msg=key)
    for design in _one_per_kind():  # evaluate's hook on every stage model
        stage = get_topology(design.topology)
        k = TEMPERATURES.size
        at = replace(design.conditions, temperature=TEMPERATURES)
        three = {role: np.full(k, float(v)) for role, v in design.parts.items()}
        whole = stage.evaluate(three, design.device, at, full=False)
        some = stage.evaluate(three, design.device, at, full=False, swing_where=lambda r: np.array([True, False, True]))
        np.testing.assert_array_equal(some.metrics["swing_vpp"][[0, 2]], whole.metrics["swing_vpp"][[0, 2]])
        assert np.isnan(some.metrics["swing_vpp"][1])
