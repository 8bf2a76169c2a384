"""Incremental state against a from-scratch recomputation on the same trials: the sampler's
elite and front, and the trial tally behind the status (counts and best so far), each
checked against a reference computed here from every trial of the study."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import optuna
import pytest
from optuna.trial import TrialState

from optimizer.sampler import ELITE_SIZE
from optimizer.search import (
    create_search,
    neighbour_sampler,
    rank_key,
    rank_records,
    run_search,
    search_status,
    trial_record,
    with_search,
)
from optimizer.spec import load_spec
from optimizer.storage import open_storage, study_id, tally

SPEC = Path(__file__).resolve().parents[1] / "benchmarks" / "specs" / "bs_e24_split_guitar.yaml"


def _dominates(a: np.ndarray, b: np.ndarray, directions: list[str]) -> bool:
    """a is no worse than b on every objective and better on one (dominance written out)."""
    better = [(x < y) if d == "minimise" else (x > y) for x, y, d in zip(a, b, directions)]
    worse = [(x > y) if d == "minimise" else (x < y) for x, y, d in zip(a, b, directions)]
    return any(better) and not any(worse)


@pytest.fixture(params=["memory", "journal"])
def store(request, tmp_path):
    return open_storage(None if request.param == "memory" else tmp_path / "i.journal")


def test_sampler_elite_and_front_match_a_recomputation_from_every_trial(store) -> None:
    spec = with_search(load_spec(SPEC), trials=640, seed=4)
    made = []

    def keep(space, offset):
        made.append(neighbour_sampler(space, offset))
        return made[-1]

    search_id = create_search(spec, store)
    run_search(store, search_id, sampler=keep, finish=False)
    sampler = made[0]
    study = optuna.load_study(study_name=search_id, storage=store)
    sampler._refresh(study)  # fold in the last batch, as the next ask would
    done = study.get_trials(deepcopy=False, states=(TrialState.COMPLETE,))
    assert len(done) == 640
    # the elite: the best ELITE_SIZE finished trials by the rank key (ties in trial order)
    expected_elite = sorted(done, key=lambda t: (rank_key(t), t.number))[:ELITE_SIZE]
    assert [t.number for t in sampler._elite] == [t.number for t in expected_elite]
    # the front: every feasible trial no other feasible trial dominates (brute force)
    directions = [d for _, d in spec.objective_directions]
    feasible = [t for t in done if trial_record(t)["feasible"]]
    front = {
        t.number
        for t in feasible
        if not any(_dominates(np.array(o.values), np.array(t.values), directions) for o in feasible)
    }
    assert front and {t.number for t in sampler._front} == front


def test_trials_finishing_out_of_order_are_each_folded_in_once(store) -> None:
    """Runners sharing a search tell their trials in any order: one still running holds the
    sampler's low-water mark, and the later ones are not folded in twice."""
    spec = with_search(load_spec(SPEC), trials=64, seed=1)
    search_id = create_search(spec, store, seeds=False)
    run_search(store, search_id, finish=False)
    study = optuna.load_study(study_name=search_id, storage=store)
    from optimizer.search import SearchSpace

    sampler = neighbour_sampler(SearchSpace.build(spec), 0)
    assert len(sampler._finished_since(study)) == 64
    first, second, third = study.ask(), study.ask(), study.ask()
    for t in (first, second, third):
        t.set_user_attr("record", json.dumps({"feasible": False, "total_violation": 1.0, "score": 0.0}))
    study.tell(third, [1.0, 1.0])
    assert [t.number for t in sampler._finished_since(study)] == [third.number]
    study.tell(first, state=TrialState.FAIL)
    assert sampler._finished_since(study) == []
    study.tell(second, [2.0, 2.0])
    assert [t.number for t in sampler._finished_since(study)] == [second.number]
    assert sampler._finished_since(study) == []


def _from_scratch(study: optuna.Study) -> tuple[int, int, int, int | None]:
    """(finished, running, feasible, best trial number) from every trial, as the status was
    computed before: states counted, constraint read, rank_records over every record."""
    trials = study.get_trials(deepcopy=False)
    done = [t for t in trials if t.state == TrialState.COMPLETE]
    records = [{**trial_record(t), "trial": t.number} for t in done if trial_record(t)]
    ranked = rank_records(records)
    return (
        len(done),
        sum(t.state == TrialState.RUNNING for t in trials),
        sum(t.system_attrs.get("constraints:violation", 1.0) <= 0 for t in done),
        ranked[0]["trial"] if ranked else None,
    )


def test_tally_and_status_match_a_recomputation_after_every_batch(store) -> None:
    spec = with_search(load_spec(SPEC), trials=320, seed=2)
    search_id = create_search(spec, store)
    study = optuna.load_study(study_name=search_id, storage=store)
    checked = 0
    while True:
        run_search(store, search_id, max_batches=1, finish=False)
        if checked == 2:  # a runner killed mid-batch: a trial left running, one failed
            study.ask()
            study.tell(study.ask(), state=TrialState.FAIL)
        counted = tally(store, study_id(study), rank_key, lambda a, b: a.params == b.params)
        done, running, feasible, best = _from_scratch(study)
        assert (counted.complete, counted.running, counted.feasible) == (done, running, feasible)
        assert counted.best.number == best
        status = search_status(store, search_id)
        assert (status["trials_done"], status["trials_running"], status["trials_feasible"]) == (done, running, feasible)
        assert status["best"]["trial"] == best
        checked += 1
        if done >= 320 - running:
            break
    assert checked >= 5


def test_running_trials_match_a_recomputation_as_trials_finish_out_of_order(store) -> None:
    """The look for running trials before every batch (storage._running, which reads from the
    first trial not finished at its last look) against every trial's state read afresh, while
    trials are asked, enqueued, popped, told and failed in any order."""
    from optimizer.storage import _running

    study = optuna.create_study(storage=store, directions=["minimize"])

    def check() -> None:
        expected = [t.number for t in study.get_trials(deepcopy=False) if t.state == TrialState.RUNNING]
        assert [t.number for t in _running(store, study)] == expected

    check()
    asked = [study.ask() for _ in range(5)]
    check()
    study.enqueue_trial({"x": 1})  # waiting: not running, and not finished either
    study.tell(asked[0], 1.0)
    study.tell(asked[3], 1.0)
    check()
    study.tell(asked[1], state=TrialState.FAIL)
    check()
    popped = study.ask()  # the waiting trial, now running
    asked += [popped, study.ask()]
    check()
    for t in (asked[2], asked[4], popped):
        study.tell(t, 2.0)
        check()
    study.tell(asked[-1], 3.0)
    check()
    assert _running(store, study) == []
