"""The journal's replay snapshot: a journal used for many ``--fresh`` runs (each deleting the
last run's search) opens replaying as many records as after one run, and its live searches
come back as Optuna's own JournalStorage replays them from the file (the reference: the same
trials, ids, numbers, states, parameters, values, attributes and times), also while another
process holding the journal open keeps writing; a damaged or stale replay snapshot is not used.
A restored search's trials are built only when first read: a process that runs or deletes one
search builds none of the others', and still writes them back (and lists them) as they are."""

from __future__ import annotations

import json
import logging
from pathlib import Path

import optuna
import pytest

from optimizer import storage as storage_module
from optimizer.search import (
    create_search,
    delete_search,
    list_searches,
    run_search,
    search_status,
    spec_search_id,
    with_search,
)
from optimizer.spec import load_spec
from optimizer.storage import _journal, replay_path, save_replay, save_replay_when_worth
from test_snapshot import _without_clock

SPEC = Path(__file__).resolve().parents[1] / "benchmarks" / "specs" / "bs_e24_split_guitar.yaml"
TRIALS = 48


def _plain(path: Path) -> optuna.storages.JournalStorage:
    """Optuna's own journal storage on the file, replayed from its first record."""
    return optuna.storages.JournalStorage(optuna.storages.journal.JournalFileBackend(str(path)))


def _state(storage: optuna.storages.BaseStorage) -> list:
    """Every live study with every trial (id, number, state, parameters and their
    distributions, values, attributes, times), as the storage answers them."""
    out = []
    for study in sorted(storage.get_all_studies(), key=lambda s: s._study_id):
        trials = [
            (
                t._trial_id,
                t.number,
                t.state,
                t.params,
                t.distributions,
                t.values,
                t.user_attrs,
                t.system_attrs,
                t.intermediate_values,
                t.datetime_start,
                t.datetime_complete,
            )
            for t in storage.get_all_trials(study._study_id, deepcopy=False)
        ]
        out.append((study._study_id, study.study_name, study.directions, study.user_attrs, study.system_attrs, trials))
    return out


def _fresh_runs(path: Path, runs: int) -> None:
    """A search that stays (seed 1) and ``runs`` runs of another spec, each deleting the last
    (as ``stagefit search --fresh`` does), each in a process of its own (a new storage)."""
    kept = with_search(load_spec(SPEC), trials=TRIALS, seed=1)
    storage = _journal(path)
    run_search(storage, create_search(kept, storage), finish=False)
    again = with_search(load_spec(SPEC), trials=TRIALS, seed=0)
    for _ in range(runs):
        storage = _journal(path)
        search_id = spec_search_id(again)
        if any(s.study_name == search_id for s in storage.get_all_studies()):
            delete_search(storage, search_id)
        create_search(again, storage, search_id=search_id)
        run_search(storage, search_id, finish=False)


def _opened(path: Path):
    """The journal as a new process opens and replays it."""
    storage = _journal(path)
    storage.get_all_studies()
    return storage


def test_a_journal_after_many_fresh_runs_replays_as_many_records_as_after_one(tmp_path) -> None:
    """One run, two (the second deletes the first) and five: from the second on, opening the
    journal reads the same records (those after the last deletion), never more than a journal
    that only ever held the live searches."""
    once, twice, often = tmp_path / "once.journal", tmp_path / "twice.journal", tmp_path / "often.journal"
    _fresh_runs(once, 1)
    _fresh_runs(twice, 2)
    _fresh_runs(often, 5)
    assert not replay_path(once).exists()  # nothing deleted: no replay snapshot
    one, two, many = _opened(once), _opened(twice), _opened(often)
    assert many._journal.records_read == two._journal.records_read <= one._journal.records_read
    assert many._replay_result.log_number_read > two._replay_result.log_number_read  # the file holds more
    assert many._replay_result._trials.live() == one._replay_result._trials.live() == 2 * TRIALS
    for path, storage in ((once, one), (twice, two), (often, many)):
        assert _state(storage) == _state(_plain(path))  # the live searches intact
        assert len(_state(storage)) == 2


def test_a_trial_made_after_the_restore_gets_the_id_optunas_replay_gives(tmp_path) -> None:
    """Trial ids count the deleted searches' trials too (Optuna's replay numbers a trial by
    every trial made before it): a restored replay makes the next trial with the same id."""
    path = tmp_path / "ids.journal"
    _fresh_runs(path, 2)
    storage = _opened(path)
    study = optuna.load_study(study_name=storage.get_all_studies()[0].study_name, storage=storage)
    made = study.ask({"x": optuna.distributions.IntDistribution(0, 9)})
    study.tell(made, [1.0] * len(study.directions))
    plain = _plain(path)
    assert made._trial_id == plain.get_all_trials(study._study_id)[-1]._trial_id
    assert _state(_opened(path)) == _state(plain)


