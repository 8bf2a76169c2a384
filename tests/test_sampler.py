"""NeighbourSampler's front-following proposals: the sweep of a centre (which neighbours,
in bounds, untried, once, newest first), the near-front test, and a whole search that keeps
its budget and its parameter ranges. Expected sets are written out here by brute force."""

from __future__ import annotations

import itertools
from collections.abc import Iterable
from pathlib import Path

import numpy as np
import optuna
import pytest
from optuna.distributions import IntDistribution
from optuna.trial import TrialState

from optimizer.sampler import NEAR_FRONT, STALLED, UNEVEN_STEPS, NeighbourSampler
from optimizer.search import SearchSpace, create_search, run_search, study as study_module, with_search
from optimizer.spec import load_spec
from optimizer.storage import open_storage

SPEC = Path(__file__).resolve().parents[1] / "benchmarks" / "specs" / "bs_e24_split_guitar.yaml"
DISTRIBUTIONS = {n: IntDistribution(0, 5) for n in ("r_a", "r_b", "r_c", "r_d")}


def _sampler(directions: list[str] | None = None) -> NeighbourSampler:
    return NeighbourSampler(lambda t: (0,), directions or ["minimise", "maximise"], lambda p: DISTRIBUTIONS, seed=0)


def _designs_at(centre: dict[str, int], tried: set[tuple[int, ...]], deltas: Iterable[tuple[int, ...]]) -> set:
    """The designs ``centre`` + each delta that lie inside 0..5 and are not tried."""
    points = (tuple(v + d for v, d in zip(centre.values(), delta)) for delta in deltas)
    return {p for p in points if all(0 <= v <= 5 for v in p) and p not in tried}


def _one_step(delta: tuple[int, ...]) -> bool:
    """One step (+-1) along: up to three indices moved the same way, all four moved the same way,
    or two moved opposite ways."""
    moved = [d for d in delta if d]
    return bool(moved) and (len(set(moved)) == 1 or len(moved) == 2)


def _expected_neighbours(centre: dict[str, int], tried: set[tuple[int, ...]]) -> set[tuple[int, ...]]:
    return _designs_at(centre, tried, filter(_one_step, itertools.product((-1, 0, 1), repeat=4)))


def _swept(sweep: str, centre: dict[str, int], tried: set[tuple[int, ...]]) -> tuple[NeighbourSampler, list]:
    """A new sampler that has tried ``tried`` and run its ``sweep`` of ``centre``: it, and the
    designs queued (tuples in DISTRIBUTIONS' order; none twice)."""
    sampler = _sampler()
    for point in tried:
        sampler._seen.add(sampler._key(dict(zip(DISTRIBUTIONS, point))))
    getattr(sampler, sweep)(centre)
    queued = [tuple(q[n] for n in DISTRIBUTIONS) for q in sampler._queue]
    assert len(queued) == len(set(queued))
    return sampler, queued


def test_a_sweep_queues_each_untried_neighbour_in_bounds_once_newest_centre_first() -> None:
    centre = {"r_a": 0, "r_b": 3, "r_c": 5, "r_d": 2}  # at both ends of the range on two indices
    tried = {(0, 4, 5, 2), (1, 2, 4, 3)}  # one single step and one mixed step already tried
    sampler, queued = _swept("_sweep", centre, tried)
    assert set(queued) == _expected_neighbours(centre, tried)
    sampler._sweep(dict(centre))  # a centre is swept once
    assert len(sampler._queue) == len(queued)
    other = {"r_a": 2, "r_b": 2, "r_c": 2, "r_d": 2}
    sampler._sweep(other)  # the newer centre's neighbours go ahead of the older ones
    ahead = [tuple(q[n] for n in DISTRIBUTIONS) for q in sampler._queue[: len(sampler._queue) - len(queued)]]
    assert set(ahead) == _expected_neighbours(other, set())
    assert sampler._queue[len(ahead) :] == [dict(zip(DISTRIBUTIONS, p)) for p in queued]


