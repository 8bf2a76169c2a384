"""Spread: worst-case corners, bias spread and seeded Monte Carlo yield, vectorised across
candidates x samples.

What moves (common practice): every resistor and capacitor within its tolerance, the
device's own spread (``spread_edges`` for the corners, ``spread_draw`` for Monte Carlo): a
bipolar transistor's hFE anywhere in its min..max, rising with temperature
(``devices.hfe_temperature_factor``), a JFET's IDSS and VP together along the line from
their minima to their maxima (``devices.JFET``); the temperature over the spec's range, with
Vbe falling about 2 mV/K (carried by the device's saturation-current temperature law) or a
JFET's VTO and BETA moving by its SPICE TCV and BEX; and the supply over its min..max (a split
supply's two rails each over its own min..max, independently: the span and the ground's place
in it move per build, :data:`SupplyRange`). Monte
Carlo draws parts uniformly within tolerance (the conservative choice for parts binned by
tolerance), hFE log-uniformly within min..max (a JFET uniformly along its line), and the
temperature and the supply uniformly over a few levels of their ranges.

The builds are common random numbers: build k of every candidate uses the same temperature,
supply, hFE position and, per part role, the same position within the tolerance band
(:class:`Builds`). So a design's yield does not depend on which other designs it was judged
with, and two designs are compared on the same builds.
"""

from __future__ import annotations

import functools
import itertools
import zlib
from dataclasses import dataclass, fields, replace
from typing import Callable, NamedTuple

import numpy as np

from optimizer.devices import AnyDevice
from optimizer.topologies.base import CHUNK_FAST, CHUNK_FULL, Conditions, StageResult, Topology

TEMPERATURE_BINS = 3  # Monte Carlo temperatures are drawn from this many levels (ends and middle)
SUPPLY_BINS = 3  # and supplies from this many (min, middle, max)
MERGED_CALLS = 1  # Monte Carlo builds filling up to this many model calls are evaluated every temperature at once
Tolerance = float | np.ndarray  # fraction, one for all candidates or one per candidate
# The supply's spread: the span's (low, high) in V, or a split supply's two rails each over its
# own range, ((V+ low, V+ high), (|V-| low, |V-| high)) in V (Spec.supply_spread)
SupplyRange = tuple[float, float] | tuple[tuple[float, float], tuple[float, float]]


def supply_points(
    supply_range: SupplyRange | None, conditions: Conditions | None, levels: int = 2
) -> list[tuple[float, float, tuple[int, int]]]:
    """(span V, below-ground fraction, (level of V+, level of |V-|)) at ``levels`` evenly spaced
    points of each rail's range: every combination for a split supply's independent rails (the
    corners at levels=2: V+ and V- each at its min and max), the span's points with the ground's
    place of ``conditions`` otherwise (its |V-| level 0). None: the nominal supply alone."""
    if supply_range is None:
        assert conditions is not None
        return [(float(conditions.supply), conditions.below_ground, (0, 0))]
    low, high = supply_range
    if not isinstance(low, tuple):
        assert conditions is not None
        return [(float(v), conditions.below_ground, (i, 0)) for i, v in enumerate(np.linspace(low, high, levels))]
    assert isinstance(high, tuple)
    return [
        (float(p + n), float(n / (p + n)), (i, j))
        for (i, p), (j, n) in itertools.product(
            enumerate(np.linspace(*low, levels)), enumerate(np.linspace(*high, levels))
        )
    ]