def test_a_process_holding_the_journal_keeps_writing_while_another_deletes(tmp_path) -> None:
    """A runner that replayed the journal before the deletion goes on writing its trials; a
    process opening the journal afterwards restores the snapshot and reads the runner's records
    after it, and agrees with Optuna's replay of the whole file."""
    path = tmp_path / "shared.journal"
    holder = _journal(path)
    kept = create_search(with_search(load_spec(SPEC), trials=4 * TRIALS, seed=2), holder)
    run_search(holder, kept, max_batches=1, finish=False)
    other = _journal(path)
    gone = create_search(with_search(load_spec(SPEC), trials=TRIALS, seed=3), other)
    run_search(other, gone, finish=False)
    delete_search(other, gone)
    assert replay_path(path).is_file()
    run_search(holder, kept, finish=False)  # its replay made before the deletion
    later = _opened(path)
    assert 0 < later._journal.records_read < later._replay_result.log_number_read
    assert _state(later) == _state(_plain(path)) == _state(holder)


@pytest.mark.parametrize("damage", ["flipped", "stale"])
def test_a_damaged_or_stale_replay_snapshot_is_not_used(tmp_path, damage) -> None:
    path = tmp_path / "d.journal"
    _fresh_runs(path, 2)
    data = replay_path(path).read_bytes()
    if damage == "flipped":
        at = len(data) - 10
        replay_path(path).write_bytes(data[:at] + bytes([data[at] ^ 0x01]) + data[at + 1 :])
    else:  # the journal rewritten under it (its first record changed)
        journal = path.read_bytes()
        path.write_bytes(journal.replace(b'"op_code":0', b'"op_code": 0', 1))
    storage = _opened(path)
    assert storage._journal.records_read == storage._replay_result.log_number_read  # replayed in full
    assert _state(storage) == _state(_plain(path))


def test_the_replay_snapshot_is_written_once_the_deleted_trials_are_a_quarter_of_the_live_ones(tmp_path) -> None:
    path = tmp_path / "q.journal"
    storage = _journal(path)
    run_search(storage, create_search(with_search(load_spec(SPEC), trials=4 * TRIALS, seed=1), storage), finish=False)
    written = []
    for seed in (2, 3, 4):  # 16 trials each against 192 live: a snapshot once 48 are deleted
        small = create_search(with_search(load_spec(SPEC), trials=16, seed=seed), storage)
        run_search(storage, small, finish=False)
        delete_search(storage, small)
        written.append(replay_path(path).is_file())
    assert written == [False, False, True]
    later = _opened(path)
    assert later._journal.records_read < later._replay_result.log_number_read
    assert _state(later) == _state(_plain(path))


def _built(storage) -> set[int]:
    """The studies whose trials the storage's replay has built (not deferred)."""
    replay = storage._replay_result
    return {sid for sid, ids in replay._study_id_to_trial_ids.items() if ids and sid not in replay._trials.deferred}


def test_a_restored_search_is_built_only_when_read(tmp_path) -> None:
    """Opening a journal restored from its replay snapshot builds no search's trials; reading
    one search (as a run of it does) builds that one alone; the state then agrees with Optuna's
    replay, and a deferred search deleted unbuilt leaves the next trial ids as Optuna gives them."""
    path = tmp_path / "lazy.journal"
    _fresh_runs(path, 2)
    assert save_replay(_opened(path))  # the snapshot now holds both live searches
    storage = _opened(path)
    assert _built(storage) == set() and len(storage._replay_result._trials.deferred) == 2
    first, second = sorted(storage._replay_result._studies)
    assert len(storage.get_all_trials(first, deepcopy=False)) == TRIALS
    assert _built(storage) == {first}
    assert _state(storage) == _state(_plain(path))  # reading every search builds the other one too
    assert _built(storage) == {first, second}

    unread = _opened(path)
    delete_search(unread, unread.get_study_name_from_id(second))  # deferred, deleted unbuilt
    assert _built(unread) == set()
    study = optuna.load_study(study_name=unread.get_study_name_from_id(first), storage=unread)
    made = study.ask({"x": optuna.distributions.IntDistribution(0, 9)})
    study.tell(made, [1.0] * len(study.directions))
    plain = _plain(path)
    assert made._trial_id == plain.get_all_trials(first)[-1]._trial_id
    assert _state(_opened(path)) == _state(plain)


