"""Constraints from a spec: every hard limit as a normalised violation (0 = met).

A violation of 0.1 means "10 % past the limit" (for the gain, 10 % of the tolerance
band past its edge), so limits of different units can be compared and summed when
ranking designs that meet none of them. Ratings are hard limits too: a part run past its
rating is never a silent pass. Arrays over candidates throughout.
"""

from __future__ import annotations

from typing import Mapping

import numpy as np

from optimizer.catalog import VALUE_RTOL
from optimizer.devices import AnyDevice
from optimizer.metrics import LIMIT_METRICS
from optimizer.spec import Spec
from optimizer.topologies.base import Conditions

FULL_MODEL_LIMITS = ("noise_ein_max", "psrr_min_db")
LOOP_LIMITS = ("phase_margin_min_deg",)  # judged only where the stage has an overall loop (metric not NaN)
# each optional spec limit (limit name, metric, +1 min / -1 max) is in optimizer/metrics.py; besides the
# band corners, noise_ein_max and psrr_min_db need the full=True metrics
# Derating (common practice, no single source): thick-film chip resistors carry full power to
# 70 °C ambient and nothing at 155 °C; capacitors are used to 80 % of their rated voltage;
# a small-signal transistor's dissipation falls linearly from 25 °C to its 150 °C junction limit.
RESISTOR_FULL_POWER_C, RESISTOR_ZERO_POWER_C = 70.0, 155.0
CAPACITOR_VOLTAGE_DERATING = 0.8
TRANSISTOR_DERATE_FROM_C, TRANSISTOR_TJ_MAX_C = 25.0, 150.0
SATURATION_FLOOR = 0.1  # least violation of a saturated stage (graded up by its Vce shortfall)
NEAR_RATING = 0.5  # a part past half its rating gets a caution (common practice derating)
# The mid-band figures (gain, impedances, swing, distortion) take the coupling and bypass capacitors
# as shorts and the junction capacitances as open. The sizing keeps the capacitors' cost at the
# band's centre within 1 % (sizing.MIDBAND_LOSS); a design whose whole response there is further
# than this from its mid-band gain (capacitors searched or given too small, or a high corner too
# near) violates the "midband" limit.
MIDBAND_DEVIATION_MAX = 0.02


def capacitor_rating_wanted(spec: Spec) -> float:
    """The least voltage rating (V) that keeps a capacitor across the spec's highest supply
    within its derated limit (CAPACITOR_VOLTAGE_DERATING). Each capacitor value's catalog part
    is the cheapest rated for it where the catalog stocks one (one rating covering the board's
    highest rail: common practice), not the cheapest of any rating."""
    return max(spec.supply, spec.supply_max or 0.0) / CAPACITOR_VOLTAGE_DERATING


def conditions_from_spec(spec: Spec, temperature: float = 27.0) -> Conditions:
    """The operating conditions of a spec at one temperature (°C)."""
    level = spec.limits.thd_level if spec.limits.thd_level is not None else 1.0
    return Conditions(
        supply=spec.supply,
        source_impedance=spec.source_impedance,
        load_impedance=spec.load_impedance,
        band=tuple(spec.band),
        temperature=temperature,
        load_capacitance=spec.load_capacitance,
        signal_vpp=level,
        supply_max=spec.supply_max,
        ripple_frequency=spec.supply_ripple.frequency if spec.supply_ripple else 100.0,
        below_ground=spec.supply_below_ground,
    )


def capacitor_low_edge(capacitor_tolerances: np.ndarray) -> float:
    """A capacitor's value at its low tolerance edge, as a share of its value: 1 less the
    largest tolerance of the allowed capacitors (the margin the sizing keeps)."""
    return 1.0 - float(np.max(capacitor_tolerances, initial=0.0))


def sizing_target(spec: Spec, capacitor_tolerances: np.ndarray) -> float:
    """Low corner (Hz) the capacitors are sized for: the band's low edge less the largest
    capacitor tolerance, so the corner stays in band with every capacitor at its low edge."""
    return float(spec.band[0] * capacitor_low_edge(capacitor_tolerances))


