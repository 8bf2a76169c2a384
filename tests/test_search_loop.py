"""The search loop's own shortcuts against the plain path they stand for: the rank stored beside
a trial's record and the rank kept by a record's text against ranking.rank_key parsing the
record; a batch's trials asked together against asked one by one; the garbage collector's
threshold raised while a search runs and given back after."""

from __future__ import annotations

import gc
import json
import threading
from pathlib import Path
from types import SimpleNamespace

import optuna
import pytest
from optuna.trial import TrialState

from optimizer.errors import StorageError
from optimizer.search import create_search, delete_search, rank_key, run_search, study as study_module, with_search
from optimizer.spec import load_spec
from optimizer.storage import open_storage

SPEC = Path(__file__).resolve().parents[1] / "specs" / "bench_stock_preamp.yaml"


@pytest.mark.parametrize("limit", [3, 1 << 16])
def test_the_rank_memo_ranks_every_trial_as_rank_key(limit: int, monkeypatch: pytest.MonkeyPatch) -> None:
    store = open_storage(None)
    search_id = create_search(with_search(load_spec(SPEC), trials=400, seed=0), store)
    run_search(store, search_id, finish=False)  # the module's memo, remembered as the search made each record
    trials = optuna.load_study(study_name=search_id, storage=store).get_trials(deepcopy=False)
    done = [t for t in trials if t.state == TrialState.COMPLETE]
    assert len(done) == 400
    monkeypatch.setattr(study_module.RankMemo, "LIMIT", limit)  # a small one is cleared again and again
    fresh, remembered = study_module.RankMemo(rank_key), study_module.RankMemo(rank_key)
    for t in done[::2]:
        remembered.remember(t.user_attrs["record"], json.loads(t.user_attrs["record"]))
    for t in done:
        assert tuple(t.user_attrs[study_module.RANK_KEY_ATTR]) == rank_key(t)  # stored beside the record
        unkeyed = SimpleNamespace(user_attrs={"record": t.user_attrs["record"]})  # stored without it (older)
        assert study_module.ranked(t) == fresh(unkeyed) == remembered(unkeyed) == fresh(unkeyed) == rank_key(t)
    feasible = {rank_key(t)[0] for t in done}
    assert feasible == {0, 1}  # both kinds of key met (feasible by score, infeasible by violation)
    assert study_module.RankMemo(rank_key)(optuna.trial.create_trial(value=1.0)) == rank_key(
        optuna.trial.create_trial(value=1.0)
    )  # a trial without a record
    stored = optuna.trial.create_trial(
        value=1.0, user_attrs={"record": "not JSON", study_module.RANK_KEY_ATTR: [1, 2.5]}
    )
    assert study_module.ranked(stored) == (1, 2.5)  # the stored key: the record is not parsed


@pytest.mark.parametrize("where", ["memory", "journal"])
def test_a_batch_asked_together_makes_the_trials_asked_one_by_one(where: str, tmp_path: Path, monkeypatch) -> None:
    """study.ask(study, number, count), the planned trials made in one storage step, against
    the same search asking one trial at a time (count 1, the plain path): the same trials
    (numbers, states, parameters, values, attributes), the seeds (waiting trials) among them."""
    one_at_a_time = study_module.ask

    def one_by_one(study, number, count=1):
        asked = []
        for _ in range(count):
            asked += one_at_a_time(study, number, 1)
            number = max(number, asked[-1][0].number + 1)
        return asked

    seen = []
    for plain in (False, True):
        if plain:
            monkeypatch.setattr(study_module, "ask", one_by_one)
        store = open_storage(None if where == "memory" else tmp_path / f"{plain}.journal")
        search_id = create_search(with_search(load_spec(SPEC), trials=300, seed=1), store)
        run_search(store, search_id, finish=False)
        trials = optuna.load_study(study_name=search_id, storage=store).get_trials(deepcopy=False)
        seen.append([(t.number, t.state, t.params, t.values, t.user_attrs) for t in trials])
        assert any("fixed_params" in t.system_attrs for t in trials)  # seeds were asked too
    assert len(seen[0]) == 300 and seen[0] == seen[1]


def test_the_collector_passes_less_often_while_searches_run_and_its_threshold_comes_back() -> None:
    before = gc.get_threshold()
    seen = []

    def sampler(space, seed_offset):  # made inside run_search
        seen.append(gc.get_threshold())
        return study_module.neighbour_sampler(space, seed_offset)

    store = open_storage(None)
    search_id = create_search(with_search(load_spec(SPEC), trials=40, seed=0), store)
    run_search(store, search_id, finish=False, sampler=sampler)
    assert seen == [(max(before[0], study_module.LOOP_GC_THRESHOLD), *before[1:])]
    assert gc.get_threshold() == before
    # searches overlapping in threads: raised while any runs, the first one's value back after the last
    entered, leave = threading.Barrier(3), threading.Event()

    def search() -> None:
        with study_module.fewer_collections():
            entered.wait()
            leave.wait()

    threads = [threading.Thread(target=search) for _ in range(2)]
    for th in threads:
        th.start()
    entered.wait()
    assert gc.get_threshold()[0] == max(before[0], study_module.LOOP_GC_THRESHOLD)
    leave.set()
    for th in threads:
        th.join()
    assert gc.get_threshold() == before


@pytest.mark.parametrize("recreated", [False, True], ids=["deleted", "deleted-and-made-again"])
def test_a_search_deleted_by_another_process_while_it_runs_stops_with_a_storage_error(
    recreated: bool, tmp_path: Path
) -> None:
    """Another process deletes the search after the runner's first batch (and, as a `--fresh`
    run does, makes a search of the same id again): the runner stops with a StorageError that
    names the search, not a bare KeyError (the CLI's 'internal error')."""
    journal = tmp_path / "s.journal"
    spec = with_search(load_spec(SPEC), trials=600, seed=1)
    runner = open_storage(journal)
    search_id = create_search(spec, runner)

    batches = []

    def another_process_deletes() -> bool:  # asked before each batch, outside its claim and writes
        batches.append(len(batches))
        if len(batches) == 2:
            other = open_storage(journal)  # its own replay of the file, as another process's
            delete_search(other, search_id)
            if recreated:
                create_search(spec, other, search_id=search_id)
        return False

    with pytest.raises(StorageError, match=f"search {search_id} was deleted by another process"):
        run_search(runner, search_id, should_stop=another_process_deletes)
