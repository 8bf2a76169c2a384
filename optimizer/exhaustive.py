"""Full enumeration of a bounded space: the oracle the search is checked against.

One topology, one device, every combination of the spec's allowed resistor values,
judged by the very same evaluation and score as the search (``search.evaluate_group``).
Vectorised and chunked. Capacitor sizing needs the full model and is the costly step, so
the enumeration is a branch and bound that stays exact:

1. every combination gets the fast core metrics (bias, gain, impedances, current, ratings,
   and the usable swing, the costliest, only where the score could pass the pass's threshold
   whatever the swing: ``evaluate_group(swing_above=...)``) and an optimistic score: the
   limits that need the full model (band corners, noise) counted as met, the capacitors as
   the cheapest allowed and adding no new value, and any objective the core cannot give
   (noise) as ideal. The capacitors can only lower the score, so this bounds it from above
   (and the core violation bounds the total violation from below);
2. combinations are then fully evaluated (capacitors sized) in order of that bound, until
   the next bound cannot beat the best full score found.

A topology whose core metrics are no such bound (``Topology.core_is_bound`` False: its
mid-band gain depends on the capacitors) has every combination fully evaluated instead.

The pass is streaming: only the combinations meeting every core limit are kept (memory
grows with them, not with the space). Where the topology has a gain bound
(``Topology.gain_bound``) only the (r_collector, r_emitter) pairs that can reach the spec's gain
window are combined with the other roles. When no design meets every limit, the whole space
is scored again for the nearest miss (the best bounds kept, and a further pass if the bound
cannot rule out the rest), so the answer stays exact.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from optimizer.errors import InputError
from optimizer.search import SearchSpace, evaluate_group, pareto_mask
from optimizer.search.enumeration import Enumeration
from optimizer.spec import Spec
from optimizer.topologies import get_topology

CHUNK = 200_000  # combinations per vectorised core call
FULL_CHUNK = 512  # combinations per full evaluation (capacitors sized) in the bound phase


KEEP_INFEASIBLE = 4096  # designs missing a core limit kept (best bound first) for the no-answer case


@dataclass
class OracleResult:
    """The true optimum and front of a bounded space."""

    best: dict  # the search's record shape (topology, device, parts, metrics, score, ...)
    front: np.ndarray  # objective values of the true Pareto front (points, objectives), feasible designs
    combinations: int  # size of the space
    fully_evaluated: int  # combinations that needed the capacitors sized
    feasible: int  # combinations meeting every core limit


def exhaustive(
    spec: Spec, topology: str | None = None, device: str | None = None, space: SearchSpace | None = None
) -> OracleResult:
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
        raise InputError.single(
            "search.capacitors",
            spec.search.capacitors,
            "'sized' (the oracle enumerates resistors and sizes the capacitors)",
        )
    model = get_topology(topology)
    whole = Enumeration(space, topology, prune=False)
    roles = whole.roles
    best_score, evaluated = -np.inf, 0  # the best fully evaluated design so far, and how many were evaluated
    best: tuple[dict, int] | None = None  # (evaluate_group's result, index in it)

    def bounds(prune: bool, threshold: float, limit: int | None) -> tuple[np.ndarray, np.ndarray, int]:
        """One streaming pass of the core model: the combinations whose optimistic score
        exceeds ``threshold``, at most ``limit`` of them (the best), and the count meeting
        every core limit. The swing is solved only where the score could pass ``threshold``."""
        kept, optimistic, feasible = np.zeros((0, len(roles)), dtype=int), np.zeros(0), 0
        for idx in Enumeration(space, topology, prune).chunks(CHUNK):
            parts = {r: idx[:, j] for j, r in enumerate(roles)}
            above = threshold if threshold > -np.inf else None  # None: the swing solved everywhere, in one call
            g = evaluate_group(space, topology, device, parts, full=False, swing_above=above)
            feasible += int((g["total"] == 0).sum())
            keep = g["score"] > threshold
            kept, optimistic = np.concatenate([kept, idx[keep]]), np.concatenate([optimistic, g["score"][keep]])
            if limit is not None and optimistic.size > 2 * limit:
                best = np.argpartition(-optimistic, limit)[:limit]
                kept, optimistic = kept[best], optimistic[best]
                threshold = max(threshold, float(optimistic.min()))
        return kept, optimistic, feasible

    def branch_and_bound(idx: np.ndarray, optimistic: np.ndarray) -> bool:
        """Fully evaluate in order of the bound until none left could beat the best; every
        design meeting the core limits is evaluated (bound > 0), so the front is exact.
        True if the bound cut the list short (the rest provably cannot win)."""
        nonlocal best_score, best, evaluated
        order = np.argsort(-optimistic, kind="stable")
        for start in range(0, order.size, FULL_CHUNK):
            chunk = order[start : start + FULL_CHUNK]
            if optimistic[chunk[0]] <= 0 and optimistic[chunk[0]] < best_score:
                return True
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
        return False

    directions = [d for _, d in spec.objective_directions]
    front_values: list[np.ndarray] = []
    if not model.core_is_bound:  # no bound from the core: every combination fully evaluated
        idx, _, feasible = bounds(prune=True, threshold=-np.inf, limit=None)
        branch_and_bound(idx, np.full(idx.shape[0], np.inf))
    else:
        idx, optimistic, feasible = bounds(prune=True, threshold=0.0, limit=None)  # every core-feasible design
        branch_and_bound(idx, optimistic)
    if best_score <= 0 and model.core_is_bound:  # no design meets every limit: the nearest miss, over the whole space
        idx, optimistic, _ = bounds(prune=False, threshold=-np.inf, limit=KEEP_INFEASIBLE)
        if not branch_and_bound(idx, optimistic) and idx.shape[0] == KEEP_INFEASIBLE:
            idx, optimistic, _ = bounds(prune=False, threshold=best_score, limit=None)
            branch_and_bound(idx, optimistic)
    if best is None:
        raise InputError.single("spec", spec.name, "a space with at least one combination", title="empty space")
    front = np.concatenate(front_values) if front_values else np.zeros((0, len(directions)))
    front = front[pareto_mask(front, directions)]
    return OracleResult(
        best=_record(*best), front=front, combinations=whole.combinations, fully_evaluated=evaluated, feasible=feasible
    )


def _record(g: dict, k: int) -> dict:
    return {
        "parts": {
            **{r: float(v[k]) for r, v in g["resistors"].items()},
            **{c: float(v[k]) for c, v in g["caps"].items()},
        },
        "metrics": {m: float(v[k]) for m, v in g["metrics"].items()},
        "score": float(g["score"][k]),
        "feasible": bool(g["total"][k] == 0),
        "total_violation": float(g["total"][k]),
    }


__all__ = ["exhaustive", "OracleResult"]
