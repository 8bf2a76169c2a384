"""Shared deployments: `stagefit worker` processes and an API server on one PostgreSQL database.

Checks (issue: shared deployments over PostgreSQL):
- two workers and a queue-only API server finish a search with exactly its budget of
  finished trials and the same best score as a single-process run of the same seed and
  budget (1 % on the score);
- a worker killed with SIGKILL mid-search: the search still completes, no finished trial
  is lost, and the killed worker's running trials end FAIL and are retried (Optuna's
  retry callback records the original trial number in the ``failed_trial`` system attr);
- the journal-file default and PostgreSQL give the same ranked result for the same trials;
- Optuna's heartbeat check itself: a trial whose heartbeat stops is failed and queued again.

Heartbeats every second and a 3 s grace period keep the waits short. Every wait has a
deadline and every process is killed in ``finally``. Needs PostgreSQL (tests/pg_fixture.py:
skipped, saying why, where none can be started).
"""

from __future__ import annotations

import contextlib
import json
import os
import re
import signal
import socket
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

import optuna
import pytest
from optuna.trial import TrialState

from optimizer.search import create_search, load_search, open_storage, run_search
from optimizer.spec import parse_spec, spec_to_dict
from optimizer.storage import recover_stale_trials
from pg_fixture import stop_processes

ROOT = Path(__file__).resolve().parent.parent
STAGEFIT = [sys.executable, "-m", "optimizer.cli"]
FAST_HEARTBEAT = {"STAGEFIT_HEARTBEAT_INTERVAL": "1", "STAGEFIT_GRACE_PERIOD": "3"}
pytestmark = [
    pytest.mark.filterwarnings("ignore::optuna.exceptions.ExperimentalWarning"),
    pytest.mark.filterwarnings("ignore:Heartbeat of storage is supposed"),
]
DEADLINE = 240.0  # s: the longest any wait below may take before the test fails

# A small space (E3 resistors over two decades: 7 values a part) in which any sampler stream
# reaches the same best design within the budget, so runs that interleave differently agree.
SPEC = {
    "name": "shared storage check",
    "supply": "12 V",
    "gain": {"target": -8, "tolerance": "1 dB"},
    "source_impedance": 600,
    "load_impedance": "47k",
    "band": ["20 Hz", "20 kHz"],
    "limits": {"swing_min": "4 V", "supply_current_max": "2 mA"},
    "topologies": ["divider_ce"],
    "parts": {"resistor_series": "E3", "resistor_range": ["1k", "100k"]},
    "search": {"trials": 192, "seed": 3, "batch_size": 16},
}


@pytest.fixture(autouse=True)
def _fast_heartbeat(monkeypatch):
    for key, value in FAST_HEARTBEAT.items():
        monkeypatch.setenv(key, value)


def _spec(**search):
    return parse_spec({**SPEC, "search": {**SPEC["search"], **search}})


def _env() -> dict:
    env = {**os.environ, **FAST_HEARTBEAT, "PYTHONPATH": str(ROOT)}
    env.pop("STAGEFIT_API_TOKEN", None)
    return env


def _worker(url: str, log: Path) -> subprocess.Popen:
    return subprocess.Popen(
        [*STAGEFIT, "worker", "--storage", url, "--poll", "0.3"],
        cwd=ROOT,
        env=_env(),
        stdout=log.open("w"),
        stderr=subprocess.STDOUT,
        start_new_session=True,
    )


def _trials(url: str, search_id: str) -> list[optuna.trial.FrozenTrial]:
    return optuna.load_study(study_name=search_id, storage=open_storage(url)).get_trials(deepcopy=False)


def _wait(predicate, what: str, procs: list[subprocess.Popen] = (), timeout: float = DEADLINE):
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        value = predicate()
        if value:
            return value
        time.sleep(0.2)
    pytest.fail(f"timed out after {timeout:.0f} s waiting for {what}")


