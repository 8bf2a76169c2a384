"""Capacitor sizing after the resistors: the smallest series values that keep the
whole stage's low -3 dB point at or below the spec, found jointly for all capacitors.

Each capacitor alone sets a corner f_j = K_j / C_j (K_j found numerically from the
stage's own response with the other capacitors made very large). The capacitors are
then scaled together, C_j = m * K_j / f_target, with the smallest common factor m that
still meets the target once every value is rounded up to the series; a last pass steps
each capacitor down one value where the target still holds. All candidates at once.
"""
from __future__ import annotations

import numpy as np

from optimizer.devices import Device
from optimizer.physics import SWEEP
from optimizer.topologies.base import Conditions, Topology

_LARGE_CAPACITANCE = 1.0  # F: "a short" at audio frequencies for the corner probe
_PROBE_VALUES = (1e-6, 1e-8, 1e-10, 1e-4)  # F, tried in turn for each capacitor's own corner
_SCALE_GRID = np.geomspace(1.0, 16.0, 25)  # common factors m tried, ascending


def _f_low(topology: Topology, parts: dict[str, np.ndarray], device: Device,
           conditions: Conditions) -> np.ndarray:
    return np.asarray(topology.evaluate(parts, device, conditions, full=True).metrics["f_low"])


def _round_up(values: np.ndarray, allowed: np.ndarray) -> np.ndarray:
    """Index of the smallest allowed value >= each value (clipped to the largest)."""
    return np.minimum(np.searchsorted(allowed, values * (1 - 1e-9)), allowed.size - 1)


def size_capacitors(topology: Topology, resistors: dict[str, np.ndarray], device: Device,
                    conditions: Conditions, allowed: np.ndarray,
                    f_low_target: float | None = None) -> dict[str, np.ndarray]:
    """Capacitor values (F) for every candidate, from the sorted ``allowed`` values.

    ``resistors`` maps role -> array over candidates. The target defaults to the low
    edge of ``conditions.band``. Where even the largest values miss the target, the
    largest are returned (the scoring then reports the low corner as violated).
    """
    target = conditions.band[0] if f_low_target is None else f_low_target
    allowed = np.sort(np.asarray(allowed, dtype=float))
    size = np.broadcast(*resistors.values()).shape
    large = {c: np.full(size, _LARGE_CAPACITANCE) for c in topology.capacitors}

    corner_constant = {}
    for cap in topology.capacitors:
        constant = np.full(size, np.nan)
        for probe_value in _PROBE_VALUES:  # until the probe's corner lies inside the sweep
            probe = {**resistors, **large, cap: np.full(size, probe_value)}
            f = _f_low(topology, probe, device, conditions)
            inside = (f > 2.0 * SWEEP[0]) & (f < 0.5 * SWEEP[1]) & np.isnan(constant)
            constant = np.where(inside, f * probe_value, constant)
        corner_constant[cap] = np.nan_to_num(constant, nan=allowed[-1] * target)

    best = {c: np.full(size, allowed.size - 1) for c in topology.capacitors}
    found = np.zeros(size, dtype=bool)
    for m in _SCALE_GRID:
        index = {c: _round_up(m * corner_constant[c] / target, allowed) for c in topology.capacitors}
        trial = {**resistors, **{c: allowed[i] for c, i in index.items()}}
        meets = (_f_low(topology, trial, device, conditions) <= target) & ~found
        for c in topology.capacitors:
            best[c] = np.where(meets, index[c], best[c])
        found |= meets
        if found.all():
            break

    for cap in topology.capacitors:  # one step down each, where the target still holds
        lower = np.maximum(best[cap] - 1, 0)
        trial = {**resistors, **{c: allowed[i] for c, i in best.items()}, cap: allowed[lower]}
        ok = found & (_f_low(topology, trial, device, conditions) <= target)
        best[cap] = np.where(ok, lower, best[cap])
    return {c: allowed[i] for c, i in best.items()}