def decoupling_target(spec: Spec, capacitor_tolerances: np.ndarray) -> float | None:
    """Supply rejection (dB) c_decouple is sized for: the spec's least rejection plus the margin
    that keeps it with the capacitor at its low edge (rejection above the RC corner grows with C)."""
    if spec.limits.psrr_min_db is None:
        return None
    low_edge = capacitor_low_edge(capacitor_tolerances)
    return float(spec.limits.psrr_min_db - 20.0 * np.log10(max(low_edge, 1e-3)))


def resistor_derating(ambient_c: float) -> float:
    """Fraction of a resistor's rated power usable at ``ambient_c`` (°C)."""
    return float(
        np.clip((RESISTOR_ZERO_POWER_C - ambient_c) / (RESISTOR_ZERO_POWER_C - RESISTOR_FULL_POWER_C), 0.0, 1.0)
    )


def transistor_derating(ambient_c: float) -> float:
    """Fraction of a transistor's rated dissipation usable at ``ambient_c`` (°C)."""
    return float(
        np.clip((TRANSISTOR_TJ_MAX_C - ambient_c) / (TRANSISTOR_TJ_MAX_C - TRANSISTOR_DERATE_FROM_C), 0.0, 1.0)
    )


def rating_limits(
    spec: Spec,
    resistor_ratings: dict[str, float | np.ndarray],
    capacitor_ratings: dict[str, float | np.ndarray],
    device: AnyDevice,
) -> dict[str, float | np.ndarray]:
    """The derated limit of every rating a topology reports: p_<resistor> (W, the part's rating
    derated to the spec's highest ambient), v_<capacitor> (V, 80 % of the rated voltage),
    vce_max (V, the device's Vceo) and q_power (W, the device's dissipation derated to the
    highest ambient). Ratings of absent parts are left out by the caller."""
    ambient = float(spec.temperature[1])
    out: dict[str, float | np.ndarray] = {
        f"p_{r}": np.asarray(v, dtype=float) * resistor_derating(ambient) for r, v in resistor_ratings.items()
    }
    out.update(
        {f"v_{c}": np.asarray(v, dtype=float) * CAPACITOR_VOLTAGE_DERATING for c, v in capacitor_ratings.items()}
    )
    out.update({"vce_max": device.vceo_max, "q_power": device.p_max * transistor_derating(ambient)})
    return out


def gain_error_db(spec: Spec, gain: np.ndarray) -> np.ndarray:
    """Gain magnitude error against the spec's target (dB, signed)."""
    return 20.0 * np.log10(np.maximum(np.abs(gain), 1e-12) / spec.gain.target)


VIOLATION_CAP = 1e6  # the largest normalised violation of one limit (a missing figure's)


def _above(value: np.ndarray, minimum: float | np.ndarray) -> np.ndarray:
    """The normalised shortfall of ``value`` under ``minimum`` (0 where met, VIOLATION_CAP where
    there is no figure: NaN)."""
    value = np.asarray(value, dtype=float)  # numpy's division (a Python float would raise at 0)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        short = (minimum - value) / minimum
    return np.minimum(np.maximum(np.where(np.isnan(value), VIOLATION_CAP, short), 0.0), VIOLATION_CAP)


def _below(value: np.ndarray, maximum: float | np.ndarray) -> np.ndarray:
    """The normalised excess of ``value`` over ``maximum`` (0 where met, VIOLATION_CAP where there
    is no figure: NaN). A maximum of 0 (a rating derated to nothing at the spec's highest
    ambient) is violated by any value above it, as far as a violation goes, and met by 0."""
    value = np.asarray(value, dtype=float)  # numpy's division (a Python float would raise at 0)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        excess = (value - maximum) / maximum
    excess = np.where(np.isnan(value), VIOLATION_CAP, excess)  # 0/0 (a 0 against a maximum of 0): met
    return np.minimum(np.fmax(excess, 0.0, out=excess), VIOLATION_CAP, out=excess)


