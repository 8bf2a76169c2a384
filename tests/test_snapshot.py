"""The journal's snapshot: a stored search reopened from its snapshot and the journal's tail
answers as the full replay of the journal does (Optuna's own JournalStorage replay is the
reference), and a snapshot that is missing, damaged, half-written, taken of other bytes or
older than the journal's tail is ignored or brought up to date."""

from __future__ import annotations

import json
import logging
import shutil
from pathlib import Path

import optuna
import pytest

from optimizer.search import (
    cancel_search,
    create_search,
    delete_search,
    list_searches,
    load_search,
    run_search,
    search_status,
    with_search,
)
from optimizer.search.ranking import rank_key
from optimizer.search.study import same_design
from optimizer.spec import load_spec
from optimizer.storage import _journal, journal_summary, save_snapshot, snapshot_path
from test_incremental_state import _from_scratch

SPEC = Path(__file__).resolve().parents[1] / "benchmarks" / "specs" / "bs_e24_split_guitar.yaml"


def _fresh(path: Path):
    """The journal as a new process opens it (nothing replayed yet)."""
    return _journal(path)


def _replayed(path: Path):
    """The journal replayed in full by Optuna's JournalStorage (the reference)."""
    storage = _journal(path)
    storage.get_all_studies()
    assert storage.replayed
    return storage


def _reference(path: Path, search_id: str) -> tuple[dict, list[dict], tuple]:
    """Status and listing through the full replay, and the from-scratch counts and best."""
    storage = _replayed(path)
    study = optuna.load_study(study_name=search_id, storage=storage)
    return search_status(storage, search_id), list_searches(storage), _from_scratch(study)


def _without_clock(status: dict) -> dict:
    """A running search's elapsed time moves with the clock: compared apart."""
    return {k: v for k, v in status.items() if k != "elapsed"}


@pytest.fixture(scope="module")
def finished(tmp_path_factory) -> tuple[Path, str]:
    """A finished search on a journal file (its ranking stored, its snapshot written at the end)."""
    path = tmp_path_factory.mktemp("snap") / "done.journal"
    storage = _journal(path)
    search_id = create_search(with_search(load_spec(SPEC), trials=192, seed=3), storage)
    run_search(storage, search_id)
    return path, search_id


def test_a_finished_search_reopened_from_its_snapshot_equals_the_full_replay(finished) -> None:
    path, search_id = finished
    assert snapshot_path(path).is_file()
    storage = _fresh(path)
    status, listing = search_status(storage, search_id), list_searches(storage)
    assert not storage.replayed  # answered from the snapshot
    expected_status, expected_listing, (done, running, feasible, _) = _reference(path, search_id)
    assert status == expected_status  # a finished search's elapsed time is stored: all of it equal
    assert listing == expected_listing
    assert (status["trials_done"], status["trials_running"], status["trials_feasible"]) == (done, running, feasible)
    summary = journal_summary(storage, rank_key, same_design)
    ranking = summary.studies[summary.study_id(search_id)]["user_attrs"]["ranking"]
    result = load_search(_replayed(path), search_id)  # the candidates, through the full replay
    assert ranking["candidates"] == result.candidates[: len(ranking["candidates"])]
    assert ranking["front"] == result.front
    assert status["best"] == result.candidates[0]