def test_a_run_beside_a_deferred_search_writes_it_back_as_it_was(tmp_path) -> None:
    """A process that restores a journal and runs a new search (writing the listing snapshot as
    it goes) and then deletes it (writing the replay snapshot) builds none of the other
    search's trials: the listing counts it as the full replay does, and the new replay snapshot
    carries its trials' text unchanged."""
    path = tmp_path / "beside.journal"
    _fresh_runs(path, 2)
    assert save_replay(_opened(path))
    before = _opened(path)
    kept = sorted(before._replay_result._studies)[0]
    text = before._replay_result._trials.deferred[kept][0]
    storage = _journal(path)
    listed = [s["id"] for s in list_searches(storage)]  # as `stagefit search` lists them first
    extra = create_search(with_search(load_spec(SPEC), trials=TRIALS, seed=7), storage)
    run_search(storage, extra, finish=False)
    delete_search(storage, extra)
    assert kept not in _built(storage)
    after = _opened(path)
    assert after._replay_result._trials.deferred[kept][0] == text
    assert _state(after) == _state(_plain(path))
    for search_id in listed:  # each search's status from the listing snapshot, as the full replay gives it
        from_snapshot = search_status(_journal(path), search_id)
        assert _without_clock(from_snapshot) == _without_clock(search_status(_plain(path), search_id))


def test_a_journal_kept_for_several_searches_gets_a_replay_snapshot_when_a_search_is_done(
    tmp_path, monkeypatch
) -> None:
    """save_replay_when_worth (what `stagefit search` calls when its search is done): not on a
    journal holding one search, nor with few records past the last snapshot; on a journal
    holding two it writes one, and the next process reads none of their records again."""
    monkeypatch.setattr(storage_module, "REPLAY_TAIL", 100)
    path = tmp_path / "kept.journal"
    first = _journal(path)
    run_search(first, create_search(with_search(load_spec(SPEC), trials=TRIALS, seed=1), first), finish=False)
    assert not save_replay_when_worth(first) and not replay_path(path).exists()  # one search: left as it is
    second = _journal(path)
    run_search(second, create_search(with_search(load_spec(SPEC), trials=TRIALS, seed=2), second), finish=False)
    monkeypatch.setattr(storage_module, "REPLAY_TAIL", 10**6)
    assert not save_replay_when_worth(second)  # too few records past the last snapshot
    monkeypatch.setattr(storage_module, "REPLAY_TAIL", 100)
    assert save_replay_when_worth(second)
    later = _opened(path)
    assert later._journal.records_read == 0 and _built(later) == set()
    assert _state(later) == _state(_plain(path))


def test_a_replay_snapshot_of_the_earlier_layout_is_replayed_in_full(tmp_path, caplog) -> None:
    """A replay snapshot written by an earlier version (one JSON document: no index line) is
    not used and warns nothing: the journal is read in full, and the next snapshot is this layout."""
    path = tmp_path / "old.journal"
    _fresh_runs(path, 2)
    header, _, _ = replay_path(path).read_bytes().partition(b"\n")
    records, offset = json.loads(header)["records"], json.loads(header)["offset"]
    earlier = json.dumps({"next_study": 0, "next_trial": 0, "studies": []}).encode()
    storage_module._write_cache(_journal(path)._journal, replay_path(path), records, offset, earlier)
    with caplog.at_level(logging.WARNING):
        storage = _opened(path)
    assert storage._journal.records_read == storage._replay_result.log_number_read  # read in full
    assert not caplog.records
    assert _state(storage) == _state(_plain(path))


def test_a_deferred_search_another_process_goes_on_with_is_read_whole(tmp_path) -> None:
    """A process that restored a search unbuilt, while another process goes on running it (new
    trials, and its earlier trials' records), reads it whole when it first reads it: the
    snapshot's trials built, then the other process's records applied after them."""
    path = tmp_path / "shared.journal"
    holder = _journal(path)
    kept = create_search(with_search(load_spec(SPEC), trials=4 * TRIALS, seed=2), holder)
    run_search(holder, kept, max_batches=1, finish=False)
    other = create_search(with_search(load_spec(SPEC), trials=TRIALS, seed=3), holder)
    run_search(holder, other, finish=False)
    assert save_replay(holder)
    reader = _opened(path)
    kept_id = reader.get_study_id_from_name(kept)
    assert kept_id not in _built(reader)
    run_search(holder, kept, finish=False)  # the rest of its budget, written by the other process
    trials = reader.get_all_trials(kept_id, deepcopy=False)
    assert len(trials) == 4 * TRIALS
    assert _state(reader) == _state(_plain(path)) == _state(holder)
