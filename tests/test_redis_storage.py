"""The Redis journal (``redis://`` storages, optimizer/redis_journal.py) against a real redis-server.

References outside the project: Optuna's own ``JournalRedisBackend`` reads what ours writes and
the other way round (same key layout), and a search on Redis ranks exactly as the same search
in memory. Skipped where Debian's redis-server is absent, unless CI is set (.ci/run installs it).
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import optuna
import pytest
from optuna.trial import TrialState

from optimizer.search import create_search, load_search, open_storage, rank_key, run_search
from optimizer.search.study import RANK_KEY_ATTR
from optimizer.spec import parse_spec
from pg_fixture import stop_processes
from redis_fixture import ThrowawayRedis

ROOT = Path(__file__).resolve().parent.parent
pytestmark = pytest.mark.filterwarnings("ignore::optuna.exceptions.ExperimentalWarning")
SPEC = {
    "name": "redis storage check",
    "supply": "12 V",
    "gain": {"target": -8, "tolerance": "1 dB"},
    "source_impedance": 600,
    "load_impedance": "47k",
    "band": ["20 Hz", "20 kHz"],
    "limits": {"swing_min": "4 V", "supply_current_max": "2 mA"},
    "topologies": ["divider_ce"],
    "parts": {"resistor_series": "E3", "resistor_range": ["1k", "100k"]},
    "search": {"trials": 96, "seed": 3, "batch_size": 16},
}


@pytest.fixture(scope="module")
def redis_url():
    server = ThrowawayRedis()
    if server.binary is None:
        if os.environ.get("CI"):
            pytest.fail("redis-server required in CI (.ci/run installs Debian's redis-server)")
        pytest.skip("no redis-server on this machine (Debian: apt-get install redis-server)")
    url = server.start()
    try:
        yield url
    finally:
        server.stop()


def _db(url: str, number: int) -> str:
    return url.rsplit("/", 1)[0] + f"/{number}"


def test_records_read_back_by_optuna_s_own_backend_and_the_other_way(redis_url):
    from optimizer.redis_journal import READ_CHUNK, RedisJournal

    ours = RedisJournal(_db(redis_url, 1), prefix="t")
    theirs = optuna.storages.journal.JournalRedisBackend(_db(redis_url, 1), prefix="t")
    batch = [{"op_code": 0, "worker_id": "w", "n": i, "text": 'é\n"quoted"'} for i in range(READ_CHUNK + 5)]
    ours.append_logs(batch[:3])
    ours.append_logs(batch[3:])  # two appends, more records than one read chunk
    theirs.append_logs([{"op_code": 1, "worker_id": "x", "n": -1}])
    expected = batch + [{"op_code": 1, "worker_id": "x", "n": -1}]
    assert list(theirs.read_logs(0)) == expected
    assert list(ours.read_logs(0)) == expected
    assert list(ours.read_logs(READ_CHUNK + 4)) == expected[READ_CHUNK + 4 :]
    assert list(ours.read_logs(len(expected))) == []
    assert list(RedisJournal(_db(redis_url, 1), prefix="empty").read_logs(0)) == []


def test_deferred_records_beyond_one_read_chunk_are_skipped_and_the_rest_read_in_server_order(redis_url):
    """A batch that defers more records than one read returns: the records it handed over
    already are skipped across both reads, another writer's record numbered before them is
    read, and a fresh reader (Optuna's own JournalRedisBackend, the reference) sees every
    record once, in the server's order."""
    from optimizer.redis_journal import READ_CHUNK, RedisJournal

    url = _db(redis_url, 9)
    ours, theirs = RedisJournal(url, prefix="c"), RedisJournal(url, prefix="c")
    mine = [{"op_code": 8, "worker_id": "w", "trial_id": 0, "user_attr": {"k": i}} for i in range(READ_CHUNK + 10)]
    other = [{"op_code": 8, "worker_id": "x", "trial_id": 1, "user_attr": {"k": -1}}]
    ours.open_batch()
    ours.append_logs(mine)
    assert list(ours.read_logs(0)) == mine  # handed over at once, nothing read from the server
    theirs.append_logs(other)  # numbered 0 on the server, before the batch's records
    ours.close_batch()
    assert list(ours.read_logs(len(mine))) == other  # read once, the batch's records not again
    later = [{"op_code": 9, "worker_id": "x", "trial_id": 1, "system_attr": {"s": 'é,"]'}}]
    theirs.append_logs(later)
    assert list(ours.read_logs(len(mine) + 1)) == later
    expected = other + mine + later
    assert list(optuna.storages.journal.JournalRedisBackend(url, prefix="c").read_logs(0)) == expected
    assert list(theirs.read_logs(0)) == expected


def test_a_record_numbered_but_not_written_yet_is_waited_for(redis_url):
    """Optuna's own writer numbers a record (INCR) before it writes it (SET): a read that
    reaches the number first waits for the record rather than skipping it."""
    import threading

    from optimizer.redis_journal import RedisJournal

    url = _db(redis_url, 10)
    ours = RedisJournal(url, prefix="g")
    ours.append_logs([{"op_code": 0, "worker_id": "w", "n": 0}])
    assert ours.client.incr("g:log_number") == 1  # numbered, its value not set yet
    writer = threading.Timer(0.2, lambda: ours.client.set("g:log:1", '{"op_code":1,"worker_id":"x","n":1}'))
    writer.start()
    try:
        assert list(RedisJournal(url, prefix="g").read_logs(0)) == [
            {"op_code": 0, "worker_id": "w", "n": 0},
            {"op_code": 1, "worker_id": "x", "n": 1},
        ]
    finally:
        writer.join()


def test_a_search_on_redis_ranks_as_the_same_search_in_memory(redis_url):
    spec = parse_spec(SPEC)
    ranked = {}
    for name, url in (("memory", None), ("redis", _db(redis_url, 2))):
        storage = open_storage(url)
        search_id = create_search(spec, storage)
        run_search(storage, search_id)
        ranked[name] = [
            (c["topology"], {r: p["value"] for r, p in c["parts"].items()}, round(c["score"], 9), c["feasible"])
            for c in load_search(storage, search_id).candidates
        ]
    assert ranked["memory"] and ranked["memory"] == ranked["redis"]


def test_the_claim_excludes_a_second_holder_until_released(redis_url):
    from optimizer.redis_journal import RedisJournal, redis_claim

    one, other = RedisJournal(_db(redis_url, 3)), RedisJournal(_db(redis_url, 3))
    with redis_claim(one, "s1"):
        rival = other.client.lock(":claim:s1", timeout=5)
        assert not rival.acquire(blocking=False)
    assert rival.acquire(blocking=False)
    rival.release()


def test_a_waiting_claim_is_taken_when_released_and_a_dead_holder_s_claim_lapses(redis_url):
    """A runner waiting on a held claim (blocked on its wake-up list) takes it once the holder
    lets go, never before; the wake-up list keeps one token at most; a claim whose holder died
    (no token put) is taken once it expires."""
    import threading

    from optimizer.redis_journal import RedisJournal, redis_claim

    one, other = RedisJournal(_db(redis_url, 11)), RedisJournal(_db(redis_url, 11))
    order: list[str] = []

    def wait() -> None:
        with redis_claim(other, "s2"):
            order.append("other")

    with redis_claim(one, "s2"):
        waiter = threading.Thread(target=wait)
        waiter.start()
        waiter.join(0.3)  # a chance to block on the held claim
        order.append("one")
    waiter.join()
    assert order == ["one", "other"]
    for _ in range(3):
        with redis_claim(one, "s2"):
            pass
    assert one.client.llen(":claim:s2:free") == 1
    one.client.set(":claim:s3", "a runner that died", px=300)
    with redis_claim(other, "s3"):
        assert other.client.get(":claim:s3") != b"a runner that died"
    assert other.client.get(":claim:s3") is None


def test_two_worker_processes_finish_exactly_the_budget(redis_url, tmp_path):
    url = _db(redis_url, 4)
    spec = parse_spec({**SPEC, "search": {**SPEC["search"], "trials": 128, "batch_size": 8}})
    search_id = create_search(spec, open_storage(url))
    logs = [tmp_path / f"worker-{i}.log" for i in (1, 2)]
    procs = [
        subprocess.Popen(
            [sys.executable, "-m", "optimizer.cli", "worker", "--storage", url, "--once", "--poll", "0.2"],
            cwd=ROOT,
            stdout=log.open("w"),
            stderr=subprocess.STDOUT,
            env={**os.environ, "PYTHONPATH": str(ROOT)},
        )
        for log in logs
    ]
    try:
        codes = [p.wait(timeout=600) for p in procs]
    finally:
        stop_processes(procs)
    assert codes == [0, 0], [log.read_text()[-2000:] for log in logs]
    for log in logs:
        assert "Traceback" not in log.read_text(), log.read_text()[-2000:]
    study = optuna.load_study(study_name=search_id, storage=open_storage(url))
    states = [t.state for t in study.get_trials(deepcopy=False)]
    assert states.count(TrialState.COMPLETE) == spec.search.trials  # exactly the budget, never more
    assert TrialState.RUNNING not in states
    assert study.user_attrs["status"] == "done"
    # the rank key each worker stored beside a trial's record, as read by another process (Optuna's own
    # JournalRedisBackend here): the key rank_key computes from the record itself
    fresh = optuna.storages.journal.JournalStorage(optuna.storages.journal.JournalRedisBackend(url))
    done = [t for t in fresh.get_all_trials(study._study_id) if t.state == TrialState.COMPLETE]
    assert {t.system_attrs.get("fixed_params") is None for t in done} == {True, False}  # seeds and planned trials
    assert [tuple(t.user_attrs[RANK_KEY_ATTR]) for t in done] == [rank_key(t) for t in done]


def test_a_storage_url_without_a_port_names_the_field():
    from optimizer.errors import InputError

    with pytest.raises(InputError, match="storage"):
        open_storage("grpc://nohost")


def test_a_killed_worker_s_trials_are_failed_and_the_budget_still_met(redis_url, tmp_path, monkeypatch):
    """SIGKILL a worker mid-search: its running trials are failed once its liveness key lapses
    (grace 3 s here) and another runner finishes exactly the budget."""
    import signal
    import time

    monkeypatch.setenv("STAGEFIT_HEARTBEAT_INTERVAL", "1")
    monkeypatch.setenv("STAGEFIT_GRACE_PERIOD", "3")
    url = _db(redis_url, 5)
    spec = parse_spec({**SPEC, "search": {**SPEC["search"], "trials": 64, "batch_size": 8}})
    storage = open_storage(url)
    search_id = create_search(spec, storage)
    study = optuna.load_study(study_name=search_id, storage=storage)
    # a runner that asks a batch, is recorded as its holder, and dies before telling it
    code = (
        "import os, optuna\nfrom optimizer.storage import open_storage, TrialHeartbeat\n"
        f"s = open_storage({url!r})\nst = optuna.load_study(study_name={search_id!r}, storage=s)\n"
        "hb = TrialHeartbeat(s)\n[hb.add(st.ask()) for _ in range(8)]\nprint('asked', flush=True)\n"
        "os.kill(os.getpid(), 9)"
    )
    done = subprocess.run(
        [sys.executable, "-c", code],
        cwd=ROOT,
        capture_output=True,
        text=True,
        env={**os.environ, "PYTHONPATH": str(ROOT)},
        timeout=300,
    )
    assert done.returncode == -signal.SIGKILL and "asked" in done.stdout, done.stderr[-2000:]
    assert sum(t.state == TrialState.RUNNING for t in study.get_trials(deepcopy=False)) == 8
    time.sleep(4)  # the dead runner's liveness key lapses
    run_search(storage, search_id)
    states = [t.state for t in study.get_trials(deepcopy=False)]
    assert states.count(TrialState.COMPLETE) == spec.search.trials
    assert states.count(TrialState.FAIL) == 8 and TrialState.RUNNING not in states
    assert study.user_attrs["status"] == "done"


def test_recovery_on_redis_goes_by_the_runners_liveness_not_by_age(redis_url):
    """storage.recover_stale_trials, as the CLI, the server and the workers call it (with an
    age, here 0 s): on Redis a live runner's trials are kept however old, and a dead runner's
    (its liveness key lapsed, 1 s here) are failed, and one whose holder is not recorded is
    kept; it returns (failed, still running)."""
    import time

    from optimizer.redis_journal import RedisJournal, RunnerLiveness
    from optimizer.storage import TrialHeartbeat, recover_stale_trials, trial_id

    url = _db(redis_url, 6)
    storage = open_storage(url)
    search_id = create_search(parse_spec(SPEC), storage)
    study = optuna.load_study(study_name=search_id, storage=storage)
    gone = RunnerLiveness(RedisJournal(url), "gone:1", 1)
    with TrialHeartbeat(storage) as heartbeat:
        live = [heartbeat.add(study.ask()).number for _ in range(2)]
        dead = [study.ask() for _ in range(3)]
        for trial in dead:
            gone.hold(trial_id(trial))
        unheld = study.ask()  # no holder recorded (yet): kept
        time.sleep(1.5)
        assert recover_stale_trials(storage, search_id, 0.0) == (3, 3)
        states = [t.state for t in study.get_trials(deepcopy=False)]
    assert [states[n] for n in live] == [TrialState.RUNNING] * 2
    assert [states[t.number] for t in dead] == [TrialState.FAIL] * 3
    assert states[unheld.number] == TrialState.RUNNING


def test_a_batch_s_held_trials_are_recorded_together_when_it_closes(redis_url):
    """RunnerLiveness.hold inside a batch sends nothing until the batch closes; then every
    trial held in it has this runner as its holder, and the runner's liveness key is set with
    the grace as its expiry, in two commands whatever the batch's size; trials held after that
    go with the next batch, and a hold outside a batch is recorded at once."""
    from optimizer.redis_journal import RedisJournal, RunnerLiveness

    journal = RedisJournal(_db(redis_url, 12), prefix="h")
    client = journal.client
    here = RunnerLiveness(journal, "here:1", 30)
    sent = []
    journal.open_batch()
    for trial_id_ in (11, 12, 13):
        here.hold(trial_id_)
    assert client.hgetall("h:holder") == {} and client.get("h:alive:here:1") is None
    pipeline = client.pipeline

    def counted(**kwargs):  # the commands of the batch's pipeline, as sent
        pipe = pipeline(**kwargs)
        execute = pipe.execute
        pipe.execute = lambda: (sent.extend(pipe.command_stack), execute())[1]
        return pipe

    client.pipeline = counted
    journal.close_batch()
    assert client.hgetall("h:holder") == {b"11": b"here:1", b"12": b"here:1", b"13": b"here:1"}
    assert 0 < client.ttl("h:alive:here:1") <= 30
    assert len(sent) == 2
    journal.open_batch()
    here.hold(14)
    journal.close_batch()
    here.hold(15)  # outside a batch
    assert set(client.hgetall("h:holder")) == {b"11", b"12", b"13", b"14", b"15"}


def _trials(storage: optuna.storages.BaseStorage, name: str) -> list[tuple]:
    study_id = storage.get_study_id_from_name(name)
    return [
        (t._trial_id, t.number, t.state, t.values, t.params, t.user_attrs)
        for t in storage.get_all_trials(study_id, deepcopy=False)
    ]


def test_a_batch_defers_its_trial_records_and_every_reader_replays_the_same_trials(redis_url):
    """Inside batched_writes a runner's records of its own trials (parameters, attributes,
    results) are sent in one append when the batch closes, and nothing is read from the server
    meanwhile, while another process creates and finishes trials in between. Reference outside
    the project: Optuna's own JournalRedisBackend, replaying the server's journal afresh in the
    server's order, sees the same trials (ids, numbers, states, values, parameters, attributes)
    as this runner and as the other process."""
    from optimizer.redis_journal import RedisJournal
    from optimizer.storage import _redis_backends, batched_writes, trial_id

    url = _db(redis_url, 7)
    ours = open_storage(url)
    journal = _redis_backends[ours]
    theirs = optuna.storages.journal.JournalStorage(RedisJournal(url))  # another process's view
    study = optuna.create_study(study_name="defer", storage=ours, directions=["minimize"])
    rival = optuna.load_study(study_name="defer", storage=theirs)
    with batched_writes(ours):
        mine = [study.ask() for _ in range(2)]  # each creation is sent at once
        other = rival.ask()  # the other process creates a trial and finishes it meanwhile
        other.suggest_int("x", 0, 9)
        rival.tell(other, 5.0)
        before = journal.round_trips
        for k, trial in enumerate(mine):
            trial.suggest_int("x", 0, 9)
            trial.set_user_attr("record", {"k": k})
            study.tell(trial, float(k))
        assert journal.round_trips == before  # deferred: nothing sent, nothing read
        assert [t.state for t in study.get_trials(deepcopy=False)[:2]] == [TrialState.COMPLETE] * 2
        mine.append(study.ask())  # a creation after deferred records: they go with it, in one append
        assert journal.round_trips == before + 1
        rival.tell(rival.ask(), 7.0)  # more of the other process's records before the batch closes
        mine[2].suggest_int("x", 0, 9)
        study.tell(mine[2], 2.0)
    assert journal.round_trips == before + 2  # the batch's close: one append
    fresh = optuna.storages.journal.JournalStorage(optuna.storages.journal.JournalRedisBackend(url))
    expected = _trials(fresh, "defer")
    assert [t[2] for t in expected] == [TrialState.COMPLETE] * 5
    assert _trials(ours, "defer") == expected
    assert _trials(theirs, "defer") == expected
    assert [trial_id(t) for t in mine] == [expected[n][0] for n in (0, 1, 3)]


def test_a_batch_the_server_missed_goes_with_the_next_append(redis_url, monkeypatch):
    """The server away when a batch closes: the error reaches the runner, and the deferred
    records (already in this runner's view) are sent with its next append, so the server's
    journal (read afresh by Optuna's own JournalRedisBackend) catches up with that view."""
    from redis.exceptions import ConnectionError as RedisConnectionError

    from optimizer.storage import _redis_backends, batched_writes

    url = _db(redis_url, 8)
    storage = open_storage(url)
    journal = _redis_backends[storage]
    study = optuna.create_study(study_name="missed", storage=storage, directions=["minimize"])
    with pytest.raises(RedisConnectionError):
        with batched_writes(storage):
            trial = study.ask()
            trial.suggest_int("x", 0, 9)
            study.tell(trial, 1.0)
            sent = journal._append

            def away(*args, **kwargs):
                raise RedisConnectionError("server away")

            monkeypatch.setattr(journal, "_append", away)
    monkeypatch.setattr(journal, "_append", sent)
    fresh = optuna.storages.journal.JournalStorage(optuna.storages.journal.JournalRedisBackend(url))
    assert [t[2] for t in _trials(fresh, "missed")] == [TrialState.RUNNING]  # the server missed the result
    study.set_user_attr("note", "next append")
    fresh = optuna.storages.journal.JournalStorage(optuna.storages.journal.JournalRedisBackend(url))
    assert _trials(fresh, "missed") == _trials(storage, "missed")
    assert [t[2] for t in _trials(fresh, "missed")] == [TrialState.COMPLETE]


def _planned(x: int) -> optuna.trial.FrozenTrial:
    """A running trial made with its parameter, as the search's sampler plans it (next_trial)."""
    from optuna.distributions import IntDistribution
    from optuna.trial import create_trial

    return create_trial(state=TrialState.RUNNING, params={"x": x}, distributions={"x": IntDistribution(0, 99)})


def test_two_runners_batches_of_trials_made_in_one_round_trip_each_replay_as_optuna_replays_them(redis_url):
    """Two runners (two storages on one server, as two processes) make their batches' trials
    with storage.create_trials, interleaved, each in its batch (batched_writes) and between
    records of the other's trials (deferred results sent when its batch closes): each batch's
    trials in one round trip, the ids returned naming the trials made with the given
    parameters, in order. Reference outside the project: Optuna's own JournalStorage on its
    own JournalRedisBackend, replaying the server's journal afresh, sees the same trials
    (ids, numbers unique and in order, states, parameters, values) as both runners."""
    from optimizer.storage import _redis, _redis_backends, batched_writes, create_trials

    url = _db(redis_url, 11)
    a, b = open_storage(url), _redis(url)  # b: another process's storage (open_storage keeps one per URL)
    journals = {id(a): _redis_backends[a], id(b): _redis_backends[b]}
    study_a = optuna.create_study(study_name="made", storage=a, directions=["minimize"])
    study_b = optuna.load_study(study_name="made", storage=b)
    sid = study_a._study_id
    made: dict[int, int] = {}  # trial id -> the x it was planned with
    pending = []  # (storage, trial id, value) told at the start of its runner's next batch
    for round_, (store, count) in enumerate([(a, 5), (b, 4), (a, 3), (b, 6), (a, 1)]):
        study = study_a if store is a else study_b
        with batched_writes(store):
            for other, tid, value in [p for p in pending if p[0] is store]:
                other.set_trial_state_values(tid, TrialState.COMPLETE, [value])  # deferred to the batch's close
            pending = [p for p in pending if p[0] is not store]
            xs = [10 * round_ + k for k in range(count)]
            before = journals[id(store)].round_trips
            ids = create_trials(store, sid, [_planned(x) for x in xs])
            assert journals[id(store)].round_trips == before + 1  # the batch's trials: one round trip
            assert [store.get_trial(t).params for t in ids] == [{"x": x} for x in xs]
            made.update(zip(ids, xs))
            pending += [(store, t, float(x)) for t, x in zip(ids, xs)]
        assert [t.state for t in study.get_trials(deepcopy=False) if t._trial_id in ids] == [TrialState.RUNNING] * count
    for store in (a, b):
        with batched_writes(store):
            for _, tid, value in [p for p in pending if p[0] is store]:
                store.set_trial_state_values(tid, TrialState.COMPLETE, [value])
    fresh = optuna.storages.journal.JournalStorage(optuna.storages.journal.JournalRedisBackend(url))
    expected = _trials(fresh, "made")
    assert [t[1] for t in expected] == list(range(19))  # numbered once each, in the journal's order
    assert {t[0]: t[4]["x"] for t in expected} == made
    assert all(t[2] == TrialState.COMPLETE and t[3] == [float(t[4]["x"])] for t in expected)
    assert _trials(a, "made") == _trials(b, "made") == expected
