"""Optuna's journal on a Redis server: the shared storage that many workers join fastest.

:class:`RedisJournal` keeps Optuna's own key layout (``<prefix>:log_number`` and
``<prefix>:log:<n>``, numbered from 0), so a journal written here reads with Optuna's
``JournalRedisBackend`` and the other way round. What it changes is the number of round
trips: Optuna's backend sends one command per record written and one per record read; here
a list of records is appended by one server-side script (numbered atomically: concurrent
writers never interleave inside a list), and the records after a given number are read back
by another, ``READ_CHUNK`` at a time: one round trip per write and per read. A search writes about eight records per trial, and every worker replays the
others' records, so this is what sets the per-trial cost of a shared search.

Durability is the server's: run it with ``appendonly yes`` (the append-only file; with
``appendfsync everysec`` a power cut loses at most the last second, with ``always`` nothing
acknowledged). ``scripts/try_cluster.sh`` starts it so.

:func:`redis_claim` is the cross-machine claim of ``storage.claim_batch`` for this storage:
a Redis lock with an expiry, so a killed holder frees it after ``CLAIM_TTL`` seconds.
"""

from __future__ import annotations

import json
import time
from contextlib import contextmanager
from typing import Any, Iterator

from optuna.storages.journal import BaseJournalBackend

READ_CHUNK = 1000  # records fetched by one MGET
CLAIM_TTL = 60  # s a claim is held at most (a killed holder's claim lapses then)
# incr the counter once per record and store the record under its number, all in one step
_APPEND = """
local counter = ARGV[1] .. ':log_number'
if redis.call('exists', counter) == 0 then redis.call('set', counter, -1) end
for i = 2, #ARGV do
    local n = redis.call('incr', counter)
    redis.call('set', ARGV[1] .. ':log:' .. n, ARGV[i])
end
return redis.call('get', counter)
"""
# the records numbered ARGV[2] .. at most ARGV[3] of them, in one round trip
_READ = """
local last = tonumber(redis.call('get', ARGV[1] .. ':log_number'))
if last == nil then return {} end
local first = tonumber(ARGV[2])
last = math.min(last, first + tonumber(ARGV[3]) - 1)
if last < first then return {} end
local keys = {}
for n = first, last do keys[#keys + 1] = ARGV[1] .. ':log:' .. n end
return redis.call('mget', unpack(keys))
"""


class RedisJournal(BaseJournalBackend):
    """Journal records on a Redis server (``redis://host:port/db``), appended and read in bulk."""

    def __init__(self, url: str, prefix: str = "") -> None:
        self._connect(url, prefix)

    def _connect(self, url: str, prefix: str) -> None:
        import redis  # imported by the shared deployments that use it

        self._url = url
        self.prefix = prefix
        self.client = redis.Redis.from_url(url)
        self._append = self.client.register_script(_APPEND)
        self._read = self.client.register_script(_READ)

    def __getstate__(self) -> dict[str, Any]:  # picklable, as Optuna's backends are
        return {"url": self._url, "prefix": self.prefix}

    def __setstate__(self, state: dict[str, Any]) -> None:
        self._connect(state["url"], state["prefix"])

    def append_logs(self, logs: list[dict[str, Any]]) -> None:
        if logs:
            self._append(args=[self.prefix, *(json.dumps(log, separators=(",", ":")) for log in logs)])

    def read_logs(self, log_number_from: int) -> Iterator[dict[str, Any]]:
        number = log_number_from
        while True:
            values = self._read(args=[self.prefix, number, READ_CHUNK])
            stalled = False
            for value in values:
                if value is None:  # numbered by a writer not done yet (Optuna's own writer on a cluster)
                    stalled = True
                    time.sleep(0.05)
                    break
                yield json.loads(value)
                number += 1
            if not stalled and len(values) < READ_CHUNK:
                return


@contextmanager
def redis_claim(journal: RedisJournal, name: str) -> Iterator[None]:
    """Hold the lock ``<prefix>:claim:<name>`` on the journal's server (waits for it)."""
    from redis.exceptions import LockError

    lock = journal.client.lock(f"{journal.prefix}:claim:{name}", timeout=CLAIM_TTL, blocking=True)
    lock.acquire()
    try:
        yield
    finally:
        try:
            lock.release()
        except LockError:  # lapsed after CLAIM_TTL (the holder stalled): another runner may hold it now
            pass


class RunnerLiveness:
    """Which runner holds which running trial, and which runners are alive, kept on the Redis
    server beside the journal (not in it: no journal record per beat). A runner's key
    ``<prefix>:alive:<runner>`` expires ``grace`` seconds after its last beat; a running trial
    whose holder's key has expired belonged to a runner that died, and is failed by the next
    batch of any runner (``storage.recover_stale_trials``), so the search's budget asks a new one."""

    def __init__(self, journal: RedisJournal, runner: str, grace: int) -> None:
        self._client = journal.client
        self._prefix = journal.prefix
        self._runner = runner
        self._grace = grace

    def hold(self, trial_id: int) -> None:
        """Record this runner as the holder of ``trial_id`` and that it is alive."""
        with self._client.pipeline(transaction=False) as pipe:
            pipe.hset(f"{self._prefix}:holder", str(trial_id), self._runner)
            pipe.set(f"{self._prefix}:alive:{self._runner}", 1, ex=self._grace)
            pipe.execute()

    def beat(self) -> None:
        self._client.set(f"{self._prefix}:alive:{self._runner}", 1, ex=self._grace)

    def dead(self, trial_ids: list[int]) -> list[int]:
        """The trials among ``trial_ids`` whose recorded holder is no longer alive."""
        if not trial_ids:
            return []
        holders = self._client.hmget(f"{self._prefix}:holder", [str(t) for t in trial_ids])
        known = [
            (t, h.decode() if isinstance(h, bytes) else str(h)) for t, h in zip(trial_ids, holders) if h is not None
        ]
        runners = sorted({h for _, h in known})
        alive = dict(zip(runners, self._client.mget([f"{self._prefix}:alive:{r}" for r in runners]))) if runners else {}
        return [t for t, h in known if alive.get(h) is None]