@dataclass(frozen=True)
class Builds:
    """``samples`` seeded random builds, the same for every candidate.

    temperature (°C), supply (V, the span) and below_ground (the ground's fraction of the span) per
    build, taken from TEMPERATURE_BINS levels and SUPPLY_BINS levels of each rail (a split
    supply's rails drawn independently, :func:`supply_points`); hfe_position in [0, 1] (the device's spread position: log position between hFE min
    and max, or a JFET's position along its IDSS/VP line);
    :meth:`part_position` gives each role's position in [-1, 1] within its tolerance band.
    """

    samples: int
    seed: int
    temperature: np.ndarray
    supply: np.ndarray
    hfe_position: np.ndarray
    below_ground: np.ndarray | None = None  # None: the conditions' own (a single rail's span moving)

    @classmethod
    def draw(
        cls,
        samples: int,
        seed: int,
        temperature_range: tuple[float, float],
        supply_range: SupplyRange,
        conditions: Conditions | None = None,
    ) -> "Builds":
        """``samples`` builds from ``seed``; a split supply's rails (``supply_range`` as rail
        ranges, ``conditions`` giving the nominal ground) each drawn on its own."""
        rng = np.random.default_rng([seed, 0x5EED])
        t_levels = np.linspace(*temperature_range, TEMPERATURE_BINS)
        temperature = t_levels[rng.integers(0, TEMPERATURE_BINS, samples)]
        positive = rng.integers(0, SUPPLY_BINS, samples)
        hfe_position = rng.uniform(0.0, 1.0, samples)
        if not isinstance(supply_range[0], tuple):
            s_levels = np.linspace(*supply_range, SUPPLY_BINS)
            return cls(samples, seed, temperature, s_levels[positive], hfe_position)
        negative = rng.integers(0, SUPPLY_BINS, samples)  # drawn after the others: their streams unchanged
        grid = {levels: (span, g) for span, g, levels in supply_points(supply_range, conditions, SUPPLY_BINS)}
        points = [grid[(int(i), int(j))] for i, j in zip(positive, negative)]
        return cls(
            samples,
            seed,
            temperature,
            np.array([p[0] for p in points]),
            hfe_position,
            np.array([p[1] for p in points]),
        )

    def part_position(self, role: str) -> np.ndarray:
        """Position of part ``role`` within its tolerance band in each build, in [-1, 1]."""
        rng = np.random.default_rng([self.seed, zlib.crc32(role.encode())])
        return rng.uniform(-1.0, 1.0, self.samples)

    def hfe(self, device: AnyDevice) -> np.ndarray:
        """The device's spread variable in each build at its temperature (hFE for a bipolar
        transistor, the IDSS/VP position for a JFET: ``device.spread_draw``)."""
        return device.spread_draw(self.hfe_position, self.temperature)

    def groups(self, by_temperature: bool = False) -> list[tuple[float | None, np.ndarray]]:
        """(temperature, build indices): every build in one group (temperature None), or with
        ``by_temperature`` one group per temperature. The span, the ground's place and the
        temperature unless ``by_temperature`` vary within a group (the models take them per
        element; a split supply's builds are all of one arrangement)."""
        if not by_temperature:
            return [(None, np.arange(self.samples))]
        return [(float(t), np.flatnonzero(self.temperature == t)) for t in np.unique(self.temperature)]


def _flat_result(
    topology: Topology,
    parts: dict[str, np.ndarray],
    device: AnyDevice,
    conditions: Conditions,
    hfe: np.ndarray,
    full: bool,
    noise: bool = True,
    swing_where: Callable[[dict[str, np.ndarray]], np.ndarray] | None = None,
    swing: bool = True,
    swing_floor: float | None = None,
) -> dict[str, np.ndarray]:
    """Evaluate arrays of shape (candidates, samples) flattened; metrics, ratings, 'active' and
    the operating point's 'ic' come back in the same 2-D shape (``full``, ``noise``, ``swing``,
    ``swing_floor``: as Topology.evaluate's). The conditions' supply, temperature and ground's place are scalars
    or flattened arrays of the same size. ``swing_where``: Topology.evaluate's, on this 2-D form (taken
    where the arrays fit one evaluation chunk; the swing solved everywhere otherwise)."""
    shape = hfe.shape
    flat = {role: np.broadcast_to(v, shape).reshape(-1) for role, v in parts.items()}
    h = hfe.reshape(-1)
    step = CHUNK_FULL if full else CHUNK_FAST
    per_element = [name for name in ("supply", "temperature", "below_ground") if np.ndim(getattr(conditions, name))]
    evaluate = functools.partial(topology.evaluate, full=full, noise=noise, swing=swing, swing_floor=swing_floor)
    if h.size <= step or not per_element:
        where = None if swing_where is None or h.size > step else lambda r: swing_where(_sample(r, shape)).reshape(-1)
        result = evaluate(flat, device, conditions, hfe=h, swing_where=where)
    else:  # conditions per element: the model's own chunks would not slice them, so chunked here
        pieces = [
            evaluate(
                {k: v[i : i + step] for k, v in flat.items()},
                device,
                replace(conditions, **{name: getattr(conditions, name)[i : i + step] for name in per_element}),
                hfe=h[i : i + step],
            )
            for i in range(0, h.size, step)
        ]
        result = StageResult(
            *(
                {k: np.concatenate([getattr(r, d)[k] for r in pieces]) for k in getattr(pieces[0], d)}
                for d in (f.name for f in fields(StageResult))
            )
        )
    return _sample(result, shape)