def limit_violations(
    spec: Spec,
    metrics: dict[str, np.ndarray],
    ratings: dict[str, np.ndarray],
    rating_limits: dict[str, float | np.ndarray],
    active: np.ndarray,
    *,
    core_only: bool = False,
    vce_headroom: np.ndarray | None = None,
) -> dict[str, np.ndarray]:
    """Normalised violation of every hard limit (name -> array, 0 where met).

    ``rating_limits`` maps each rating key of the topology (p_<resistor> W,
    v_<capacitor> V) and ``vce_max`` / ``q_power`` to the part's or device's limit.
    ``core_only`` leaves out the limits that need the full model (band corners and
    noise), for metrics from the fast core path. ``vce_headroom`` (V, the smallest Vce less
    the saturation voltage and active margin, negative when saturated) grades the violation
    of a saturated stage by how far it is from active, so a search is led out of saturation;
    without it, or for any other reason a stage is not active, the violation is 1.
    """
    gain = np.asarray(metrics["gain"])
    out = {"gain": np.maximum(0.0, np.abs(gain_error_db(spec, gain)) - spec.gain.tolerance_db) / spec.gain.tolerance_db}
    if spec.gain.inverting is not None:
        wrong_sign = (gain > 0) if spec.gain.inverting else (gain < 0)
        out["gain_polarity"] = wrong_sign.astype(float)
    inactive = ~np.asarray(active, dtype=bool)
    if vce_headroom is None:
        out["active"] = inactive.astype(float)
    else:
        shortfall = np.nan_to_num(-np.asarray(vce_headroom, dtype=float) / spec.supply, nan=np.inf)
        depth = np.maximum(shortfall, 0.0)
        graded = np.where(shortfall > 0, SATURATION_FLOOR + depth / (1.0 + depth), 1.0)  # rises without a cap
        out["active"] = np.where(inactive, graded, 0.0)
    if not core_only:
        out["band_low"] = _below(metrics["f_low"], spec.band[0])
        out["band_high"] = _above(metrics["f_high"], spec.band[1])
        # a design without the figure, or not active (whose small-signal figures mean nothing), is
        # judged by the other limits
        deviation = np.nan_to_num(np.asarray(metrics.get("midband_deviation", np.nan), dtype=float), nan=0.0)
        deviation = np.where(inactive, 0.0, deviation)
        out["midband"] = _below(deviation, MIDBAND_DEVIATION_MAX)
    limits = spec.limits
    for limit_name, metric, sign in LIMIT_METRICS:
        judge = _above if sign > 0 else _below
        limit = getattr(limits, limit_name)
        if limit is not None and not (core_only and limit_name in FULL_MODEL_LIMITS):
            value = np.asarray(metrics[metric] if metric in metrics else np.full(gain.shape, np.nan))
            if limit_name in LOOP_LIMITS:
                value = np.where(np.isnan(value), limit, value)
            out[limit_name] = judge(value, limit)
    for key, limit in rating_limits.items():
        value = metrics["q_power"] if key == "q_power" else ratings[key]
        out[f"rating:{key}"] = _below(np.abs(np.asarray(value)), limit)
    return out


#: metrics that describe small-signal behaviour about an operating point: meaningless when the
#: transistor is saturated or cut off there, so such a design reports none of them
SMALL_SIGNAL_METRICS = (
    "gain",
    "gain_db",
    "gain_error_db",
    "input_impedance",
    "output_impedance",
    "swing_vpp",
    "clip_vpp",
    "thd",
    "f_low",
    "f_high",
    "midband_deviation",
    "noise_ein_v",
    "noise_figure_db",
    "psrr_db",
    "psrr_ripple_db",
    "psrr_mid_db",
)
NOT_ACTIVE_NOTE = "transistor saturated or cut off at the operating point: no small-signal figures"


def withhold_small_signal(record: dict) -> None:
    """Replace a not-active design's small-signal metrics by None and say why (``note``)."""
    for key in SMALL_SIGNAL_METRICS:
        if key in record["metrics"]:
            record["metrics"][key] = None
    record["note"] = NOT_ACTIVE_NOTE


def total_violation(violations: dict[str, np.ndarray]) -> np.ndarray:
    """Sum of normalised violations (0 = feasible)."""
    return np.sum(np.stack(list(violations.values())), axis=0)


def meets_every_limit(violations: dict[str, np.ndarray]) -> np.ndarray:
    """True where every violation is 0: ``total_violation(violations) == 0`` (each violation is 0
    or more, or NaN), without stacking them (a Monte Carlo screen asks it of every build)."""
    values = iter(violations.values())
    worst = np.array(next(values), dtype=float)
    for v in values:
        np.maximum(worst, v, out=worst)  # NaN kept: it meets nothing, as in the sum
    return worst == 0