def test_a_snapshot_older_than_the_journal_is_brought_up_to_date(tmp_path) -> None:
    """Snapshot taken right after creation (the seeds waiting), then the search runs, is
    cancelled, and a second search is created and deleted: the tail holds all of it."""
    path = tmp_path / "s.journal"
    storage = _journal(path)
    search_id = create_search(with_search(load_spec(SPEC), trials=256, seed=5), storage)
    save_snapshot(storage, rank_key, same_design)
    old = snapshot_path(path).read_bytes()
    covered = json.loads(old.partition(b"\n")[0])["records"]
    run_search(storage, search_id, max_batches=3, finish=False)
    study = optuna.load_study(study_name=search_id, storage=storage)
    study.ask()  # a runner killed mid-batch: one trial left running, one failed
    study.tell(study.ask(), state=optuna.trial.TrialState.FAIL)
    cancel_search(storage, search_id)
    other = create_search(with_search(load_spec(SPEC), trials=64, seed=1), storage)
    delete_search(storage, other)
    snapshot_path(path).write_bytes(old)  # as if the later snapshots had not been written

    reopened = _fresh(path)
    status, listing = search_status(reopened, search_id), list_searches(reopened)
    assert not reopened.replayed
    summary = journal_summary(reopened, rank_key, same_design)
    assert summary.records > covered  # the tail was read
    expected_status, expected_listing, (done, running, feasible, best) = _reference(path, search_id)
    assert _without_clock(status) == _without_clock(expected_status)
    assert listing == expected_listing
    assert status["status"] == "cancelled" and [s["id"] for s in listing] == [search_id]
    assert (status["trials_done"], status["trials_running"], status["trials_feasible"]) == (done, running, feasible)
    assert running == 1 and status["best"]["trial"] == best


def test_a_running_search_polled_from_its_snapshot_follows_the_journal(tmp_path) -> None:
    """A process polling a search another runner writes reads only what was appended since
    its last poll, and agrees with a from-scratch count after every batch."""
    path = tmp_path / "r.journal"
    runner = _journal(path)
    search_id = create_search(with_search(load_spec(SPEC), trials=192, seed=7), runner)
    save_snapshot(runner, rank_key, same_design)
    poller = _fresh(path)
    for _ in range(3):
        run_search(runner, search_id, max_batches=1, finish=False)
        status = search_status(poller, search_id)
        study = optuna.load_study(study_name=search_id, storage=_replayed(path))
        done, running, feasible, best = _from_scratch(study)
        assert (status["trials_done"], status["trials_running"], status["trials_feasible"]) == (done, running, feasible)
        assert status["best"]["trial"] == best
    assert not poller.replayed


def _truncated(data: bytes) -> bytes:
    return data[: len(data) // 2]  # half-written


def _flipped(data: bytes) -> bytes:
    at = len(data) - 10
    return data[:at] + bytes([data[at] ^ 0x01]) + data[at + 1 :]  # one bit of the payload


def _header_only(data: bytes) -> bytes:
    return data.partition(b"\n")[0]


def _garbage(data: bytes) -> bytes:
    return b"\x00\xff not a snapshot"


@pytest.mark.parametrize("damage", [_truncated, _flipped, _header_only, _garbage])
def test_a_damaged_snapshot_falls_back_to_the_full_replay(finished, tmp_path, damage, caplog) -> None:
    source, search_id = finished
    path = tmp_path / "copy.journal"
    shutil.copy(source, path)
    snapshot_path(path).write_bytes(damage(snapshot_path(source).read_bytes()))
    storage = _fresh(path)
    with caplog.at_level(logging.WARNING, logger="stagefit.storage"):
        assert journal_summary(storage, rank_key, same_design) is None
    assert "damaged or half-written" in caplog.text
    assert search_status(storage, search_id) == _reference(path, search_id)[0]
    assert storage.replayed


def test_a_snapshot_of_other_journal_bytes_is_ignored(finished, tmp_path) -> None:
    """A journal rewritten under its snapshot (cut short, or another journal at the same
    path) no longer holds the bytes the snapshot was taken of: the snapshot is not used."""
    source, search_id = finished
    cut = tmp_path / "cut.journal"
    data = source.read_bytes()
    cut.write_bytes(data[: data.rindex(b"\n", 0, len(data) - 1) + 1])  # its last record gone
    shutil.copy(snapshot_path(source), snapshot_path(cut))
    assert journal_summary(_fresh(cut), rank_key, same_design) is None

    other = tmp_path / "other.journal"
    storage = _journal(other)
    create_search(with_search(load_spec(SPEC), trials=64, seed=3), storage, search_id=search_id)
    run_search(storage, search_id, finish=False)
    storage_bytes = other.read_bytes()
    assert len(storage_bytes) < len(data)
    other.write_bytes(storage_bytes + data[len(storage_bytes) :])  # as long as the first, other bytes
    shutil.copy(snapshot_path(source), snapshot_path(other))
    assert journal_summary(_fresh(other), rank_key, same_design) is None