def _sample(result: StageResult, shape: tuple[int, ...]) -> dict[str, np.ndarray]:
    """Metrics, ratings, DC node voltages, 'active' and 'ic' of a flattened result, in ``shape``."""
    out = {k: np.asarray(v).reshape(shape) for k, v in result.metrics.items()}
    out.update({k: np.asarray(v).reshape(shape) for k, v in result.ratings.items()})
    op = result.operating_point
    out.update(
        {k: np.asarray(v).reshape(shape) for k, v in op.items() if k.startswith("v_") and k not in out}
    )  # DC node voltages (v_out_q among them), for their spread
    out["active"] = np.asarray(op["active"]).reshape(shape)
    out["ic"] = np.asarray(op["ic"]).reshape(shape)
    return out


def _column(tolerance: Tolerance, rows: slice | None = None) -> np.ndarray:
    """A tolerance as a column (candidates, 1) for broadcasting against samples."""
    t = np.asarray(tolerance, dtype=float)
    return (t if t.ndim == 0 or rows is None else t[rows]).reshape(-1, 1) if t.ndim else t.reshape(1, 1)


class Corners(NamedTuple):
    """The corners of temperature, supply and the device's spread, one entry each (the models
    take every field per element)."""

    temperature: np.ndarray  # degC
    supply: np.ndarray  # V, the span
    spread: np.ndarray  # the device's spread variable at its edge (hFE; a JFET's position)
    below_ground: np.ndarray | float  # the ground's place in the span (the conditions' own where it has one)


def _corner_conditions(
    device: AnyDevice,
    conditions: Conditions,
    temperature_range: tuple[float, float],
    supply_range: SupplyRange | None,
) -> Corners:
    """The corners of temperature, supply and the device's spread: both ends of each, a split
    supply's rails each at both ends."""
    corners = [
        (float(t), span, below, e)
        for t in temperature_range
        for (span, below, _), e in itertools.product(
            supply_points(supply_range, conditions), device.spread_edges(float(t))
        )
    ]
    temperature, supply, below, edge = (np.array(column, dtype=float) for column in zip(*corners))
    place = below if np.any(below != conditions.below_ground) else conditions.below_ground
    return Corners(temperature, supply, edge, place)


def _per_corner(conditions: Conditions, corners: Corners, repeat: int, shape: tuple[int, ...]) -> Conditions:
    """``conditions`` with the temperature, supply and ground's place of ``corners``, each
    repeated ``repeat`` times and broadcast to ``shape`` (the corners along its last axis),
    flattened: one per element of the model call."""

    def each(v: np.ndarray | float) -> np.ndarray | float:
        return np.broadcast_to(np.repeat(v, repeat), shape).reshape(-1) if np.ndim(v) else v

    return replace(
        conditions,
        supply=each(corners.supply),
        temperature=each(corners.temperature),
        below_ground=each(corners.below_ground),
    )


