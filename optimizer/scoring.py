"""Constraints from a spec: every hard limit as a normalised violation (0 = met).

A violation of 0.1 means "10 % past the limit" (for the gain, 10 % of the tolerance
band past its edge), so limits of different units can be compared and summed when
ranking designs that meet none of them. Ratings are hard limits too: a part run past its
rating is never a silent pass. Arrays over candidates throughout.
"""
from __future__ import annotations

import numpy as np

from optimizer.spec import Spec
from optimizer.topologies.base import Conditions

FULL_MODEL_LIMITS = ("noise_ein_max",)  # besides the band corners, need full=True metrics
NEAR_RATING = 0.5  # a part past half its rating gets a caution (common practice derating)


def conditions_from_spec(spec: Spec, temperature: float = 27.0) -> Conditions:
    """The operating conditions of a spec at one temperature (°C)."""
    level = spec.limits.thd_level if spec.limits.thd_level is not None else 1.0
    return Conditions(supply=spec.supply, source_impedance=spec.source_impedance,
                      load_impedance=spec.load_impedance, band=tuple(spec.band),
                      temperature=temperature, load_capacitance=spec.load_capacitance,
                      signal_vpp=level)


def gain_error_db(spec: Spec, gain: np.ndarray) -> np.ndarray:
    """Gain magnitude error against the spec's target (dB, signed)."""
    return 20.0 * np.log10(np.maximum(np.abs(gain), 1e-12) / spec.gain.target)


def _above(value: np.ndarray, minimum: float) -> np.ndarray:
    return np.maximum(0.0, (minimum - np.nan_to_num(value, nan=-np.inf)) / minimum).clip(max=1e6)


def _below(value: np.ndarray, maximum: float) -> np.ndarray:
    return np.maximum(0.0, (np.nan_to_num(value, nan=np.inf) - maximum) / maximum).clip(max=1e6)


def limit_violations(spec: Spec, metrics: dict[str, np.ndarray], ratings: dict[str, np.ndarray],
                     rating_limits: dict[str, float | np.ndarray],
                     active: np.ndarray, *, core_only: bool = False) -> dict[str, np.ndarray]:
    """Normalised violation of every hard limit (name -> array, 0 where met).

    ``rating_limits`` maps each rating key of the topology (p_<resistor> W,
    v_<capacitor> V) and ``vce_max`` / ``q_power`` to the part's or device's limit.
    ``core_only`` leaves out the limits that need the full model (band corners and
    noise), for metrics from the fast core path.
    """
    gain = np.asarray(metrics["gain"])
    out = {"gain": np.maximum(0.0, np.abs(gain_error_db(spec, gain)) - spec.gain.tolerance_db)
           / spec.gain.tolerance_db}
    if spec.gain.inverting is not None:
        wrong_sign = (gain > 0) if spec.gain.inverting else (gain < 0)
        out["gain_polarity"] = wrong_sign.astype(float)
    out["active"] = (~np.asarray(active, dtype=bool)).astype(float)
    if not core_only:
        out["band_low"] = _below(metrics["f_low"], spec.band[0])
        out["band_high"] = _above(metrics["f_high"], spec.band[1])
    limits = spec.limits
    pairs = [("input_impedance_min", "input_impedance", _above),
             ("output_impedance_max", "output_impedance", _below),
             ("swing_min", "swing_vpp", _above),
             ("supply_current_max", "supply_current", _below),
             ("thd_max", "thd", _below),
             ("noise_ein_max", "noise_ein_v", _below)]
    for limit_name, metric, judge in pairs:
        limit = getattr(limits, limit_name)
        if limit is not None and not (core_only and limit_name in FULL_MODEL_LIMITS):
            out[limit_name] = judge(np.asarray(metrics[metric]), limit)
    for key, limit in rating_limits.items():
        value = metrics["q_power"] if key == "q_power" else ratings[key]
        out[f"rating:{key}"] = _below(np.abs(np.asarray(value)), limit)
    return out


def total_violation(violations: dict[str, np.ndarray]) -> np.ndarray:
    """Sum of normalised violations (0 = feasible)."""
    return np.sum(np.stack(list(violations.values())), axis=0)


def binding_limit(violations: dict[str, np.ndarray]) -> np.ndarray:
    """Name of the most violated limit per candidate ('' where all are met)."""
    names = np.array(list(violations))
    stacked = np.stack(list(violations.values()))
    worst = names[np.argmax(stacked, axis=0)]
    return np.where(stacked.max(axis=0) > 0, worst, "")


def near_ratings(ratings: dict[str, np.ndarray], metrics: dict[str, np.ndarray],
                 rating_limits: dict[str, float | np.ndarray]) -> dict[str, np.ndarray]:
    """Fraction of its rating each part runs at, where past NEAR_RATING (for cautions)."""
    out = {}
    for key, limit in rating_limits.items():
        value = metrics["q_power"] if key == "q_power" else ratings[key]
        fraction = np.abs(np.asarray(value)) / limit
        if np.any(fraction > NEAR_RATING):
            out[key] = fraction
    return out