def binding_limit(violations: dict[str, np.ndarray]) -> np.ndarray:
    """Name of the most violated limit per candidate ('' where all are met); 'active' wherever
    the stage is not active, whatever else it misses (figures about a saturated or cut-off bias
    mean nothing: the bias is what to mend first)."""
    names = np.array(list(violations))
    stacked = np.stack([np.asarray(v, dtype=float) for v in violations.values()])
    worst = names[np.argmax(stacked, axis=0)]
    if "active" in violations:
        worst = np.where(np.asarray(violations["active"]) > 0, "active", worst)
    return np.where(stacked.max(axis=0) > 0, worst, "")


def near_ratings(
    ratings: dict[str, np.ndarray], metrics: dict[str, np.ndarray], rating_limits: dict[str, float | np.ndarray]
) -> dict[str, np.ndarray]:
    """Fraction of its rating each part runs at, where past NEAR_RATING (for cautions)."""
    out = {}
    for key, limit in rating_limits.items():
        value = metrics["q_power"] if key == "q_power" else ratings[key]
        with np.errstate(divide="ignore", invalid="ignore"):  # a limit of 0: inf (derated to nothing)
            fraction = np.abs(np.asarray(value)) / limit
        if np.any(fraction > NEAR_RATING):
            out[key] = fraction
    return out


# --- desirability: the ranking among designs that meet every hard limit ---------------------
#
# score = weighted geometric mean of terms in (0, 1], each 1 at its ideal:
#   gain        1 - 0.5 * |gain error| / tolerance            (0.5 at the tolerance edge)   weight 2
#   margin      0.5 + 0.5 * min over set limits of margin/50 % (clipped to 0..1)            weight 1
#   objective   per spec objective, ref/(ref + x) to minimise, x/(x + ref) to maximise,
#               with ref the spec's own limit where it sets one (OBJECTIVE_REFERENCES)       weight 2 each
#   parts       8 / (8 + part_count)                                                        weight 0.5
#   reuse       4 / (4 + unique_values)                          weight 1 with prefer_reuse, else 0.25
#   cost        1 / (1 + cost)   (cost in the catalog's currency)                            weight 0.5
# Designs that miss a limit score -(total normalised violation) instead, so every feasible
# design ranks above every infeasible one and, among infeasible ones, the nearest miss first.
# The shortlist's Monte Carlo yield then multiplies the score (search/ranking.py).

#: metric -> (spec limit whose value is the reference, fallback reference in SI units)
OBJECTIVE_REFERENCES = {
    "supply_current": ("supply_current_max", 1e-3),
    "swing_vpp": ("swing_min", None),
    "noise_ein_v": ("noise_ein_max", 1e-6),
    "thd": ("thd_max", 0.01),
    "cost": (None, 1.0),
    "part_count": (None, 8.0),
    "input_impedance": ("input_impedance_min", None),
    "output_impedance": ("output_impedance_max", None),
    "gain_error_db": (None, None),
}
WEIGHT_GAIN, WEIGHT_MARGIN, WEIGHT_OBJECTIVE = 2.0, 1.0, 2.0
WEIGHT_PARTS, WEIGHT_COST = 0.5, 0.5
WEIGHT_REUSE, WEIGHT_REUSE_PREFERRED = 0.25, 1.0
MARGIN_FULL = 0.5  # a 50 % margin to every limit counts as fully comfortable


def _objective_reference(spec: Spec, metric: str) -> float:
    limit_name, fallback = OBJECTIVE_REFERENCES[metric]
    limit = getattr(spec.limits, limit_name) if limit_name else None
    if limit is not None:
        return float(limit)
    if fallback is not None:
        return fallback
    return {
        "swing_vpp": 0.5 * spec.supply,
        "input_impedance": max(10.0 * spec.source_impedance, 1e4),
        "output_impedance": max(0.1 * spec.load_impedance, 1.0),
        "gain_error_db": spec.gain.tolerance_db,
    }[metric]