def worst_case(
    topology: Topology,
    parts: dict[str, np.ndarray],
    device: AnyDevice,
    conditions: Conditions,
    tolerances: dict[str, Tolerance],
    temperature_range: tuple[float, float],
    supply_range: SupplyRange | None = None,
    *,
    roles: tuple[str, ...] | None = None,
    full: bool = True,
) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """(low, high) of every metric, rating, 'ic' and DC node voltage (v_base, v_out_q, ...) over all corners: each part in
    ``roles`` (default: all) at +-tolerance, the device's spread at both ends (hFE min and max, a
    JFET's lowest and highest IDSS/VP), temperature and supply at
    both ends (a split supply's rails each at both ends: four supply corners). Arrays over candidates. Metrics NaN at a corner (a stage that is not active)
    are left out of that corner's range; 'active_all' (bool) says whether every corner is active."""
    # a part that is 0 in every candidate (a direct-coupled input's c_in) has no tolerance to
    # spread: its corners would repeat the others
    roles = tuple(r for r in (tuple(parts) if roles is None else roles) if np.any(np.asarray(parts[r]) != 0))
    # The usable swing (the costliest figure) does not see the capacitors' values in a stage
    # whose core does not (Topology.core_is_bound): there it is solved on the corners of the
    # other roles alone, the capacitors at their values, 2**capacitors times fewer solves
    # (the same figures: tests/test_spread_and_sizing.py)
    capacitors = {r for r in roles if r in topology.capacitors} if topology.core_is_bound else set()
    corner = functools.partial(
        _corner_result,
        topology,
        parts,
        tolerances,
        device,
        conditions,
        _corner_conditions(device, conditions, temperature_range, supply_range),
    )
    values = corner(roles, full, swing=not capacitors)
    if capacitors:
        values["swing_vpp"] = corner(tuple(r for r in roles if r not in capacitors), False)["swing_vpp"]
    active_all = np.all(values["active"], axis=1)
    out = {}
    for key, value in values.items():
        if value.dtype == bool:
            continue
        low, high = _range(value, axis=1)  # a corner that is not active has NaN figures: left out
        out[key] = (np.where(np.isfinite(low), low, np.nan), np.where(np.isfinite(high), high, np.nan))
    out["active_all"] = (active_all, active_all)
    return out


def _range(value: np.ndarray, axis: int) -> tuple[np.ndarray, np.ndarray]:
    """The lowest and highest of ``value`` along ``axis``, NaN (no figure) left out: +inf and
    -inf where no element has one."""
    return np.min(np.where(np.isnan(value), np.inf, value), axis=axis), np.max(
        np.where(np.isnan(value), -np.inf, value), axis=axis
    )


def _corner_result(
    topology: Topology,
    parts: dict[str, np.ndarray],
    tolerances: dict[str, Tolerance],
    device: AnyDevice,
    conditions: Conditions,
    corners: Corners,
    roles: tuple[str, ...],
    full: bool,
    swing: bool = True,
) -> dict[str, np.ndarray]:
    """:func:`_flat_result` of every corner: each of ``roles`` at +-tolerance (the other parts at
    their values), repeated for each (temperature, supply, device edge, ground's place) corner of
    :func:`_corner_conditions` (``corners``), those per column; shape (candidates, corners)."""
    signs = np.array(list(itertools.product((-1.0, 1.0), repeat=len(roles))))  # (corners, roles)
    n = np.asarray(next(iter(parts.values()))).shape[0]
    corner_parts = {
        role: np.asarray(v, dtype=float).reshape(-1, 1) * np.ones((1, signs.shape[0])) for role, v in parts.items()
    }
    for j, role in enumerate(roles):
        corner_parts[role] = corner_parts[role] * (1.0 + signs[None, :, j] * _column(tolerances.get(role, 0.0)))
    stacked = {role: np.tile(v, (1, corners.spread.size)) for role, v in corner_parts.items()}
    hfe = np.broadcast_to(np.repeat(corners.spread, signs.shape[0])[None, :], (n, corners.spread.size * signs.shape[0]))
    at = _per_corner(conditions, corners, signs.shape[0], hfe.shape)
    return _flat_result(topology, stacked, device, at, np.ascontiguousarray(hfe), full, swing=swing)


