"""Full enumeration of a bounded space: the oracle the search is checked against.

One topology, one device, every combination of the spec's allowed resistor values,
judged by the very same evaluation and score as the search (``search.evaluate_group``).
Vectorised and chunked. Capacitor sizing needs the full model and is the costly step, so
the enumeration is a branch and bound that stays exact:

1. every combination gets the fast core metrics (bias, gain, impedances, swing, current,
   ratings) and an optimistic score: the limits that need the full model (band corners,
   noise) counted as met, the capacitors as the cheapest allowed and adding no new value,
   and any objective the core cannot give (noise) as ideal. The capacitors can only lower
   the score, so this bounds it from above (and the core violation bounds the total
   violation from below);
2. combinations are then fully evaluated (capacitors sized) in order of that bound, until
   the next bound cannot beat the best full score found.

Combinations whose gain cannot reach the spec's window even in principle are dropped
first where the topology has a gain bound (``GAIN_BOUNDS``), but only while a design
meeting every limit is found; otherwise the whole space is scored.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np

from optimizer.errors import InputError
from optimizer.search import ABSENT, SearchSpace, evaluate_group, pareto_mask
from optimizer.spec import Spec
from optimizer.topologies import get_topology

CHUNK = 200_000  # combinations per vectorised core call
FULL_CHUNK = 512  # combinations per full evaluation (capacitors sized) in the bound phase


def _parallel(a: np.ndarray, b: float) -> np.ndarray:
    return a * b / (a + b)


#: topology -> upper bound of |gain| (V/V) from its resistors and the load (ohm): the
#: degenerated stage's gain beta*Rac/(r_pi + (beta+1)*Re) never reaches Rac/Re.
GAIN_BOUNDS: dict[str, Callable[[dict[str, np.ndarray], float], np.ndarray]] = {
    "divider_ce": lambda r, load: _parallel(r["r_collector"], load) / r["r_emitter"],
    "divider_ce_split": lambda r, load: _parallel(r["r_collector"], load) / r["r_emitter"],
}


@dataclass
class OracleResult:
    """The true optimum and front of a bounded space."""

    best: dict  # the search's record shape (topology, device, parts, metrics, score, ...)
    front: np.ndarray  # objective values of the true Pareto front (points, objectives), feasible designs
    combinations: int  # size of the space
    fully_evaluated: int  # combinations that needed the capacitors sized
    feasible: int  # combinations meeting every core limit


def _indices(shape: tuple[int, ...], offsets: np.ndarray, start: int, stop: int) -> np.ndarray:
    return np.stack(np.unravel_index(np.arange(start, stop), shape), axis=1) + offsets


def exhaustive(spec: Spec, topology: str | None = None, device: str | None = None,
               space: SearchSpace | None = None) -> OracleResult:
    """Enumerate every resistor combination of ``topology`` and ``device`` (the spec's first
    by default) and return the best design by the search's score and the true front."""
    space = space or SearchSpace.build(spec)
    topology = topology or spec.topologies[0]
    device = device or spec.devices[0]
    if topology not in space.topologies:
        raise InputError.single("topology", topology, f"one of the spec's topologies: {', '.join(space.topologies)}")
    if device not in space.devices:
        raise InputError.single("device", device, f"one of the spec's devices: {', '.join(space.devices)}")
    if spec.search.capacitors != "sized":
        raise InputError.single("search.capacitors", spec.search.capacitors,
                                "'sized' (the oracle enumerates resistors and sizes the capacitors)")
    model = get_topology(topology)
    n = space.resistors.values.size
    roles = model.resistors
    offsets = np.array([ABSENT if r in model.optional_parts else 0 for r in roles])
    shape = tuple(n - o for o in offsets)
    total = int(np.prod(shape, dtype=np.int64))
    gain_floor = spec.gain.target * 10 ** (-spec.gain.tolerance_db / 20)

    def bounds(prune: bool) -> tuple[np.ndarray, np.ndarray, np.ndarray, int]:
        kept, optimistic, core_violation, feasible = [], [], [], 0
        for start in range(0, total, CHUNK):
            idx = _indices(shape, offsets, start, min(start + CHUNK, total))
            if prune and topology in GAIN_BOUNDS:
                values = {r: space.resistors.values[np.maximum(idx[:, j], 0)] for j, r in enumerate(roles)}
                idx = idx[GAIN_BOUNDS[topology](values, spec.load_impedance) >= gain_floor]
            if not len(idx):
                continue
            g = evaluate_group(space, topology, device, {r: idx[:, j] for j, r in enumerate(roles)}, full=False)
            kept.append(idx)
            optimistic.append(g["score"])
            core_violation.append(g["total"])
            feasible += int((g["total"] == 0).sum())
        if not kept:
            return np.zeros((0, len(roles)), dtype=int), np.zeros(0), np.zeros(0), 0
        return np.concatenate(kept), np.concatenate(optimistic), np.concatenate(core_violation), feasible

    idx, optimistic, core_violation, feasible = bounds(prune=True)
    if feasible == 0:
        idx, optimistic, core_violation, feasible = bounds(prune=False)

    # branch and bound: full evaluation in order of the optimistic score. Every design that
    # meets the core limits (optimistic score > 0) is evaluated, so the front is exact; past
    # them, only while an infeasible design could still beat the best found.
    order = np.argsort(-optimistic, kind="stable")
    best_score, best, evaluated = -np.inf, None, 0
    directions = [d for _, d in spec.objective_directions]
    front_values: list[np.ndarray] = []
    for start in range(0, order.size, FULL_CHUNK):
        chunk = order[start:start + FULL_CHUNK]
        if optimistic[chunk[0]] <= 0 and optimistic[chunk[0]] < best_score:
            break
        sub = idx[chunk]
        g = evaluate_group(space, topology, device, {r: sub[:, j] for j, r in enumerate(roles)}, full=True)
        evaluated += chunk.size
        k = int(np.argmax(g["score"]))
        if g["score"][k] > best_score:
            best_score, best = float(g["score"][k]), (g, k)
        ok = g["total"] == 0
        if ok.any():
            values = np.stack(g["objective_values"], axis=1)[ok]
            front_values.append(values[pareto_mask(values, directions)])
    if best is None:
        raise InputError.single("spec", spec.name, "a space with at least one combination", title="empty space")
    front = np.concatenate(front_values) if front_values else np.zeros((0, len(directions)))
    front = front[pareto_mask(front, directions)]
    return OracleResult(best=_record(*best), front=front, combinations=total, fully_evaluated=evaluated,
                        feasible=feasible)


def _record(g: dict, k: int) -> dict:
    return {"parts": {**{r: float(v[k]) for r, v in g["resistors"].items()},
                      **{c: float(v[k]) for c, v in g["caps"].items()}},
            "metrics": {m: float(v[k]) for m, v in g["metrics"].items()},
            "score": float(g["score"][k]), "feasible": bool(g["total"][k] == 0),
            "total_violation": float(g["total"][k])}


__all__ = ["exhaustive", "OracleResult", "GAIN_BOUNDS"]
