"""Every combination of one topology's resistor indices, and the seeds a search takes from a
small space: its designs ranked by the core model's optimistic score.

The core metrics (bias, gain, impedances, swing, current, ratings) cost a small share of a
trial, and their optimistic score (``evaluate_group(full=False)``: the limits that need the
full model counted as met, the capacitors at their best) bounds the full score from above
on every topology whose mid-band gain does not hang on its capacitors. Where a
(topology, device) group's combinations are few against the search's budget, the search
scores all of them so before it starts and enqueues the best BOUND_SEEDS of each group as
seeds, next to the hand method's. A space where few designs meet every limit can hold its
optimum apart from every other good design (no single or paired step from any of them
reaches it): such an optimum is found only when something points the search at it, and the
bound does, as it does for the exhaustive oracle's branch and bound (optimizer.exhaustive).
"""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np

from optimizer.search.evaluation import evaluate_group
from optimizer.search.space import ABSENT, Design, SearchSpace
from optimizer.topologies import get_topology

BOUND_SEEDS = 16  # designs per (topology, device) group enqueued from the bound ranking
ENUMERATED_PER_TRIAL = 32  # the groups enumerated hold at most this many combinations per trial of the budget
CHUNK = 65_536  # combinations per vectorised core call
GRID_CHUNK = 1 << 20  # gain-bound combinations judged per call when pruning


class Enumeration:
    """Every combination of ``topology``'s resistor indices on ``space`` (ABSENT included for
    an optional part), in chunks; with ``prune`` and a topology that has a gain bound, only
    the combinations of its gain-bound roles (e.g. r_collector, r_emitter) that can reach the
    spec's gain window are combined with the other roles (the rest cannot meet the gain limit).
    The gain-bound combinations are found on first use of :attr:`size` or :meth:`chunks`, in
    chunks of GRID_CHUNK (three roles of E96 over five decades are 10^8 combinations);
    :attr:`free_count`, the other roles' combinations, costs nothing."""

    def __init__(self, space: SearchSpace, topology: str, prune: bool) -> None:
        self._space, self._model = space, get_topology(topology)
        n = space.resistors.values.size
        self.roles = space.resistor_roles(topology)
        self.lows = {r: (ABSENT if r in self._model.optional_parts else 0) for r in self.roles}
        self.combinations = int(np.prod([n - self.lows[r] for r in self.roles], dtype=np.int64))  # unpruned
        self._bounded: tuple[str, ...] = self._model.gain_bound_roles if prune else ()
        self._free = tuple(r for r in self.roles if r not in self._bounded)
        self._free_lows = np.array([self.lows[r] for r in self._free], dtype=int)
        self._free_shape = tuple(n - self.lows[r] for r in self._free)
        self.free_count = int(np.prod(self._free_shape, dtype=np.int64))  # combinations of the roles not pruned
        self._pairs: np.ndarray | None = None if self._bounded else np.zeros((1, 0), dtype=int)

    @property
    def pairs(self) -> np.ndarray:
        """The gain-bound roles' index combinations that can reach the gain window (rows, in
        their nested order: the last role fastest)."""
        if self._pairs is None:
            ranges = [np.arange(self.lows[r], self._space.resistors.values.size) for r in self._bounded]
            shape = tuple(len(r) for r in ranges)
            total = int(np.prod(shape, dtype=np.int64))
            spec = self._space.spec
            floor = spec.gain.target * 10 ** (-spec.gain.tolerance_db / 20)
            kept = []
            for start in range(0, total, GRID_CHUNK):
                at = np.unravel_index(np.arange(start, min(start + GRID_CHUNK, total)), shape)
                grid = np.stack([r[i] for r, i in zip(ranges, at)], axis=-1)
                values = {
                    r: self._space.resistors.values[np.maximum(grid[:, j], 0)] for j, r in enumerate(self._bounded)
                }
                bound = self._model.gain_bound(values, spec.load_impedance)
                if bound is None:  # a developer's slip in the topology's module, not the user's
                    raise TypeError(
                        f"topology {self._model.name} declares gain_bound_roles but its gain_bound() gives no bound"
                    )
                kept.append(grid[bound >= floor])
            self._pairs = np.concatenate(kept)
        return self._pairs

    @property
    def size(self) -> int:
        """Combinations enumerated (after pruning)."""
        return len(self.pairs) * self.free_count

    def chunks(self, chunk: int) -> Iterator[np.ndarray]:
        """Index arrays (combinations, roles) in the order of ``roles``."""
        column = {r: j for j, r in enumerate(self.roles)}
        for start in range(0, self.size, chunk):
            linear = np.arange(start, min(start + chunk, self.size))
            out = np.empty((linear.size, len(self.roles)), dtype=int)
            pair, free = np.divmod(linear, self.free_count)
            for j, r in enumerate(self._bounded):
                out[:, column[r]] = self.pairs[pair, j]
            if self._free:
                for j, idx in enumerate(np.unravel_index(free, self._free_shape)):
                    out[:, column[self._free[j]]] = idx + self._free_lows[j]
            yield out


def bound_seeds(space: SearchSpace, budget: int) -> list[Design]:
    """The best BOUND_SEEDS designs of each (topology, device) group by the core model's
    optimistic score, over every combination (gain-pruned), for the groups small enough:
    smallest first while their combinations add up to at most ENUMERATED_PER_TRIAL per trial
    of ``budget``, so the pass costs well under the search it seeds (a design's core metrics
    cost some 7-20 us, a trial of the search 0.5-1.5 ms). Groups whose core score is no bound
    (``Topology.core_is_bound`` False) and spaces whose trials choose more than the
    resistors (searched capacitors, a decoupling RC) are left to the search. Ties keep the
    enumeration's order, so the seeds are the same on every run."""
    groups = []
    room = ENUMERATED_PER_TRIAL * budget
    for topology in space.topologies:
        if not get_topology(topology).core_is_bound:
            continue
        roles = [name.split(".", 1)[1] for name in space.distributions({"topology": topology}) if "." in name]
        if set(roles) != set(space.resistor_roles(topology)):
            continue
        enumeration = Enumeration(space, topology, prune=True)
        if enumeration.free_count > room:
            continue  # a single gain-bound combination would already make the group too large
        groups += [(enumeration.size, topology, device, enumeration) for device in space.devices_of(topology)]
    seeds: list[Design] = []
    for size, topology, device, enumeration in sorted(groups, key=lambda g: g[0]):
        if size == 0 or size > room:
            continue
        room -= size
        kept, scores = np.zeros((0, len(enumeration.roles)), dtype=int), np.zeros(0)
        for idx in enumeration.chunks(CHUNK):
            g = evaluate_group(space, topology, device, dict(zip(enumeration.roles, idx.T)), full=False)
            kept, scores = np.concatenate([kept, idx]), np.concatenate([scores, g["score"]])
            best = np.argsort(-scores, kind="stable")[:BOUND_SEEDS]
            kept, scores = kept[best], scores[best]
        seeds += [Design(topology, device, tuple(zip(enumeration.roles, map(int, row)))) for row in kept]
    return seeds


__all__ = ["Enumeration", "bound_seeds", "BOUND_SEEDS", "ENUMERATED_PER_TRIAL"]