def bias_spread(
    topology: Topology,
    parts: dict[str, np.ndarray],
    device: AnyDevice,
    conditions: Conditions,
    tolerances: dict[str, Tolerance],
    temperature_range: tuple[float, float],
    supply_range: SupplyRange,
) -> dict[str, np.ndarray]:
    """Spread of the operating point, per candidate: ``ic_low``, ``ic_high`` (A), ``ic_spread``
    (max/min Ic) and ``v_out_low``, ``v_out_high`` (V, the quiescent output).

    Corners: hFE, temperature and supply at their ends (8; a split supply's rails each at
    both ends: 16), each with the resistors at the
    tolerance edge that raises Ic and at the one that lowers it (the sign of dIc/dR at
    nominal, one probe per resistor): the classical sensitivity-directed worst case, exact
    where Ic is monotone in each resistor. 8 + 16 operating points per candidate, in two model
    calls (the nominal and the probes in one, then every corner)."""
    p = {role: np.asarray(v, dtype=float).reshape(-1) for role, v in parts.items()}
    n = next(iter(p.values())).size
    resistors = [r for r in topology.resistors if r in p]
    probes = [p] + [
        {**p, r: p[r] * (1.0 + np.maximum(np.asarray(tolerances.get(r, 0.0), dtype=float), 1e-3))} for r in resistors
    ]
    stacked = {role: np.concatenate([probe[role] for probe in probes]) for role in p}
    nominal, *raised = topology.operating_point(stacked, device, conditions)["ic"].reshape(len(probes), n)
    direction = {r: np.sign(np.nan_to_num(raised[k] - nominal)) for k, r in enumerate(resistors)}
    up = {
        role: v * (1.0 + direction[role] * np.asarray(tolerances.get(role, 0.0))) if role in direction else v
        for role, v in p.items()
    }
    down = {
        role: v * (1.0 - direction[role] * np.asarray(tolerances.get(role, 0.0))) if role in direction else v
        for role, v in p.items()
    }
    both = {role: np.concatenate([up[role], down[role]]) for role in p}
    # every (temperature, supply, device edge, ground's place) corner in one call
    corners = _corner_conditions(device, conditions, temperature_range, supply_range)
    pairs = corners.spread.size
    op = topology.operating_point(
        {role: np.tile(v, pairs) for role, v in both.items()},
        device,
        _per_corner(conditions, corners, 2 * n, (2 * n * pairs,)),
        np.repeat(corners.spread, 2 * n),
    )
    ic = np.where(op["active"], op["ic"], np.nan).reshape(2 * pairs, n)
    v_out = np.asarray(op["v_out_q"]).reshape(2 * pairs, n)
    ic_low, ic_high = _range(ic, axis=0)
    v_low, v_high = v_out.min(axis=0), v_out.max(axis=0)
    with np.errstate(divide="ignore", invalid="ignore"):
        spread = np.where((ic_low > 0) & np.isfinite(ic_high), ic_high / ic_low, np.inf)
    return {"ic_low": ic_low, "ic_high": ic_high, "ic_spread": spread, "v_out_low": v_low, "v_out_high": v_high}


def _passes_unbounded(
    passes: Callable[[dict[str, np.ndarray], slice], np.ndarray],
    rows: slice,
    record: list[np.ndarray],
    sample: dict[str, np.ndarray],
) -> np.ndarray:
    """Where builds pass and are active with an unbounded swing (``passes`` as monte_carlo_yield's,
    ``sample`` without its swing), appended to ``record``."""
    verdict = passes({**sample, "swing_vpp": np.full(sample["active"].shape, np.inf)}, rows) & sample["active"]
    record.append(verdict)
    return verdict


