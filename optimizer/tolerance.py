"""Spread: worst-case corners and seeded Monte Carlo yield, vectorised across
candidates x samples.

What moves (common practice): every resistor and capacitor within its tolerance, the
transistor's hFE anywhere in the device's min..max, and the temperature over the spec's
range, with Vbe falling about 2 mV/K (carried by the device's saturation-current
temperature law) and hFE rising with temperature (``devices.hfe_temperature_factor``). Monte Carlo draws
parts uniformly within tolerance (the conservative choice for parts binned by tolerance),
hFE log-uniformly within min..max and the temperature uniformly over the range, from one
seed so a yield figure can be reproduced.
"""
from __future__ import annotations

import itertools
from dataclasses import replace
from typing import Callable

import numpy as np

from optimizer.devices import Device, hfe_temperature_factor
from optimizer.topologies.base import CHUNK_FAST, CHUNK_FULL, Conditions, Topology

TEMPERATURE_BINS = 5  # Monte Carlo temperatures are drawn from this many levels


def _evaluate_flat(topology: Topology, parts: dict[str, np.ndarray], device: Device,
                   conditions: Conditions, hfe: np.ndarray, full: bool = True) -> dict[str, np.ndarray]:
    """Evaluate arrays of shape (candidates, samples) by flattening them; metrics and
    ratings come back in the same 2-D shape."""
    shape = hfe.shape
    flat = {role: np.broadcast_to(v, shape).reshape(-1) for role, v in parts.items()}
    result = topology.evaluate(flat, device, conditions, hfe=hfe.reshape(-1), full=full)
    out = {k: np.asarray(v).reshape(shape) for k, v in result.metrics.items()}
    out.update({k: np.asarray(v).reshape(shape) for k, v in result.ratings.items()})
    out.update({k: np.asarray(v).reshape(shape) for k, v in result.operating_point.items()
                if k.startswith("v_") and k not in out})  # DC node voltages, for their spread
    out["active"] = np.asarray(result.operating_point["active"]).reshape(shape)
    return out


def worst_case(topology: Topology, parts: dict[str, np.ndarray], device: Device,
               conditions: Conditions, tolerances: dict[str, float],
               temperature_range: tuple[float, float]) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """(low, high) of every metric, rating and DC node voltage (v_base, ...) over all corners: each part at +-tolerance, hFE at
    min and max, temperature at both ends. Arrays over candidates."""
    roles = list(parts)
    signs = np.array(list(itertools.product((-1.0, 1.0), repeat=len(roles))))  # (corners, roles)
    lows: dict[str, np.ndarray] = {}
    highs: dict[str, np.ndarray] = {}
    for temperature in temperature_range:
        at_t = replace(conditions, temperature=float(temperature))
        for hfe_edge in (device.hfe_min, device.hfe_max):
            corner_parts = {
                role: np.asarray(parts[role], dtype=float)[:, None]
                * (1.0 + signs[None, :, j] * tolerances.get(role, 0.0))
                for j, role in enumerate(roles)
            }
            n = np.asarray(parts[roles[0]]).shape[0]
            hfe = np.full((n, signs.shape[0]), hfe_edge * hfe_temperature_factor(float(temperature)))
            metrics = _evaluate_flat(topology, corner_parts, device, at_t, hfe)
            for key, value in metrics.items():
                if value.dtype == bool:
                    continue
                lo, hi = np.nanmin(value, axis=1), np.nanmax(value, axis=1)
                lows[key] = lo if key not in lows else np.minimum(lows[key], lo)
                highs[key] = hi if key not in highs else np.maximum(highs[key], hi)
    return {key: (lows[key], highs[key]) for key in lows}


def monte_carlo_yield(topology: Topology, parts: dict[str, np.ndarray], device: Device,
                      conditions: Conditions, tolerances: dict[str, float],
                      temperature_range: tuple[float, float],
                      passes: Callable[[dict[str, np.ndarray]], np.ndarray],
                      samples: int = 1000, seed: int = 0, full: bool = False) -> np.ndarray:
    """Fraction of ``samples`` random builds of each candidate for which ``passes``
    (metrics and ratings of shape (candidates, samples) -> bool array) holds.

    By default the builds are judged on the fast core metrics (bias, gain, impedances,
    swing, current, ratings); the band corners and noise, which need ``full=True``, are
    covered by :func:`worst_case` instead.

    Each sample's temperature is one of TEMPERATURE_BINS levels, drawn uniformly; the builds
    of one level are drawn and judged in blocks of candidate rows that fit one evaluation
    chunk, so every block is one contiguous call (``passes`` sees a block of rows, all of
    that level's samples) and the working set stays small whatever the candidate count.
    """
    rng = np.random.default_rng(seed)
    values = {role: np.asarray(value, dtype=float).reshape(-1) for role, value in parts.items()}
    n = next(iter(values.values())).shape[0]
    levels = np.linspace(*temperature_range, TEMPERATURE_BINS)
    per_level = np.bincount(rng.integers(0, TEMPERATURE_BINS, samples), minlength=TEMPERATURE_BINS)
    log_hfe = (np.log(device.hfe_min), np.log(device.hfe_max))
    passed = np.zeros(n)
    for temperature, m in zip(levels, per_level):
        if m == 0:
            continue
        at_t = replace(conditions, temperature=float(temperature))
        hfe_factor = hfe_temperature_factor(float(temperature))
        rows = max(1, (CHUNK_FULL if full else CHUNK_FAST) // int(m))
        for i in range(0, n, rows):
            block = {}
            for role, v in values.items():
                tol = tolerances.get(role, 0.0)
                drawn = rng.uniform(1.0 - tol, 1.0 + tol, (v[i:i + rows].size, m))
                drawn *= v[i:i + rows, None]
                block[role] = drawn
            hfe = rng.uniform(*log_hfe, drawn.shape)
            np.exp(hfe, out=hfe)
            hfe *= hfe_factor
            result = topology.evaluate({r: d.reshape(-1) for r, d in block.items()}, device, at_t,
                                       hfe=hfe.reshape(-1), full=full)
            sample = {k: np.asarray(v).reshape(drawn.shape) for k, v in result.metrics.items()}
            sample.update({k: np.asarray(v).reshape(drawn.shape) for k, v in result.ratings.items()})
            sample["active"] = np.asarray(result.operating_point["active"]).reshape(drawn.shape)
            passed[i:i + rows] += np.count_nonzero(passes(sample) & sample["active"], axis=1)
    return passed / samples