def _status(url: str, search_id: str) -> str:
    study = optuna.load_study(study_name=search_id, storage=open_storage(url))
    return study.user_attrs.get("status")


def _best_score_single_process(spec) -> float:
    """Reference: the same spec, seed and budget in one process on the journal default."""
    storage = open_storage(None)
    search_id = create_search(spec, storage)
    run_search(storage, search_id)
    return load_search(storage, search_id).candidates[0]["score"]


@contextlib.contextmanager
def _api_server(url: str, log: Path):
    """`stagefit serve --storage URL` queueing only (STAGEFIT_QUEUE_ONLY=1); yields its base URL."""
    env = {**_env(), "STAGEFIT_QUEUE_ONLY": "1"}
    proc = subprocess.Popen(
        [*STAGEFIT, "serve", "--host", "127.0.0.1", "--port", "0", "--storage", url],
        cwd=ROOT,
        env=env,
        stdout=log.open("w"),
        stderr=subprocess.STDOUT,
        start_new_session=True,
    )
    try:

        def address():
            if proc.poll() is not None:
                pytest.fail(f"the API server exited: {log.read_text()[-2000:]}")
            found = re.search(r"serving on (http://127\.0\.0\.1:\d+)/", log.read_text())
            return found and found.group(1)

        yield _wait(address, "the API server to listen", timeout=60)
    finally:
        stop_processes([proc])


def test_two_workers_and_a_queue_only_server_finish_exactly_the_budget(postgres_url, tmp_path):
    spec = _spec()
    procs = []
    with _api_server(postgres_url, tmp_path / "api.log") as base:
        request = urllib.request.Request(
            f"{base}/v1/searches",
            data=json.dumps(spec_to_dict(spec)).encode(),
            headers={"Content-Type": "application/json"},
            method="POST",
        )
        with urllib.request.urlopen(request, timeout=30) as response:
            assert response.status == 202
            search_id = json.load(response)["id"]
        time.sleep(1.0)
        assert _status(postgres_url, search_id) == "queued"  # the server only queues
        try:
            procs = [_worker(postgres_url, tmp_path / f"worker-{i}.log") for i in (1, 2)]
            _wait(lambda: _status(postgres_url, search_id) == "done", "the search to finish", procs)
            with urllib.request.urlopen(f"{base}/v1/searches/{search_id}", timeout=30) as response:
                over_http = json.load(response)
        finally:
            stop_processes(procs)
    trials = _trials(postgres_url, search_id)
    states = [t.state for t in trials]
    assert states.count(TrialState.COMPLETE) == spec.search.trials  # exactly the budget
    assert TrialState.RUNNING not in states
    runners = {t.system_attrs.get("runner") for t in trials if t.state == TrialState.COMPLETE}
    assert len(runners) == 2, f"both workers ran trials: {runners}"
    assert over_http["status"] == "done" and over_http["trials_done"] == spec.search.trials
    shared = load_search(open_storage(postgres_url), search_id).candidates[0]["score"]
    assert shared == pytest.approx(_best_score_single_process(spec), rel=0.01)


