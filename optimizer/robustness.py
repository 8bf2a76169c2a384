"""Judging designs on the spec's robustness basis: nominal, every corner, or Monte Carlo yield.

One function, :func:`judge`, is used by the search (every trial, on the fast core metrics
with a small screening set of builds), by the full assessment of a ranked design (the
complete metrics and FINAL_BUILDS builds) and by the exhaustive oracle, so the three agree
on what "meets the spec" means:

- ``nominal``: every hard limit at nominal part values, typical hFE, nominal supply and
  temperature (must be asked for).
- ``worst_case``: every hard limit at every corner (each part at its tolerance edges, hFE at
  min and max, temperature and supply at both ends of their ranges).
- ``yield`` (default): every hard limit at nominal, and all of them together in at least
  ``limits.yield_min`` of the seeded Monte Carlo builds (tolerance.Builds). Inside the search
  the builds are judged on the fast core metrics; a ranked design's full assessment judges
  them on every limited metric (band corners included, noise and supply rejection where the
  spec limits them).

The robustness shortfall is a limit like the others (``yield``, or the corner values of
each limit), so the search is led toward robust designs by the same summed violation.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from optimizer import scoring
from optimizer.devices import AnyDevice
from optimizer.spec import Spec
from optimizer.tolerance import Tolerance, bias_spread, monte_carlo_yield, worst_case
from optimizer.topologies.base import Conditions, Topology

BUILDS_SEED = 20261203  # the builds every design is judged on: fixed, so a verdict does not depend on the search seed
SCREEN_BUILDS = 100  # builds per design inside the search (the yield must hold on these too)
FINAL_BUILDS = 2000  # builds of a ranked design's full assessment


@dataclass
class Judgement:
    """Violations (limit -> normalised excess over candidates, robustness included), the
    yield (fraction; NaN unless the basis is yield) with its number of builds, the bias
    spread (tolerance.bias_spread) and, where the basis judged every corner of every part
    (worst_case, ``full``), those corners' ranges (tolerance.worst_case's; None otherwise)."""

    violations: dict[str, np.ndarray]
    yield_fraction: np.ndarray
    builds: int
    spread: dict[str, np.ndarray]
    corners: dict[str, tuple[np.ndarray, np.ndarray]] | None = None


def basis_label(spec: Spec, feasible: bool, yield_fraction: float | None, builds: int) -> dict:
    """The candidate's ``basis`` block: the kind, whether it is met, and a sentence saying so."""
    kind = spec.robustness
    if kind == "yield":
        have = (
            ""
            if yield_fraction is None or not np.isfinite(yield_fraction)
            else f"{100 * yield_fraction:.3g} % of {builds:,} builds"
        )
        if feasible:
            label = f"meets every limit in {have}"
        else:
            label = (
                f"misses the spec: every limit holds in {have}, the spec asks {100 * spec.limits.yield_min:.3g} %"
                if have
                else "misses the spec at nominal values"
            )
    elif kind == "worst_case":
        label = "meets every limit at all corners" if feasible else "misses a limit at some corner"
    else:
        label = (
            "meets every limit at nominal values only (robustness: nominal)"
            if feasible
            else "misses a limit at nominal values"
        )
    return {"kind": kind, "met": bool(feasible), "label": label}


def _corner_violations(
    spec: Spec, spread: dict[str, tuple[np.ndarray, np.ndarray]], limits: dict[str, float | np.ndarray], core_only: bool
) -> dict[str, np.ndarray]:
    """Each limit judged at its adverse corner: minimum limits at the low end, maximum limits and
    ratings at the high end, the gain window at both."""
    low = {k: lo for k, (lo, _) in spread.items()}
    high = {k: hi for k, (_, hi) in spread.items()}
    ratings = {k: np.maximum(np.abs(lo), np.abs(hi)) for k, (lo, hi) in spread.items()}
    active = spread["active_all"][0]
    a = scoring.limit_violations(spec, low, ratings, limits, active, core_only=core_only)
    b = scoring.limit_violations(spec, high, ratings, limits, active, core_only=core_only)
    return {k: np.maximum(a[k], b[k]) for k in a}


def judge(
    spec: Spec,
    topology: Topology,
    parts: dict[str, np.ndarray],
    device: AnyDevice,
    conditions: Conditions,
    tolerances: dict[str, Tolerance],
    limits: dict[str, float | np.ndarray],
    nominal_violations: dict[str, np.ndarray],
    *,
    full: bool,
    builds: int,
    basis: str | None = None,
    seed: int | None = None,
) -> Judgement:
    """Violations of ``parts`` (arrays over candidates) on the spec's robustness basis (or
    ``basis``), given the violations at nominal. ``full=False`` judges spread
    on the fast core metrics (the search's screen), ``full=True`` on every metric. The builds
    come from ``seed`` (default BUILDS_SEED, the same whatever the search's seed)."""
    basis = basis or spec.robustness
    temperature_range = tuple(spec.temperature)
    supply_range = spec.supply_spread
    n = next(iter(parts.values())).shape[0]
    violations = dict(nominal_violations)
    yield_fraction = np.full(n, np.nan)
    corners = None
    if basis == "yield":

        def passes(sample: dict[str, np.ndarray], rows: slice) -> np.ndarray:
            block_limits = {k: np.asarray(v)[rows, None] if np.ndim(v) else v for k, v in limits.items()}
            v = scoring.limit_violations(spec, sample, sample, block_limits, sample["active"], core_only=not full)
            return scoring.meets_every_limit(v)

        yield_fraction = monte_carlo_yield(
            topology,
            parts,
            device,
            conditions,
            tolerances,
            temperature_range,
            passes,
            samples=builds,
            seed=BUILDS_SEED if seed is None else seed,
            full=full,
            supply_range=supply_range,
            # the builds' noise and supply-rejection passes only where the spec limits them
            noise=any(getattr(spec.limits, name) is not None for name in scoring.FULL_MODEL_LIMITS),
            # the spec limits the swing from below only (swing_min), or not at all
            swing_floor=0.0 if spec.limits.swing_min is None else spec.limits.swing_min,
        )
        violations["yield"] = np.maximum(0.0, spec.limits.yield_min - yield_fraction) / spec.limits.yield_min
    elif basis == "worst_case":
        roles = None if full else tuple(r for r in topology.resistors if r in parts)
        corners = worst_case(
            topology, parts, device, conditions, tolerances, temperature_range, supply_range, roles=roles, full=full
        )
        at_corners = _corner_violations(spec, corners, limits, core_only=not full)
        violations = {k: np.maximum(v, at_corners.get(k, 0.0)) for k, v in violations.items() if k != "worst_case"}
        violations["worst_case"] = np.zeros(n)
    spread = bias_spread(topology, parts, device, conditions, tolerances, temperature_range, supply_range)
    # the corners of every part (full) are the record's ranges too (candidates.assess_many)
    return Judgement(violations, yield_fraction, builds if basis == "yield" else 0, spread, corners if full else None)