#: the requirements every spec sets: the gain window and the band (the rest are its optional limits)
BASE_REQUIREMENTS = ("gain_tolerance", "band_low", "band_high")


def requirements(spec: Spec) -> list[tuple[str, str, int, float]]:
    """Each requirement the spec sets: (name, metric, +1 at least / -1 at most, limit in SI). The gain
    is judged by its error against the tolerance (|gain_error_db|, dB), the band by its -3 dB corners (Hz)."""
    rows = [
        ("gain_tolerance", "gain_error_db", -1, spec.gain.tolerance_db),
        ("band_low", "f_low", -1, spec.band[0]),
        ("band_high", "f_high", +1, spec.band[1]),
    ]
    return rows + [
        (name, metric, sign, getattr(spec.limits, name))
        for name, metric, sign in LIMIT_METRICS
        if getattr(spec.limits, name) is not None
    ]


def requirement_margins(
    spec: Spec, metrics: Mapping[str, object], *, limits_only: bool = False
) -> list[tuple[str, str, int, float, np.ndarray, np.ndarray]]:
    """(name, metric, sign, limit, value, margin) of each requirement: the value judged (NaN where the
    design has no figure) and the relative margin, sign * (value - limit) / limit (>= 0: met). Arrays
    over candidates, or 0-d for one design. ``limits_only``: the spec's optional limits alone."""
    out = []
    for name, metric, sign, limit in requirements(spec):
        if limits_only and name in BASE_REQUIREMENTS:
            continue
        raw = metrics.get(metric)
        value = np.asarray(np.nan if raw is None else raw, dtype=float)
        if name == "gain_tolerance":
            value = np.abs(value)
        margin = sign * (value - limit) / limit
        if name in LOOP_LIMITS:  # a stage without the loop has no figure and no margin to keep
            margin = np.where(np.isnan(value), np.inf, margin)
        out.append((name, metric, sign, limit, value, margin))
    return out


def limit_margins(spec: Spec, metrics: Mapping[str, np.ndarray]) -> np.ndarray:
    """Smallest relative margin to any of the spec's optional limits (inf where it sets none; a
    metric without a figure counts as no margin)."""
    margin = np.full(np.asarray(metrics["gain"]).shape, np.inf)
    for *_, row_margin in requirement_margins(spec, metrics, limits_only=True):
        margin = np.minimum(margin, np.nan_to_num(row_margin, nan=0.0))
    return margin


def limit_table(spec: Spec, metrics: Mapping[str, float | None]) -> list[dict]:
    """Each requirement the spec sets, for one design: the metric, its value and the limit (SI),
    ``kind`` "min" or "max", and the relative ``margin`` (>= 0: met; None where there is no figure)."""
    return [
        {
            "limit": name,
            "metric": metric,
            "kind": "min" if sign > 0 else "max",
            "limit_value": float(limit),
            "value": float(value),
            "margin": float(margin) if np.isfinite(margin) else None,
        }
        for name, metric, sign, limit, value, margin in requirement_margins(spec, metrics)
        if not (name in LOOP_LIMITS and np.all(np.isnan(value)))
    ]  # no loop: not judged


def desirability_terms(spec: Spec, metrics: dict[str, np.ndarray]) -> dict[str, tuple[np.ndarray, float]]:
    """Each term of the documented score above: name -> (value in (0, 1] per candidate, weight).
    Objective terms are named after their metric."""
    gain_err = np.abs(np.asarray(metrics["gain_error_db"], dtype=float))
    terms = {
        "gain": (1.0 - 0.5 * np.clip(gain_err / spec.gain.tolerance_db, 0.0, 1.0), WEIGHT_GAIN),
        "margin": (0.5 + 0.5 * np.clip(limit_margins(spec, metrics), 0.0, MARGIN_FULL) / MARGIN_FULL, WEIGHT_MARGIN),
        "parts": (8.0 / (8.0 + np.asarray(metrics["part_count"], dtype=float)), WEIGHT_PARTS),
        "reuse": (
            4.0 / (4.0 + np.asarray(metrics["unique_values"], dtype=float)),
            WEIGHT_REUSE_PREFERRED if spec.parts.prefer_reuse else WEIGHT_REUSE,
        ),
        "cost": (1.0 / (1.0 + np.asarray(metrics["cost"], dtype=float)), WEIGHT_COST),
    }
    for metric, direction in spec.objective_directions:
        x = np.abs(np.nan_to_num(np.asarray(metrics[metric], dtype=float), nan=np.inf))
        ref = _objective_reference(spec, metric)
        with np.errstate(invalid="ignore"):
            d = ref / (ref + x) if direction == "minimise" else np.where(np.isfinite(x), x / (x + ref), 0.0)
        terms[metric] = (d, WEIGHT_OBJECTIVE)
    return terms