def test_a_killed_worker_s_trials_are_failed_and_retried(postgres_url, tmp_path):
    spec = _spec(trials=256)
    storage = open_storage(postgres_url)
    search_id = create_search(spec, storage)
    procs = []
    try:
        victim = _worker(postgres_url, tmp_path / "victim.log")
        other = _worker(postgres_url, tmp_path / "other.log")
        procs = [victim, other]
        victim_runner = f"{socket.gethostname()}:{victim.pid}"

        def victim_mid_batch():
            trials = _trials(postgres_url, search_id)
            done = sum(t.state == TrialState.COMPLETE for t in trials)
            held = [
                t for t in trials if t.state == TrialState.RUNNING and t.system_attrs.get("runner") == victim_runner
            ]
            return done >= 32 and bool(held)

        def victim_frozen_mid_batch():
            # looked at while stopped (SIGSTOP), so it cannot tell its batch between the look and the kill
            victim.send_signal(signal.SIGSTOP)
            if victim_mid_batch():
                return True
            victim.send_signal(signal.SIGCONT)
            return False

        _wait(victim_frozen_mid_batch, "the victim worker to hold running trials mid-search", procs)
        victim.send_signal(signal.SIGKILL)
        victim.wait(timeout=10)
        after_kill = _trials(postgres_url, search_id)
        orphans = {
            t.number
            for t in after_kill
            if t.state == TrialState.RUNNING and t.system_attrs.get("runner") == victim_runner
        }
        finished_before = {t.number: t.values for t in after_kill if t.state == TrialState.COMPLETE}
        assert orphans, "the victim held running trials when it was killed"
        _wait(lambda: _status(postgres_url, search_id) == "done", "the search to finish after the kill", [other])
    finally:
        stop_processes(procs)
    trials = {t.number: t for t in _trials(postgres_url, search_id)}
    complete = [t for t in trials.values() if t.state == TrialState.COMPLETE]
    assert len(complete) == spec.search.trials
    for number, values in finished_before.items():  # no finished trial lost or changed
        assert trials[number].state == TrialState.COMPLETE and trials[number].values == values
    retried_from = {t.system_attrs.get("failed_trial") for t in trials.values()}
    for number in orphans:
        assert trials[number].state == TrialState.FAIL
        assert number in retried_from, f"trial {number} of the killed worker was queued again"
    retries = [t for t in complete if t.system_attrs.get("failed_trial") in orphans]
    assert len(retries) == len(orphans)
    for t in retries:  # a retry runs the killed trial's design again
        original = trials[t.system_attrs["failed_trial"]]
        assert {k: v for k, v in original.params.items()} == {k: t.params[k] for k in original.params}


def test_journal_and_postgres_give_the_same_ranked_result(postgres_url, tmp_path):
    spec = _spec(trials=128, batch_size=32)
    ranked = {}
    for name, url in (("journal", str(tmp_path / "stagefit.journal")), ("postgres", postgres_url)):
        storage = open_storage(url)
        search_id = create_search(spec, storage)
        run_search(storage, search_id)
        result = load_search(storage, search_id)
        ranked[name] = [
            (c["topology"], {r: p["value"] for r, p in c["parts"].items()}, round(c["score"], 9), c["feasible"])
            for c in result.candidates
        ]
    assert ranked["journal"] and ranked["journal"] == ranked["postgres"]


def test_a_trial_whose_heartbeat_stopped_or_never_started_is_failed_and_queued_again(postgres_url):
    # The mechanism the workers rely on, checked on its own: Optuna's RDB heartbeat and its
    # retry callback (configured by optimizer.storage for PostgreSQL URLs), plus our adoption
    # of a trial whose runner died before its first heartbeat.
    storage = open_storage(postgres_url)
    study = optuna.create_study(storage=storage, study_name="heartbeat-check")
    x = {"x": optuna.distributions.FloatDistribution(0, 1)}
    beaten, unbeaten = study.ask(x), study.ask(x)
    storage.record_heartbeat(beaten._trial_id)  # `unbeaten`: its runner died before the first beat
    recover_stale_trials(storage, study)
    assert {t.state for t in study.get_trials(deepcopy=False)} == {TrialState.RUNNING}  # both still fresh

    def both_failed():
        recover_stale_trials(storage, study)
        return all(study.get_trials(deepcopy=False)[t.number].state == TrialState.FAIL for t in (beaten, unbeaten))

    _wait(both_failed, "both trials to be failed", timeout=3 * storage.grace_period + 30)
    retries = study.get_trials(deepcopy=False, states=(TrialState.WAITING,))
    assert sorted(t.system_attrs["failed_trial"] for t in retries) == [beaten.number, unbeaten.number]
    for t in retries:
        assert t.params == study.get_trials(deepcopy=False)[t.system_attrs["failed_trial"]].params
