"""NeighbourSampler: an Optuna sampler for ordered part-value indices.

Preferred values are ordered, so the designs next to a good design are its series
neighbours: one resistor a step or two up or down the series. This sampler keeps the best
designs found so far (the elite) and proposes each new trial as a neighbour of one of
them, which suits the search far better than treating indices as unordered categories or
sampling them independently:

- parents: half the time one of the best designs by the search's score (feasible before
  infeasible, then by score, infeasible ones by their summed violation), half the time a
  random point of the current Pareto front over the spec's objectives, so both the single
  best design and the whole front are refined;
- moves: one to three parameters, each stepped by +-1 (most often), +-2, or up to +-6
  places along its ordered values; now and then a crossover with another elite design of
  the same topology, a switch of topology or device (taking the best design known there),
  or a fresh random design (the global moves that stop the search settling too early);
- coupled moves: two or more indices (or all of them) stepped together by the same amount,
  which keeps their ratios (a divider's bias point, a gain set by Rc/Re) while scaling the
  impedance level and so the current, a move single steps cannot make without passing
  through infeasible designs;
- whenever the best design changes, for the front's two ends, for every design new on the
  front and for every new design that misses the front by less than NEAR_FRONT of its span,
  every neighbour one step away (each index, each pair both ways and one up one down, each
  group of three, and all indices together, +-1) is queued and tried first, newest centre
  first, so the search does not stop one step short of a local optimum or of the front's
  next point (a pattern search around the incumbents). The near-front designs carry the
  front along ridges that single steps leave: in the split-emitter stage the swing peaks
  where r_emitter_dc centres the bias, and that peak moves three or four steps of
  r_emitter_dc for each step of the divider, through designs just behind the front;
- once the best design has stood for STALLED trials, it is swept wider, once: each pair of
  indices with one stepped +-1 and the other UNEVEN_STEPS the other way. A step of a bias
  divider moves the current by several steps' worth of the collector resistor, so the design
  that keeps the bias point after it is several steps away, and where the feasible designs
  form a thin band (gain on one side, swing on the other) every one-step neighbour of it fails;
- designs already proposed are not proposed again while an untried neighbour is found.

Before any design is finished it samples at random; enqueued seeds are taken as given.
Seeded, so a search in one process is reproducible. Optuna's interface: one class, the
plan of each trial made in ``before_trial`` and handed out in ``sample_independent``; the
search's own loop asks :meth:`NeighbourSampler.next_trial` for a whole trial before making it
(the same plan and draws, one storage write).
"""

from __future__ import annotations

import itertools
import random
from bisect import bisect_right
from dataclasses import dataclass
from typing import Any, Callable, Iterator

import numpy as np
from optuna.distributions import BaseDistribution, CategoricalDistribution, IntDistribution
from optuna.samplers import BaseSampler, RandomSampler
from optuna.study import Study
from optuna.trial import FrozenTrial, TrialState, create_trial

from optimizer.scoring import pareto_mask
from optimizer.storage import study_id, study_storage, trial_id, trials_from

ELITE_SIZE = 16
PARENT_FROM_FRONT = 0.5
P_RANDOM, P_SWITCH, P_CROSSOVER = 0.05, 0.08, 0.15
MOVE_COUNTS, MOVE_COUNT_P = (1, 2, 3), (0.5, 0.3, 0.2)
STEPS, STEP_P = (1, 2, 3, 4, 5, 6), (0.55, 0.25, 0.08, 0.05, 0.04, 0.03)
# cumulative weights, summed as random.choices sums them on every draw: the same draws, summed once
_MOVE_COUNT_CUM, _STEP_CUM = list(itertools.accumulate(MOVE_COUNT_P)), list(itertools.accumulate(STEP_P))
SIGNS = (-1, 1)
SAMPLE_POOL = 21  # random.sample picks from a pool (its draws as _sample makes them) for a population this short
RETRIES = 12
REFRESH_EVERY = 8  # trials between looks at the finished trials (a batch finishes together anyway)
P_SCALE = 0.1  # share of moves that step every index together (gain and bias ratios kept, current scaled)
P_COUPLED = 0.5  # share of multi-parameter moves that step every chosen index by the same amount
P_QUEUED = 0.5  # share of proposals taken from the queue of incumbents' neighbours while it lasts
SWEEP_SAME_SIGN = 3  # a sweep steps every group of up to this many indices together (and all of them)
NEAR_FRONT = 0.03  # designs missing the front by less than this share of its span per objective are swept too
STALLED = 800  # trials the best design stands before it is swept wider (_sweep_wide)
UNEVEN_STEPS = (2, 3, 4)  # the wide sweep's longer step of a pair (the other index steps 1 the other way)