def _uneven_pair(delta: tuple[int, ...]) -> bool:
    """Exactly two indices moved, opposite ways, one by 1 and the other by 2 to 4."""
    moved = sorted((abs(d), d) for d in delta if d)
    return len(moved) == 2 and moved[0][0] == 1 and 2 <= moved[1][0] <= 4 and moved[0][1] * moved[1][1] < 0


def _expected_wide(centre: dict[str, int], tried: set[tuple[int, ...]]) -> set[tuple[int, ...]]:
    return _designs_at(centre, tried, filter(_uneven_pair, itertools.product(range(-4, 5), repeat=4)))


def test_a_wide_sweep_queues_the_uneven_pairs_once() -> None:
    assert UNEVEN_STEPS == (2, 3, 4)  # as _expected_wide writes them out
    centre = {"r_a": 1, "r_b": 3, "r_c": 5, "r_d": 0}
    tried = {(2, 0, 5, 0), (1, 4, 1, 0)}  # (+1, -3) on r_a, r_b; (+1, -4) on r_b, r_c
    sampler, queued = _swept("_sweep_wide", centre, tried)
    assert set(queued) == _expected_wide(centre, tried)
    sampler._sweep_wide(dict(centre))
    assert len(sampler._queue) == len(queued)


def test_the_best_design_is_swept_wide_once_it_has_stood_for_the_stall() -> None:
    sampler = _sampler()
    best = optuna.trial.create_trial(
        values=[1.0, 1.0], params={"r_a": 2, "r_b": 2, "r_c": 2, "r_d": 2}, distributions=DISTRIBUTIONS
    )
    sampler._elite = [best]
    sampler._watch_best(100)
    sampler._watch_best(100 + STALLED - 1)
    assert sampler._queue == []
    sampler._watch_best(100 + STALLED)
    assert {tuple(q[n] for n in DISTRIBUTIONS) for q in sampler._queue} == _expected_wide(best.params, set())
    newer = optuna.trial.create_trial(
        values=[2.0, 2.0], params={"r_a": 3, "r_b": 2, "r_c": 2, "r_d": 2}, distributions=DISTRIBUTIONS
    )
    sampler._queue.clear()
    sampler._elite = [newer]  # a new best design starts its own count
    sampler._watch_best(100 + STALLED + 8)
    sampler._watch_best(100 + 2 * STALLED)
    assert sampler._queue == []


def _trial(values: list[float]) -> optuna.trial.FrozenTrial:
    return optuna.trial.create_trial(values=values, params={"r_a": 0}, distributions={"r_a": DISTRIBUTIONS["r_a"]})


def test_near_front_means_within_a_share_of_the_span_on_every_objective() -> None:
    # minimise current, maximise swing; the front spans 2 (current) by 3 (swing)
    sampler = _sampler()
    sampler._front = [_trial([1.0, 3.0]), _trial([2.0, 5.0]), _trial([3.0, 6.0])]
    sampler._front_values = np.array([t.values for t in sampler._front])  # kept beside the front
    margin = (NEAR_FRONT * 2.0, NEAR_FRONT * 3.0)
    # just behind (2, 5): worse by half the margin on both axes -> near
    close = _trial([2.0 + margin[0] / 2, 5.0 - margin[1] / 2])
    # behind (2, 5) by twice the margin on both axes -> not near
    far = _trial([2.0 + 2 * margin[0], 5.0 - 2 * margin[1]])
    # as much swing as (2, 5) at twice the margin more current: dominated, but no front point
    # has more swing by the margin at less current -> near
    side = _trial([2.0 + 2 * margin[0], 5.0])
    assert sampler._near_front([close, far, side]).tolist() == [True, False, True]