def desirability(
    spec: Spec,
    metrics: dict[str, np.ndarray],
    violation: np.ndarray,
    terms: dict[str, tuple[np.ndarray, float]] | None = None,
) -> np.ndarray:
    """The documented score above: in (0, 1] where ``violation`` is 0, else -violation."""
    terms = desirability_terms(spec, metrics) if terms is None else terms
    weights = sum(w for _, w in terms.values())
    with np.errstate(divide="ignore"):
        log_score = sum(w * np.log(np.clip(d, 1e-12, 1.0)) for d, w in terms.values()) / weights
    return np.where(violation > 0, -violation, np.exp(log_score))


def pareto_mask(values: np.ndarray, directions: list[str], *, chunk: int = 512) -> np.ndarray:
    """Which rows of ``values`` (points, objectives) are non-dominated (rows with NaN never are).

    One or two objectives: a sort and a running minimum, O(n log n); more: chunked pairwise.
    """
    signed = np.asarray(values, dtype=float).reshape(len(values), len(directions))
    signed = signed * np.array([1.0 if d == "minimise" else -1.0 for d in directions])
    ok = np.flatnonzero(np.all(np.isfinite(signed), axis=1))
    mask = np.zeros(len(signed), dtype=bool)
    rows = signed[ok]
    if not rows.size:
        return mask
    k = rows.shape[1]
    if k == 1:
        mask[ok] = rows[:, 0] == rows[:, 0].min()
    elif k == 2:
        # unique rows come sorted by (first, second); a group is dominated when an earlier group
        # reaches its second objective or better (an equal first needs a strictly better second,
        # which the lexicographic order already gives)
        unique, inverse = np.unique(rows, axis=0, return_inverse=True)
        best_before = np.concatenate([[np.inf], np.minimum.accumulate(unique[:-1, 1])])
        mask[ok] = ~(best_before <= unique[:, 1])[np.ravel(inverse)]
    else:
        dominated = np.zeros(len(rows), dtype=bool)
        for i in range(0, len(rows), chunk):
            block = rows[i : i + chunk]
            no_worse = np.all(rows[None, :, :] <= block[:, None, :], axis=2)
            better = np.any(rows[None, :, :] < block[:, None, :], axis=2)
            dominated[i : i + chunk] = np.any(no_worse & better, axis=1)
        mask[ok] = ~dominated
    return mask


def unique_values_array(parts: dict[str, np.ndarray]) -> np.ndarray:
    """Distinct resistor and capacitor values per candidate (vectorised over a leading axis).

    Roles starting with ``c_`` are capacitors, other non-``q`` roles resistors; a value of 0
    (an optional part left out) is not a part and does not count.
    """
    groups: dict[str, list[np.ndarray]] = {"r": [], "c": []}
    for role, values in parts.items():
        if role.startswith("q"):
            continue
        groups["c" if role.startswith("c_") else "r"].append(np.atleast_1d(np.asarray(values, dtype=float)))
    count: np.ndarray | int = 0
    for arrays in groups.values():
        if not arrays:
            continue
        v = np.sort(np.stack(np.broadcast_arrays(*arrays), axis=-1), axis=-1)
        present = v > 0
        new = np.ones_like(present)
        new[..., 1:] = ~np.isclose(v[..., 1:], v[..., :-1], rtol=VALUE_RTOL, atol=0)
        count = count + (present & new).sum(axis=-1)
    return np.asarray(count)


def unique_values(parts: dict[str, float]) -> int:
    """Distinct resistor and capacitor values of one design (0 = absent part, not counted)."""
    return int(unique_values_array({k: np.array([v], dtype=float) for k, v in parts.items()})[0])
