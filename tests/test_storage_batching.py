"""Storage bookkeeping off the hot path: a journal file written in one append per batch
stays the file Optuna itself reads, and the waiting-trial look answers from its count."""

from __future__ import annotations

import json
import threading
from pathlib import Path

import optuna
import pytest
from optuna.trial import TrialState

from optimizer import storage as storage_module
from optimizer.search import create_search, run_search, with_search
from optimizer.spec import load_spec
from optimizer.storage import batched_writes, open_storage

SPEC = Path(__file__).resolve().parents[1] / "benchmarks" / "specs" / "bs_e96_feedback_line.yaml"


def _plain_optuna(path: Path) -> optuna.storages.BaseStorage:
    """The journal as Optuna's own file backend reads it (the reference reader)."""
    return optuna.storages.JournalStorage(optuna.storages.journal.JournalFileBackend(str(path)))


def _trials(store: optuna.storages.BaseStorage, name: str) -> list[tuple]:
    study = optuna.load_study(study_name=name, storage=store)
    return [
        (t.number, t.state, t.params, t.values, t.user_attrs, t.system_attrs) for t in study.get_trials(deepcopy=False)
    ]


def test_batched_search_reads_back_the_same_in_optuna_and_in_memory(tmp_path, monkeypatch) -> None:
    spec = with_search(load_spec(SPEC), trials=300, seed=3)
    writes: list[int] = []
    original = storage_module._BatchSyncedJournal._write

    def counted(self, lines):
        writes.append(len(lines))
        return original(self, lines)

    monkeypatch.setattr(storage_module._BatchSyncedJournal, "_write", counted)
    path = tmp_path / "s.journal"
    journal = open_storage(path)
    memory = open_storage(None)
    ids = {}
    for name, store in (("journal", journal), ("memory", memory)):
        ids[name] = create_search(spec, store, search_id="same")
        before = len(writes)
        run_search(store, ids[name], finish=False)
        if name == "journal":
            batches = -(-spec.search.trials // spec.search.batch_size)
            # per batch: the new trials, their parameters, their results, the status now and then
            assert len(writes) - before <= 3 * batches + 4
            assert max(writes) >= spec.search.batch_size  # a batch's records went in one write
    # Optuna's own reader of the file (not ours) sees what this process saw
    assert _trials(_plain_optuna(path), "same") == _trials(journal, "same")
    # and the search on the journal made the very same trials as the one in memory
    on_file = [(n, s, p, v, u) for n, s, p, v, u, _ in _trials(journal, "same")]
    in_memory = [(n, s, p, v, u) for n, s, p, v, u, _ in _trials(memory, "same")]
    assert on_file == in_memory and len(on_file) == spec.search.trials


def test_records_in_a_batch_are_seen_here_at_once_and_on_file_when_it_ends(tmp_path) -> None:
    path = tmp_path / "b.journal"
    store = open_storage(path)
    study = optuna.create_study(study_name="b", storage=store)
    size = path.stat().st_size
    with batched_writes(store):
        trial = study.ask()
        trial.suggest_int("x", 0, 9)
        trial.set_user_attr("note", "held")
        assert store.get_trial(storage_module.trial_id(trial)).user_attrs == {"note": "held"}
        assert path.stat().st_size == size  # nothing written yet
        other = _plain_optuna(path)  # another process sees the file as it was
        assert optuna.load_study(study_name="b", storage=other).get_trials() == []
    study.tell(trial, 1.0)
    lines = path.read_bytes()[size:].splitlines()
    assert [json.loads(line)["op_code"] for line in lines][:3] == [4, 5, 8]  # trial, parameter, attribute
    seen = optuna.load_study(study_name="b", storage=_plain_optuna(path)).get_trials()
    assert [(t.params, t.user_attrs, t.values) for t in seen] == [({"x": trial.params["x"]}, {"note": "held"}, [1.0])]


def test_reads_inside_a_batch_see_each_record_of_it_as_it_is_made_another_threads_too(tmp_path) -> None:
    """Inside a batch a read that finds every record of the batch applied returns at once (no
    other process can append meanwhile); a record made since, by this thread or another of the
    process (it joins the batch), is read in as without that shortcut: the same trials as
    Optuna's own replay of the file once the batch is written."""
    path = tmp_path / "t.journal"
    store = open_storage(path)
    study = optuna.create_study(study_name="t", storage=store)
    with batched_writes(store):
        first = study.ask()
        assert store.get_trial(storage_module.trial_id(first)).user_attrs == {}  # read to the batch's end
        assert store.get_trial(storage_module.trial_id(first)).user_attrs == {}  # nothing new: the shortcut
        worker = threading.Thread(target=lambda: study.ask().set_user_attr("by", "thread"))
        worker.start()
        worker.join()
        first.set_user_attr("by", "main")
        seen = [(t.number, t.user_attrs) for t in store.get_all_trials(study._study_id, deepcopy=False)]
        assert seen == [(0, {"by": "main"}), (1, {"by": "thread"})]
    on_file = optuna.load_study(study_name="t", storage=_plain_optuna(path)).get_trials()
    assert [(t.number, t.user_attrs) for t in on_file] == seen


def test_a_batch_cut_short_by_an_error_still_writes_what_this_process_saw(tmp_path) -> None:
    path = tmp_path / "e.journal"
    store = open_storage(path)
    study = optuna.create_study(study_name="e", storage=store)
    with pytest.raises(RuntimeError):
        with batched_writes(store):
            study.ask().set_user_attr("k", 1)
            raise RuntimeError("evaluation failed")
    assert [t.user_attrs for t in optuna.load_study(study_name="e", storage=_plain_optuna(path)).get_trials()] == [
        {"k": 1}
    ]
    study.ask()  # the lock was released: plain writes go on
    assert len(optuna.load_study(study_name="e", storage=_plain_optuna(path)).get_trials()) == 2


@pytest.mark.parametrize("kind", ["memory", "journal"])
def test_waiting_trials_are_found_after_a_look_found_none(tmp_path, kind) -> None:
    path = tmp_path / "w.journal"
    store = open_storage(None if kind == "memory" else path)
    study = optuna.create_study(study_name="w", storage=store)
    study.enqueue_trial({"x": 1})
    assert study.ask().suggest_int("x", 0, 9) == 1
    study.ask()  # none waiting now: answered from the count
    assert store.get_all_trials(storage_module.study_id(study), states=(TrialState.WAITING,)) == []
    # enqueued here, or (journal) by another process writing the same file (its own storage object)
    maker = study if kind == "memory" else optuna.load_study(study_name="w", storage=storage_module._journal(path))
    maker.enqueue_trial({"x": 7})
    assert study.ask().suggest_int("x", 0, 9) == 7


def test_a_journal_written_by_plain_optuna_is_read_and_extended(tmp_path) -> None:
    path = tmp_path / "old.journal"
    old = optuna.create_study(study_name="old", storage=_plain_optuna(path))
    old.enqueue_trial({"x": 4})
    old.optimize(lambda t: t.suggest_int("x", 0, 9) ** 2, n_trials=3)
    store = open_storage(path)
    study = optuna.load_study(study_name="old", storage=store)
    assert [t.value for t in study.get_trials()][0] == 16.0
    with batched_writes(store):
        trial = study.ask()
        study.tell(trial, float(trial.suggest_int("x", 0, 9)))
    assert len(optuna.load_study(study_name="old", storage=_plain_optuna(path)).get_trials()) == 4


@pytest.mark.parametrize("together", [False, True])
def test_a_trial_made_with_its_parameters_is_written_as_optuna_writes_it(tmp_path, together) -> None:
    # our journal's create_new_trial (each distribution's JSON kept per distribution object),
    # and its create_new_trials (the trials of a batch in one append, here in a batch and not),
    # against Optuna's own JournalStorage writing the same template trials one by one: the same records
    from optuna.distributions import CategoricalDistribution, IntDistribution
    from optuna.trial import create_trial

    from optimizer.storage import create_trials

    distributions = {"topology": CategoricalDistribution(["a", "b"]), "a.r_top": IntDistribution(-1, 40)}
    made = []
    for name, store in (
        ("ours", open_storage(tmp_path / "ours.journal")),
        ("optuna", _plain_optuna(tmp_path / "optuna.journal")),
    ):
        study = optuna.create_study(study_name="t", storage=store)
        templates = []
        for values in ({"topology": "a", "a.r_top": 7}, {"topology": "b", "a.r_top": -1}, {"topology": "a"}):
            given = {k: distributions[k] for k in values}
            template = create_trial(state=TrialState.RUNNING, params=values, distributions=given)
            # the same time in both runs (a fixed instant: the runs may straddle a second's boundary)
            template.datetime_start = template.datetime_start.replace(
                year=2026, month=1, day=2, hour=3, minute=4, second=5, microsecond=5
            )
            templates.append(template)
        if name == "ours" and together:
            with batched_writes(store):
                ids = create_trials(store, storage_module.study_id(study), templates[:2])
            ids += create_trials(store, storage_module.study_id(study), templates[2:])
        else:
            ids = [store.create_new_trial(storage_module.study_id(study), template_trial=t) for t in templates]
        assert [store.get_trial(t).params for t in ids] == [t.params for t in templates]
        lines = [json.loads(line) for line in (tmp_path / f"{name}.journal").read_bytes().splitlines()]
        made.append(
            [{k: v for k, v in record.items() if k != "worker_id"} for record in lines if record["op_code"] == 4]
        )
        trials = optuna.load_study(study_name="t", storage=_plain_optuna(tmp_path / f"{name}.journal")).get_trials()
        assert [(t.number, t.params, t.distributions, t.state) for t in trials] == [
            (0, {"topology": "a", "a.r_top": 7}, distributions, TrialState.RUNNING),
            (1, {"topology": "b", "a.r_top": -1}, distributions, TrialState.RUNNING),
            (2, {"topology": "a"}, {"topology": distributions["topology"]}, TrialState.RUNNING),
        ]
    assert made[0] == made[1] and len(made[0]) == 3
    assert list(made[0][0]) == list(made[1][0])  # field for field, in Optuna's order


@pytest.mark.parametrize("batched", [True, False])
def test_a_trial_recorded_in_one_step_reads_back_as_the_calls_one_by_one(tmp_path, batched) -> None:
    # record_trial (attributes in one journal step) against set_user_attr, set_constraint and
    # tell called one by one on Optuna's own journal storage, both read by Optuna's reader
    import contextlib

    from optimizer.storage import record_trial

    seen = []
    for name, store in (("ours", open_storage(tmp_path / "ours.journal")), ("optuna", _plain_optuna(tmp_path / "o.j"))):
        study = optuna.create_study(study_name="r", storage=store, directions=["minimize", "maximize"])
        with batched_writes(store) if batched else contextlib.nullcontext():
            for k in range(3):
                trial = study.ask()
                trial.suggest_int("x", 0, 9)
                if name == "ours":
                    record_trial(study, trial, {"record": f'{{"k": {k}}}'}, {"violation": 0.5 * k}, [k, 2.0 * k])
                else:
                    trial.set_user_attr("record", f'{{"k": {k}}}')
                    trial.set_constraint("violation", 0.5 * k)
                    study.tell(trial, [k, 2.0 * k])
        path = tmp_path / ("ours.journal" if name == "ours" else "o.j")
        seen.append(_trials(_plain_optuna(path), "r"))
        assert [json.loads(line)["op_code"] for line in path.read_bytes().splitlines()][-3:] == [8, 9, 6]
    assert [t[:2] + t[3:] for t in seen[0]] == [t[:2] + t[3:] for t in seen[1]]  # parameters drawn apart
    assert [t[1] for t in seen[0]] == [TrialState.COMPLETE] * 3
    store = open_storage(tmp_path / "nan.journal")
    study = optuna.create_study(study_name="n", storage=store)
    with pytest.raises(ValueError, match="NaN"):
        record_trial(study, study.ask(), {}, {"violation": float("nan")}, [1.0])


def test_a_trial_recorded_in_one_step_in_memory_is_the_calls_one_by_one() -> None:
    # record_trial on the default (in-memory) storage, its attributes in one step
    # (_MemoryStorage.set_trial_attrs), against set_user_attr, set_constraint and tell called
    # one by one on Optuna's own in-memory storage: the same trials, attributes and constraints
    from optimizer.storage import record_trial

    seen = []
    for name, store in (("ours", open_storage(None)), ("optuna", optuna.storages.InMemoryStorage())):
        study = optuna.create_study(study_name="m", storage=store, directions=["minimize", "maximize"])
        for k in range(3):
            trial = study.ask()
            trial.suggest_int("x", 0, 9)
            trial.set_user_attr("given", k)  # kept beside the attributes recorded in one step
            if name == "ours":
                record_trial(
                    study, trial, {"record": f'{{"k": {k}}}', "rank": [k]}, {"violation": 0.5 * k}, [k, 2.0 * k]
                )
            else:
                trial.set_user_attr("record", f'{{"k": {k}}}')
                trial.set_user_attr("rank", [k])
                trial.set_constraint("violation", 0.5 * k)
                study.tell(trial, [k, 2.0 * k])
        seen.append([(t.number, t.state, t.values, t.user_attrs, t.system_attrs) for t in study.get_trials()])
    assert seen[0] == seen[1]
    assert seen[0][2][4]["constraints:violation"] == 1.0 and seen[0][2][3]["rank"] == [2]
    study = optuna.create_study(storage=open_storage(None))
    trial = study.ask()
    with pytest.raises(ValueError, match="NaN"):
        record_trial(study, trial, {}, {"violation": float("nan")}, [1.0])
    study.tell(trial, 1.0)
    with pytest.raises(RuntimeError):  # a finished trial takes no more attributes, as in Optuna's own
        study._storage.set_trial_attrs(trial._trial_id, {"late": 1}, {})


def test_replaying_a_read_in_place_gives_the_trials_optuna_s_own_replay_gives(tmp_path) -> None:
    """Another writer's trials arrive with their attributes and results in one read, and the
    replay applies those to a trial it created or copied in the same read in place (no copy per
    record), while a trial a reader holds from an earlier read never changes. Reference outside the project: Optuna's own replay of the same records, one copy
    per record. Every trial is the same (ids, numbers, states, values, times, parameters,
    distributions, attributes) whether the records come in one read, one by one, or in reads
    of a few; a record on a trial finished already (another writer's, late) changes nothing."""
    from optuna.storages.journal._storage import JournalStorageReplayResult

    path = tmp_path / "r.journal"
    store = open_storage(path)
    search_id = create_search(with_search(load_spec(SPEC), trials=96, seed=2), store)  # seeds: enqueued, popped
    run_search(store, search_id, finish=False)
    study = optuna.load_study(study_name=search_id, storage=store)
    running, failed = study.ask(), study.ask()
    running.set_user_attr("record", "{}")
    study.tell(failed, state=TrialState.FAIL)
    with open(path, "a") as handle:  # late records of another writer on a finished trial
        for late in (
            {"op_code": 8, "trial_id": 0, "user_attr": {"record": "late"}},
            {"op_code": 6, "trial_id": 0, "state": 2, "values": None, "datetime_complete": "2026-01-01T00:00:00"},
        ):
            handle.write(json.dumps({**late, "worker_id": "elsewhere"}) + "\n")
    lines = path.read_bytes().splitlines()

    def replayed(kind: type, size: int) -> list[optuna.trial.FrozenTrial]:
        replay = kind("reader-")
        records = [json.loads(line) for line in lines]
        handed = []  # trials as a reader got them between reads, with what they held then
        for start in range(0, len(records), size):
            replay.apply_logs(iter(records[start : start + size]))
            for t in list(replay._trials.values())[-3:]:
                handed.append((t, (t.state, t.values, dict(t.user_attrs), dict(t.system_attrs), dict(t.params))))
        for t, held in handed:  # a later read changed copies of them, never them
            assert (t.state, t.values, t.user_attrs, t.system_attrs, t.params) == held
        return [replay._trials[t] for t in sorted(replay._trials)]

    expected = replayed(JournalStorageReplayResult, len(lines))
    assert len(expected) == 98 and expected[0].user_attrs["record"] != "late"
    assert {t.state for t in expected} == {TrialState.COMPLETE, TrialState.RUNNING, TrialState.FAIL}
    for size in (len(lines), 1, 3, 7):
        assert replayed(storage_module._SharedDistributions, size) == expected