def test_a_search_keeps_its_budget_and_proposes_designs_in_range() -> None:
    spec = with_search(load_spec(SPEC), trials=256, seed=3)
    store = open_storage(None)
    search_id = create_search(spec, store)
    run_search(store, search_id, finish=False)
    trials = optuna.load_study(study_name=search_id, storage=store).get_trials(deepcopy=False)
    assert len(trials) == 256 and all(t.state == TrialState.COMPLETE for t in trials)
    space = SearchSpace.build(spec)
    designs = set()
    for t in trials:
        for name, d in space.distributions(t.params).items():
            value = t.params[name]
            assert d.low <= value <= d.high if isinstance(d, IntDistribution) else value in d.choices
        designs.add(tuple(sorted(t.params.items())))
    assert len(designs) >= 0.99 * len(trials)  # proposals are untried designs (a rare fallback aside)


@pytest.mark.parametrize("where", ["memory", "journal"])
def test_trials_made_with_their_parameters_are_the_trials_asked_one_parameter_at_a_time(
    where: str, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # the planned path (study.ask: the sampler's next_trial, the batch's trials in one storage write)
    # against Optuna's own ask with each parameter suggested and stored on its own, on a
    # spec of three topologies (the topology parameter first, each topology's own group)
    spec = with_search(
        load_spec(Path(__file__).resolve().parents[1] / "specs" / "contact_pickup_buffer.yaml"), trials=320, seed=5
    )

    def searched(name: str) -> list[tuple]:
        store = open_storage(None if where == "memory" else tmp_path / f"{name}.journal")
        search_id = create_search(spec, store)
        run_search(store, search_id, finish=False)
        trials = optuna.load_study(study_name=search_id, storage=store).get_trials(deepcopy=False)
        return [(t.number, t.state, t.params, t.distributions, t.user_attrs["record"]) for t in trials]

    planned = searched("planned")
    if where == "journal":  # the file as Optuna's own journal storage reads it back
        plain = optuna.storages.JournalStorage(
            optuna.storages.journal.JournalFileBackend(str(tmp_path / "planned.journal"))
        )
        read = optuna.load_study(study_name=plain.get_all_studies()[0].study_name, storage=plain).get_trials()
        assert [(t.number, t.state, t.params, t.distributions, t.user_attrs["record"]) for t in read] == planned
    monkeypatch.setattr(study_module, "ask", lambda study, number, count: [(study.ask(), None) for _ in range(count)])
    asked = searched("asked")
    assert len(planned) == 320 and planned == asked
    assert len({t[0] for t in planned if len(t[2]) > 0}) == 320
    assert len({t[2].get("topology") for t in planned}) == 3  # every topology was proposed


def test_a_draw_from_summed_weights_is_random_choices_draw() -> None:
    # the sampler's weighted draw against the standard library's random.choices, same seed
    import random

    from optimizer.sampler import _STEP_CUM, STEP_P, STEPS

    sampler, reference = _sampler(), random.Random(0)
    sampler._py = random.Random(0)
    assert [sampler._draw(STEPS, _STEP_CUM) for _ in range(2000)] == [
        reference.choices(STEPS, STEP_P)[0] for _ in range(2000)
    ]


def test_the_samplers_short_draws_are_the_standard_librarys_draws() -> None:
    # randrange, choice and sample of the standard library's random.Random, same seed, against
    # the sampler's _below, _step's sign and _sample (a short population: the pool rule; and
    # a long one handed on), in one interleaved sequence
    import random

    from optimizer.sampler import SIGNS

    sampler, reference = _sampler(), random.Random(11)
    sampler._py = random.Random(11)
    names = [f"r{k}" for k in range(30)]
    ours, theirs = [], []
    for k in range(3000):
        n, population = 1 + k % 17, names[: 2 + k % 29]
        count = 1 + k % min(6, len(population))
        ours.append((sampler._below(n), SIGNS[sampler._below(2)], sampler._sample(population, count)))
        theirs.append((reference.randrange(n), reference.choice(SIGNS), reference.sample(population, count)))
    assert ours == theirs