class NeighbourSampler(BaseSampler):
    """Propose neighbours (along ordered indices) of the best and the front designs.

    ``rank_key(trial)`` orders finished trials best first; ``group_params(params)`` gives the
    parameters (with their distributions) of the conditional group that ``params`` chose (the
    topology): the same dict for the same group, and chosen by categorical parameters only.
    """

    def __init__(
        self,
        rank_key: Callable[[FrozenTrial], tuple],
        directions: list[str],
        group_params: Callable[[dict[str, Any]], dict[str, BaseDistribution]],
        seed: int | None = None,
    ) -> None:
        self._py = random.Random(seed)
        self._random = RandomSampler(seed=seed)
        self._rank_of = rank_key
        self._ranks: dict[int, tuple] = {}
        self._directions = directions
        self._group_params = group_params
        self._plans: dict[int, dict[str, Any]] = {}
        self._seen: set[frozenset] = set()
        self._next_refresh = 0
        self._elite: list[FrozenTrial] = []
        self._front: list[FrozenTrial] = []
        self._front_values = np.empty((0, len(self._directions)))  # the front's objective values, row per trial
        self._crowding: list[float] = []  # cumulative parent weights along the front: its gaps and ends first
        self._queue: list[dict[str, Any]] = []
        self._low = 0  # every trial numbered below is finished and folded in (or not complete)
        self._counted: set[int] = set()  # completed trials numbered _low and up, folded in already
        self._swept: set[frozenset] = set()
        self._swept_wide: set[frozenset] = set()
        self._best_key: frozenset | None = None  # the best design's key, and the trial number it was first best at
        self._best_since = 0
        self._shapes: dict[tuple[str, ...], _Shape] = {}
        self._shapes_of: dict[int, tuple[dict[str, BaseDistribution], _Shape]] = {}  # by id of a group's space
        self._groups: dict[int, tuple[str, ...]] = {}  # a finished trial's group (parameter names), by trial id
        self._with: dict[tuple[str, Any], FrozenTrial | None] = {}  # _best_with, until the next refresh
        self._mates: dict[tuple[str, ...], list[FrozenTrial]] = {}  # the elite of each group, until the next refresh

    # ---- Optuna's interface --------------------------------------------------------------
    def infer_relative_search_space(self, study: Study, trial: FrozenTrial) -> dict[str, BaseDistribution]:
        return {}

    def sample_relative(
        self, study: Study, trial: FrozenTrial, search_space: dict[str, BaseDistribution]
    ) -> dict[str, Any]:
        return {}

    def before_trial(self, study: Study, trial: FrozenTrial) -> None:
        if "fixed_params" in trial.system_attrs:
            self._seen.add(self._key(trial.system_attrs["fixed_params"]))
            return
        if trial.params:  # made with every parameter given (next_trial): nothing left to plan
            return
        plan = self._plan(study, trial.number)
        if plan:
            self._plans[trial_id(trial)] = plan

    def next_trial(self, study: Study, number: int) -> FrozenTrial:
        """The trial to be numbered ``number``, not made yet (state RUNNING, every parameter
        and its distribution given): the plan :meth:`before_trial` would make for it, the
        rest drawn as :meth:`sample_independent` draws them, in the order the search space
        asks for them (a group's parameters in order, the one that picks the group first). The
        search makes it in one storage write (a journal's one record, not one per parameter);
        :meth:`before_trial` then leaves it be. The same parameters as the trial would get
        asked without them, for the same sampler state and number."""
        plan = self._plan(study, number)
        made = create_trial(state=TrialState.RUNNING)
        params, distributions = made.params, made.distributions
        for name, d in asked_in_order(self._group_params, params):
            distributions[name] = d
            if d.single():  # as Optuna's trial does: its one value, the sampler not asked
                params[name] = d.low if isinstance(d, IntDistribution) else d.choices[0]
            elif name in plan and _fits(d, plan[name]):
                params[name] = plan[name]
            else:
                params[name] = self._random.sample_independent(study, made, name, d)
        return made

    def sample_independent(
        self, study: Study, trial: FrozenTrial, param_name: str, param_distribution: BaseDistribution
    ) -> Any:
        plan = self._plans.get(trial_id(trial), {})
        if param_name in plan and _fits(param_distribution, plan[param_name]):
            return plan[param_name]
        return self._random.sample_independent(study, trial, param_name, param_distribution)

    def after_trial(self, study: Study, trial: FrozenTrial, state: TrialState, values: list[float] | None) -> None:
        self._plans.pop(trial_id(trial), None)
        self._seen.add(self._key(trial.params))

    def _plan(self, study: Study, number: int) -> dict[str, Any]:
        """The parameters proposed for trial ``number`` ({}: all drawn at random)."""
        if number >= self._next_refresh:
            self._refresh(study)
            self._next_refresh = number + REFRESH_EVERY
            if self._elite:
                self._watch_best(number)
        return self._propose() if self._elite else {}

    # ---- the elite and the front ---------------------------------------------------------
    def _finished_since(self, study: Study) -> list[FrozenTrial]:
        """The trials completed since the last look, in number order, reading only the
        trials from the first one not yet finished (no rescan of the whole study)."""
        new, settled = [], True
        for t in trials_from(study_storage(study), study_id(study), self._low):
            if t.state == TrialState.COMPLETE and trial_id(t) not in self._counted:
                new.append(t)
                self._counted.add(trial_id(t))
            if settled and t.state.is_finished():
                self._low = t.number + 1
                self._counted.discard(trial_id(t))
            else:
                settled = False
        return new

    def _refresh(self, study: Study) -> None:
        """Fold the trials finished since the last look into the elite and the front."""
        new = self._finished_since(study)
        if not new:
            return
        for t in new:
            self._seen.add(self._key(t.params))
        self._with.clear()
        self._mates.clear()
        self._elite = sorted(self._elite + new, key=self._rank_key)[:ELITE_SIZE]
        joined = [t for t in new if self._rank_key(t)[0] == 0]  # feasible designs new this refresh
        centres = self._elite[:1]
        if joined:  # the front's values are kept as an array beside it: no pass over the front's trials
            values = np.vstack([self._front_values, np.array([t.values for t in joined], dtype=float)])
            keep = pareto_mask(values, self._directions)
            kept_new = keep[len(self._front) :]
            if not keep[: len(self._front)].all() or kept_new.any():  # the front changed
                self._front = [t for t, k in zip(self._front + joined, keep) if k]
                self._front_values = values[keep]
                # cumulative weights, as random.choices would sum them on every draw (the same draws)
                self._crowding = list(itertools.accumulate(_crowding_distance(self._front_values)))
        if self._front:  # the front's two ends (they bound its hypervolume) and every point new on it
            first = self._front_values[:, 0]
            low, high = int(np.argmin(first)), len(first) - 1 - int(np.argmax(first[::-1]))  # as a stable sort's ends
            off = [t for t, k in zip(joined, kept_new) if not k] if joined else []
            near = [t for t, k in zip(off, self._near_front(off)) if k] if off else []
            on_front_new = [t for t, k in zip(joined, kept_new) if k] if joined else []
            centres += near + [self._front[low], self._front[high]] + on_front_new
        for centre in reversed(centres):  # queued first: the best design's, then the front's, then near it
            self._sweep(dict(centre.params))

    def _near_front(self, trials: list[FrozenTrial]) -> np.ndarray:
        """Which of ``trials`` (feasible, off the front) miss it by less than NEAR_FRONT of
        the front's span on every objective: the path to the front's next stretch often
        runs through such designs."""
        sign = np.array([1.0 if d == "minimise" else -1.0 for d in self._directions])
        front = self._front_values * sign
        span = front.max(axis=0) - front.min(axis=0)
        shifted = np.array([t.values for t in trials]) * sign - NEAR_FRONT * span
        return ~np.any(np.all(front[None, :, :] <= shifted[:, None, :], axis=2), axis=1)

    def _sweep(self, params: dict[str, Any]) -> None:
        """Queue every untried neighbour of ``params`` one step away (+-1) along each index,
        each pair of indices (both ways, or one up and one down), each SWEEP_SAME_SIGN group
        stepped together and all of them together, once per centre, ahead of the queue:
        the newest centres are followed first (a front's moving end is chased, not left
        behind a backlog)."""
        key = self._key(params)
        if key in self._swept:
            return
        self._swept.add(key)
        names = list(self._steppable(params))
        groups = [g for size in range(1, SWEEP_SAME_SIGN + 1) for g in itertools.combinations(names, size)]
        if len(names) > SWEEP_SAME_SIGN:
            groups.append(tuple(names))
        moves = [{n: s for n in group} for group in groups for s in (-1, 1)]
        moves += [{a: s, b: -s} for a, b in itertools.combinations(names, 2) for s in (-1, 1)]
        self._queue_moves(params, moves)

    def _watch_best(self, number: int) -> None:
        """Note when the best design changes; once it has stood for STALLED trials (at trial
        ``number``), sweep it wider."""
        best = self._key(self._elite[0].params)
        if best != self._best_key:
            self._best_key, self._best_since = best, number
        elif number - self._best_since >= STALLED:
            self._sweep_wide(dict(self._elite[0].params))

    def _sweep_wide(self, params: dict[str, Any]) -> None:
        """Queue, once per centre and ahead of the queue, every untried design with one index
        of ``params`` stepped +-1 and another UNEVEN_STEPS the other way (each ordered pair)."""
        key = self._key(params)
        if key in self._swept_wide:
            return
        self._swept_wide.add(key)
        names = self._steppable(params)
        moves = [{a: s, b: -s * k} for a, b in itertools.permutations(names, 2) for s in (-1, 1) for k in UNEVEN_STEPS]
        self._queue_moves(params, moves)

    def _steppable(self, params: dict[str, Any]) -> dict[str, IntDistribution]:
        """The ordered-index parameters of ``params``'s group, with their ranges."""
        return {n: d for n, d in self._group_params(params).items() if isinstance(d, IntDistribution)}

    def _queue_moves(self, params: dict[str, Any], moves: list[dict[str, int]]) -> None:
        """Queue ahead of the others the designs ``params`` + each move (index steps) that stay
        in range and are untried, in the moves' order."""
        bounds = self._steppable(params)
        queued = []
        for move in moves:
            neighbour = {**params, **{n: params.get(n, bounds[n].low) + step for n, step in move.items()}}
            inside = all(bounds[n].low <= neighbour[n] <= bounds[n].high for n in move)
            if inside and self._key(neighbour) not in self._seen:
                queued.append(neighbour)
        self._queue[:0] = queued

    def _propose(self) -> dict[str, Any]:
        while self._queue and self._py.random() < P_QUEUED:
            plan = self._queue.pop(0)
            key = self._key(plan)
            if key not in self._seen:
                self._seen.add(key)
                return plan
        if self._py.random() < P_RANDOM:
            return {}
        for attempt in range(RETRIES):  # steps grow with each try, out of a well-trodden neighbourhood
            plan = self._mutate(dict(self._parent().params), reach=1 + attempt // 3)
            key = self._key(plan)
            if key not in self._seen:
                self._seen.add(key)
                return plan
        return plan

    def _parent(self) -> FrozenTrial:
        if self._front and self._py.random() < PARENT_FROM_FRONT:
            return self._draw(self._front, self._crowding)
        # a tournament of two among the elite, biased to the better
        i, j = self._below(len(self._elite)), self._below(len(self._elite))
        return self._elite[min(i, j)]

    def _draw(self, population: "tuple | list", cum_weights: list[float]) -> Any:
        """``random.choices(population, cum_weights=cum_weights)[0]``: the same draw, without
        its checks of the weights on every call."""
        return population[bisect_right(cum_weights, self._py.random() * cum_weights[-1], 0, len(population) - 1)]

    def _step(self, reach: int) -> int:
        return self._draw(STEPS, _STEP_CUM) * reach * SIGNS[self._below(2)]  # random.choice(SIGNS)'s draw

    def _below(self, n: int) -> int:
        """``random.randrange(n)`` (n > 0), the draw random.choice also makes: the same draw,
        without its argument checks on every call (a proposal makes some fifty)."""
        return self._py._randbelow(n)

    def _sample(self, names: list[str], count: int) -> list[str]:
        """``random.sample(names, count)`` for up to SAMPLE_POOL names: the same draws (the
        standard library's pool selection for a short population), without its checks."""
        n = len(names)
        if n > SAMPLE_POOL or count > 5:  # (a larger count widens the standard library's pool rule)
            return self._py.sample(names, count)
        pool, out = list(names), []
        for i in range(count):
            j = self._py._randbelow(n - i)
            out.append(pool[j])
            pool[j] = pool[n - i - 1]
        return out

    def _shape(self, space: dict[str, BaseDistribution]) -> "_Shape":
        """What a move needs of a group's parameters, worked out once per group (a group's
        parameter names fix their distributions), found by the space's dict itself (the search
        space hands out one per group) before its names."""
        kept = self._shapes_of.get(id(space))
        if kept is not None and kept[0] is space:
            return kept[1]
        names = tuple(space)
        shape = self._shapes.get(names)
        if shape is None:
            shape = self._shapes[names] = _Shape.of(space)
        self._shapes_of[id(space)] = (space, shape)
        return shape

    def _mutate(self, params: dict[str, Any], reach: int = 1) -> dict[str, Any]:
        space = self._group_params(params)
        shape = self._shape(space)
        r = self._py.random()
        if r < P_SWITCH:
            switchable = shape.switchable
            if switchable:
                name = switchable[self._below(len(switchable))]
                choices = [c for c in space[name].choices if c != params[name]]
                params[name] = choices[self._below(len(choices))]
                same = self._best_with(name, params[name])
                if same is not None:  # carry over the best design known with that choice
                    params = {**dict(same.params), name: params[name]}
                return params
        elif r < P_SWITCH + P_CROSSOVER:
            mates = self._mates.get(shape.names)
            if mates is None:
                mates = self._mates[shape.names] = [t for t in self._elite if self._group_of(t) == shape.names]
            if len(mates) > 1:
                mate = mates[self._below(len(mates))]
                for name in space:
                    if self._py.random() < 0.5 and name in mate.params:
                        params[name] = mate.params[name]
                return params
        steppable, low, high = shape.steppable, shape.low, shape.high
        if not steppable:
            return params
        if self._py.random() < P_SCALE:  # every index stepped together: the impedance level scaled
            step = self._step(reach)
            for name in steppable:
                params[name] = min(max(params.get(name, low[name]) + step, low[name]), high[name])
            return params
        count = min(self._draw(MOVE_COUNTS, _MOVE_COUNT_CUM), len(steppable))
        coupled = count > 1 and self._py.random() < P_COUPLED
        step = self._step(reach)
        for name in self._sample(steppable, count):
            if not coupled:
                step = self._step(reach)
            params[name] = min(max(params.get(name, low[name]) + step, low[name]), high[name])
        return params

    def _rank_key(self, trial: FrozenTrial) -> tuple:
        """The caller's rank key, worked out once per finished trial."""
        if trial_id(trial) not in self._ranks:
            self._ranks[trial_id(trial)] = self._rank_of(trial)
        return self._ranks[trial_id(trial)]

    def _best_with(self, name: str, value: Any) -> FrozenTrial | None:
        """The first trial of the elite, then the front, whose parameter ``name`` is ``value``
        (looked up once per refresh)."""
        if (name, value) not in self._with:
            self._with[name, value] = next((t for t in self._elite + self._front if t.params.get(name) == value), None)
        return self._with[name, value]

    def _group_of(self, trial: FrozenTrial) -> tuple[str, ...]:
        """The parameter names of a finished trial's group, worked out once per trial."""
        if trial_id(trial) not in self._groups:
            self._groups[trial_id(trial)] = tuple(self._group_params(trial.params))
        return self._groups[trial_id(trial)]

    @staticmethod
    def _key(params: dict[str, Any]) -> frozenset:
        """A design's parameters, whatever their order (equal sets of name and value pairs)."""
        return frozenset(params.items())


def asked_in_order(
    group_params: Callable[[dict[str, Any]], dict[str, BaseDistribution]], params: dict[str, Any]
) -> Iterator[tuple[str, BaseDistribution]]:
    """(name, distribution) of each parameter a trial asks for, in the order every trial of a
    search asks them (:meth:`NeighbourSampler.next_trial` and SearchSpace.suggest alike): the
    parameters of the group ``params`` chose, in its order, skipping those given; the caller
    puts each value in ``params`` before taking the next. After a categorical value (only a
    choice among categories chooses a group) the group is looked up again and walked afresh."""
    while True:  # each time the group's first parameter not given yet, until none is left
        group = group_params(params)
        for name, d in group.items():
            if name in params:
                continue
            yield name, d
            if isinstance(d, CategoricalDistribution) and group_params(params) is not group:
                break  # the value chose another group
        else:
            return


@dataclass(frozen=True)
class _Shape:
    """A group's parameters as moves see them: the integer ones with more than one value
    (steppable, with their bounds) and the categorical ones with more than one choice."""

    names: tuple[str, ...]
    steppable: list[str]
    low: dict[str, int]
    high: dict[str, int]
    switchable: list[str]

    @classmethod
    def of(cls, space: dict[str, BaseDistribution]) -> "_Shape":
        ints = {n: d for n, d in space.items() if isinstance(d, IntDistribution) and d.high > d.low}
        return cls(
            tuple(space),
            list(ints),
            {n: d.low for n, d in ints.items()},
            {n: d.high for n, d in ints.items()},
            [n for n, d in space.items() if isinstance(d, CategoricalDistribution) and len(d.choices) > 1],
        )


def _crowding_distance(values: np.ndarray) -> list[float]:
    """NSGA-II's crowding distance of each front point (objective gaps to its neighbours,
    normalised per objective); the two ends of each objective get twice the largest, so the
    front is pushed outward and its gaps filled."""
    if len(values) < 3:
        return [1.0] * len(values)
    distance = np.zeros(len(values))
    ends = np.zeros(len(values), dtype=bool)
    for k in range(values.shape[1]):
        order = np.argsort(values[:, k], kind="stable")
        span = values[order[-1], k] - values[order[0], k]
        if span > 0:
            distance[order[1:-1]] += (values[order[2:], k] - values[order[:-2], k]) / span
        ends[order[[0, -1]]] = True
    top = distance[~ends].max() if (~ends).any() and distance[~ends].max() > 0 else 1.0
    distance[ends] = 2.0 * top
    return list(np.maximum(distance, 1e-3 * top))


def _fits(distribution: BaseDistribution, value: Any) -> bool:
    if isinstance(distribution, IntDistribution):
        return isinstance(value, (int, np.integer)) and distribution.low <= value <= distribution.high
    if isinstance(distribution, CategoricalDistribution):
        return value in distribution.choices
    return False