def monte_carlo_yield(
    topology: Topology,
    parts: dict[str, np.ndarray],
    device: AnyDevice,
    conditions: Conditions,
    tolerances: dict[str, Tolerance],
    temperature_range: tuple[float, float],
    passes: Callable[[dict[str, np.ndarray], slice], np.ndarray],
    samples: int = 1000,
    seed: int = 0,
    full: bool = False,
    supply_range: SupplyRange | None = None,
    noise: bool = True,
    swing_floor: float | None = None,
) -> np.ndarray:
    """Fraction of ``samples`` random builds (:class:`Builds`) of each candidate for which
    ``passes(sample, rows)`` holds (``sample``: metrics and ratings of shape (block rows,
    samples) for the candidates ``rows``, a slice; returns a bool array of that shape) and
    the transistors are active.

    ``full=False`` judges the builds on the fast core metrics (bias, gain, impedances, swing,
    current, ratings); ``full=True`` adds the band corners, noise and supply rejection (the
    corners alone with ``noise=False``: for a ``passes`` that judges neither).
    ``swing_floor`` (V peak-to-peak) is for a ``passes`` that reads the swing only against that
    floor (a spec's swing_min; 0: not at all): the usable swing (the costliest core figure) is
    then solved only for the builds that pass with an unbounded swing (swing_vpp NaN in the
    others' sample), and there only as far as telling whether it reaches the floor
    (Topology.evaluate's swing_floor: a lower bound at or above it where it surely does, NaN
    where it surely does not, the swing itself where the drives cannot tell); the yield is the same.
    The builds (the supply and a split supply's ground's place vary per build, and so does the
    temperature where every build fits MERGED_CALLS model calls; past that, one temperature per
    call: the models take them per element) are evaluated in blocks of candidate rows that fit
    one evaluation chunk, so the working set stays small whatever the count and a block is one
    model call.
    """
    supply_range = (conditions.supply, conditions.supply) if supply_range is None else supply_range
    builds = Builds.draw(samples, seed, temperature_range, supply_range, conditions)
    values = {role: np.asarray(value, dtype=float).reshape(-1) for role, value in parts.items()}
    n = next(iter(values.values())).shape[0]
    positions = {role: builds.part_position(role) for role in values}
    hfe_all = builds.hfe(device)
    passed = np.zeros(n)
    step = CHUNK_FULL if full else CHUNK_FAST
    # Builds that fit one model call take every temperature in it (a small call's cost is mostly
    # fixed); more take a call per temperature, as a temperature per element costs more per
    # element (NF*VT and IS as arrays in every Newton step: benchmarks/results/models.md)
    by_temperature = n * samples > step * MERGED_CALLS
    for temperature, idx in builds.groups(by_temperature):  # one call per block of a group
        rows = max(1, step // idx.size)
        for i in range(0, n, rows):
            block = slice(i, min(i + rows, n))
            drawn = {
                role: v[block, None] * (1.0 + _column(tolerances.get(role, 0.0), block) * positions[role][None, idx])
                for role, v in values.items()
            }
            shape = (block.stop - block.start, idx.size)
            hfe = np.broadcast_to(hfe_all[None, idx], shape)
            at = replace(
                conditions,
                temperature=(
                    np.broadcast_to(builds.temperature[None, idx], shape).reshape(-1)
                    if temperature is None
                    else temperature
                ),
                supply=np.broadcast_to(builds.supply[None, idx], shape).reshape(-1),
                below_ground=(
                    conditions.below_ground
                    if builds.below_ground is None
                    else np.broadcast_to(builds.below_ground[None, idx], shape).reshape(-1)
                ),
            )
            needed: list[np.ndarray] = []  # where the swing was solved (a swing_floor)
            unbounded = functools.partial(_passes_unbounded, passes, block, needed) if swing_floor else None
            sample = _flat_result(
                topology,
                drawn,
                device,
                at,
                np.ascontiguousarray(hfe),
                full,
                noise,
                unbounded,
                swing=swing_floor != 0.0,  # a floor of 0: passes reads no swing
                swing_floor=swing_floor or None,
            )
            verdict = passes(sample, block) & sample["active"]
            passed[block] += np.count_nonzero(verdict & needed[0] if needed else verdict, axis=1)
    return passed / samples
