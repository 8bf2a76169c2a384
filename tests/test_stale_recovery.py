"""Stale-trial recovery has one home (optimizer/storage.py: recover_stale_trials), and the
CLI and the workers use it as the server's job pool does: a trial left running by a
process that died is failed and asked again, so a resumed search finishes its budget."""

from __future__ import annotations

import optuna
import pytest
import yaml
from optuna.trial import TrialState

from optimizer.cli import EXIT_OK, main
from optimizer.errors import InputError
from optimizer.search import create_search, run_search, search_status, spec_search_id, with_search
from optimizer.spec import parse_spec
from optimizer.storage import open_storage, recover_stale_trials, stale_after_seconds
from optimizer.worker import work_once

SPEC = {
    "name": "stale check",
    "supply": "15 V",
    "gain": {"target": -30, "tolerance": "2 dB"},
    "source_impedance": "2k2",
    "load_impedance": "22k",
    "band": ["20 Hz", "20 kHz"],
    "limits": {"swing_min": "4 V", "supply_current_max": "2 mA"},
    "parts": {"catalog": "bench_stock", "in_stock_only": True, "resistor_series": "E12"},
    "topologies": ["divider_ce"],
    "search": {"trials": 96, "seed": 2, "batch_size": 32},
}


def _orphaned(storage, search_id: str) -> int:
    """One batch run, then a trial asked and never told, as a killed process leaves it."""
    run_search(storage, search_id, max_batches=1, finish=False)
    return optuna.load_study(study_name=search_id, storage=storage).ask().number


def test_recovery_by_age_fails_only_old_trials(tmp_path) -> None:
    storage = open_storage(tmp_path / "a.journal")
    search_id = create_search(parse_spec(SPEC), storage)
    orphan = _orphaned(storage, search_id)
    assert recover_stale_trials(storage, search_id) == (0, 0)  # no age given: nothing judged stale
    assert recover_stale_trials(storage, search_id, 3600.0) == (0, 1)  # young: another runner's, kept
    assert recover_stale_trials(storage, search_id, 0.0) == (1, 0)
    trials = optuna.load_study(study_name=search_id, storage=storage).get_trials()
    assert trials[orphan].state == TrialState.FAIL


def test_the_cli_asks_a_dead_runs_trials_again(tmp_path, monkeypatch, capsys) -> None:
    monkeypatch.setenv("STAGEFIT_STALE_AFTER", "0")
    (tmp_path / "spec.yaml").write_text(yaml.safe_dump(SPEC), encoding="utf-8")
    journal = tmp_path / "s.journal"
    spec = with_search(parse_spec(SPEC))
    storage = open_storage(journal)
    search_id = create_search(spec, storage, search_id=spec_search_id(spec))
    orphan = _orphaned(storage, search_id)
    assert main(["search", str(tmp_path / "spec.yaml"), "--storage", str(journal), "--top", "2"]) == EXIT_OK
    status = search_status(storage, search_id)
    assert (status["status"], status["trials_done"], status["trials_running"]) == ("done", 96, 0)
    assert optuna.load_study(study_name=search_id, storage=storage).get_trials()[orphan].state == TrialState.FAIL


def test_a_worker_asks_a_dead_runners_trials_again(tmp_path, monkeypatch) -> None:
    monkeypatch.setenv("STAGEFIT_STALE_AFTER", "0")
    storage = open_storage(tmp_path / "w.journal")
    search_id = create_search(parse_spec(SPEC), storage)
    orphan = _orphaned(storage, search_id)
    for _ in range(4):  # the pass that finds the search held up frees the trial; the next finishes it
        if search_status(storage, search_id)["status"] == "done":
            break
        work_once(storage, should_stop=lambda: False)
    status = search_status(storage, search_id)
    assert (status["status"], status["trials_done"], status["trials_running"]) == ("done", 96, 0)
    assert optuna.load_study(study_name=search_id, storage=storage).get_trials()[orphan].state == TrialState.FAIL


def test_a_bad_stale_age_names_the_variable(monkeypatch) -> None:
    monkeypatch.setenv("STAGEFIT_STALE_AFTER", "soon")
    with pytest.raises(InputError) as error:
        stale_after_seconds()
    assert error.value.problems[0].where == "STAGEFIT_STALE_AFTER"


def test_one_worker_ranks_a_search_whose_trials_ran_out_for_several(tmp_path) -> None:
    """Workers that run out of trials together do not all rank the search (seconds each): the
    first to mark it under the search's claim does; a search extended since is marked anew."""
    from optimizer.search import extend_search, finish_search
    from optimizer.worker import _take_finishing

    storage = open_storage(tmp_path / "f.journal")
    search_id = create_search(parse_spec(SPEC), storage)
    assert not _take_finishing(storage, search_id)  # queued, nothing told yet
    assert run_search(storage, search_id, finish=False) == 96  # the trials this runner told
    assert _take_finishing(storage, search_id)
    assert not _take_finishing(storage, search_id)  # a second worker leaves it
    assert search_status(storage, search_id)["status"] == "running"
    finish_search(storage, search_id)
    assert search_status(storage, search_id)["status"] == "done"
    assert not _take_finishing(storage, search_id)
    extend_search(storage, search_id, 32)
    assert run_search(storage, search_id, finish=False) == 32
    assert _take_finishing(storage, search_id)  # the earlier mark was for the smaller budget
