"""Optuna's journal on a Redis server: the shared storage that many workers join fastest.

:class:`RedisJournal` keeps Optuna's own key layout (``<prefix>:log_number`` and
``<prefix>:log:<n>``, numbered from 0), so a journal written here reads with Optuna's
``JournalRedisBackend`` and the other way round. What it changes is the number of round
trips. Optuna's backend sends one command per record written and one per record read, and
its storage reads after every write: a search writes about eight records per trial and reads
after each, so a round trip to the server (0.1 ms idle, a millisecond or more on a loaded
machine) per record was most of a shared search's time. Here:

- a list of records is appended by one server-side script (numbered atomically: concurrent
  writers never interleave inside a list), which in the same round trip returns the records
  from this process's read position on, so a write and the read after it cost one round trip;
- inside a batch (:meth:`open_batch` ... :meth:`close_batch`, ``storage.batched_writes``) the
  records that only change a trial this process created (its parameters, attributes,
  intermediate values and its final state) are handed to this process's reader at once and
  sent in one append when the batch closes, and reads do not go to the server. Other
  processes' records that the server numbered before them are read afterwards (the server
  keeps the true order, which every other reader replays). Changing the order of such
  records changes nothing: Optuna numbers studies and trials by the order of the records
  that create them, and those (and a waiting trial's pop, a study's attributes and
  deletion) are never deferred: each is sent at once with the deferred records before it.
  A trial failed by another runner (its holder taken for dead) while this one finishes it
  stays finished in this runner's view only: the liveness grace (30 s) makes that rare.

Durability is the server's: run it with ``appendonly yes`` (the append-only file; with
``appendfsync everysec`` a power cut loses at most the last second, with ``always`` nothing
acknowledged). ``scripts/try_cluster.sh`` starts it so.

:func:`redis_claim` is the cross-machine claim of ``storage.claim_batch`` for this storage:
a Redis lock with an expiry, so a killed holder frees it after ``CLAIM_TTL`` seconds.
"""

from __future__ import annotations

import json
import threading
import time
from collections import deque
from contextlib import contextmanager
from typing import Any, Callable, Iterator

from optuna.storages.journal import BaseJournalBackend

READ_CHUNK = 1000  # records fetched by one MGET
CLAIM_TTL = 60  # s a claim is held at most (a killed holder's claim lapses then)
CLAIM_POLL = 0.002  # s before the first try again of a claim another runner holds (redis-py's 0.1 s idles a worker)
CLAIM_POLL_MAX = 0.02  # s between tries at most (each try is a round trip: polling every 2 ms cost CPU)
# The journal's record codes (its format: Optuna's JournalOperation) for the records a batch defers:
# a trial's parameter, state and values, intermediate value, user and system attribute.
_SET_TRIAL_PARAM, _SET_TRIAL_STATE_VALUES, _SET_TRIAL_ATTRS = 5, 6, (7, 8, 9)
_RUNNING, _WAITING = 0, 4  # trial states that are not final (Optuna's TrialState)
# number the records ARGV[4].. one by one after the counter, then return the first number
# and the records from ARGV[2] on (at most ARGV[3] of them), all in one step
_APPEND = """
local counter = ARGV[1] .. ':log_number'
if redis.call('exists', counter) == 0 then redis.call('set', counter, -1) end
local first = tonumber(redis.call('get', counter)) + 1
for i = 4, #ARGV do
    local n = redis.call('incr', counter)
    redis.call('set', ARGV[1] .. ':log:' .. n, ARGV[i])
end
local out = {first}
local from = tonumber(ARGV[2])
local last = math.min(tonumber(redis.call('get', counter)), from + tonumber(ARGV[3]) - 1)
if last >= from then
    local keys = {}
    for n = from, last do keys[#keys + 1] = ARGV[1] .. ':log:' .. n end
    for _, value in ipairs(redis.call('mget', unpack(keys))) do out[#out + 1] = value end
end
return out
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


def deferrable(record: dict[str, Any]) -> bool:
    """Whether a batch may send ``record`` later: it changes one existing trial and does not
    start it (a waiting trial's pop, a RUNNING state, decides who runs it: sent at once)."""
    code = record["op_code"]
    if code == _SET_TRIAL_STATE_VALUES:
        return record.get("state") not in (_RUNNING, _WAITING)
    return code == _SET_TRIAL_PARAM or code in _SET_TRIAL_ATTRS


class RedisJournal(BaseJournalBackend):
    """Journal records on a Redis server (``redis://host:port/db``), appended and read in bulk;
    batches defer the records of this process's own trials (module docstring)."""

    def __init__(self, url: str, prefix: str = "") -> None:
        self._connect(url, prefix)

    def _connect(self, url: str, prefix: str) -> None:
        import redis  # imported by the shared deployments that use it

        from optimizer.storage import creates_waiting_trial

        self._url = url
        self.prefix = prefix
        self.client = redis.Redis.from_url(url)
        self._append = self.client.register_script(_APPEND)
        self._read = self.client.register_script(_READ)
        self._creates_waiting = creates_waiting_trial
        self._lock = threading.Lock()  # the state below (threads of this process share the backend)
        self._next = 0  # the first record number on the server not read yet
        self._handed = 0  # records handed to the reader (its numbering: Optuna's log_number_read)
        self._ready: deque[dict[str, Any]] = deque()  # read or deferred, to be handed to the reader next
        self._skip: list[tuple[int, int]] = []  # server numbers [a, b) of deferred records handed already
        self._pending: list[str] = []  # deferred records not on the server yet
        self._depth = 0  # batches open (threads may overlap theirs)
        self._later: list[Callable[[Any], object]] = []  # other commands a batch sends when it closes
        self.waiting_made = 0  # records handed over that create a waiting (enqueued) trial
        self.round_trips = 0  # journal commands sent to the server (appends and reads)

    def __getstate__(self) -> dict[str, Any]:  # picklable, as Optuna's backends are
        return {"url": self._url, "prefix": self.prefix}

    def __setstate__(self, state: dict[str, Any]) -> None:
        self._connect(state["url"], state["prefix"])

    def append_logs(self, logs: list[dict[str, Any]]) -> None:
        if not logs:
            return
        texts = [json.dumps(log, separators=(",", ":")) for log in logs]
        with self._lock:
            if self._depth and all(deferrable(log) for log in logs):
                self._pending.extend(texts)
                self._ready.extend(logs)  # read back as given, as Optuna's in-memory storage does
            else:
                self._send(texts)

    def _send(self, texts: list[str]) -> None:
        """Append the deferred records and ``texts`` in one round trip, taking back the
        records from the read position on (under ``_lock``)."""
        deferred, self._pending = self._pending, []
        try:
            values = self._append(args=[self.prefix, self._next, READ_CHUNK, *deferred, *texts])
        except Exception:  # the server away: the deferred records, handed over already, go with the next append
            self._pending = deferred + self._pending
            raise
        self.round_trips += 1
        first = int(values[0])
        if deferred:  # handed over already: skipped when read back
            self._skip.append((first, first + len(deferred)))
        self._read_on(values[1:])  # to the end: a record this sent (a new trial's) is read back at once

    def _read_on(self, values: list[bytes | None]) -> None:
        """Queue ``values`` (read from ``_next``) and whatever the server holds after them."""
        while True:
            complete = self._take(values)
            if complete and len(values) < READ_CHUNK:
                return
            if not complete:
                time.sleep(0.05)
            values = self._read(args=[self.prefix, self._next, READ_CHUNK])
            self.round_trips += 1

    def _take(self, values: list[bytes | None]) -> bool:
        """Queue the server's records ``values`` (numbered from ``_next``) for the reader, but
        those handed over already; False if one is numbered but not written yet."""
        for value in values:
            if value is None:  # numbered by a writer not done yet (Optuna's own writer, which sets after its incr)
                return False
            number = self._next
            self._next += 1
            while self._skip and self._skip[0][1] <= number:
                self._skip.pop(0)
            if not (self._skip and self._skip[0][0] <= number):
                self._ready.append(json.loads(value))
        return True

    def read_logs(self, log_number_from: int) -> Iterator[dict[str, Any]]:
        with self._lock:
            if log_number_from != self._handed:  # a reader starting afresh: the server's numbering
                self._next = self._handed = log_number_from
                self._ready.clear()
                self._skip.clear()
            if not self._depth:  # in a batch, nothing is read from the server
                self._read_on(self._read(args=[self.prefix, self._next, READ_CHUNK]))
                self.round_trips += 1
        while True:
            with self._lock:
                if not self._ready:
                    return
                record = self._ready.popleft()
                self._handed += 1
                self.waiting_made += self._creates_waiting(record)
            yield record

    def open_batch(self) -> None:
        """Defer this process's trial records until the last open batch closes."""
        with self._lock:
            self._depth += 1

    def close_batch(self) -> None:
        """Send the batch's deferred records in one append (and its other commands in one
        pipeline)."""
        with self._lock:
            self._depth -= 1
            if self._depth:
                return
            later, self._later = self._later, []
            if later:
                try:
                    self._pipeline(later)
                except Exception:  # the server away: sent when the next batch closes
                    self._later = later + self._later
                    raise
            if self._pending:
                self._send([])

    def with_batch(self, command: Callable[[Any], object]) -> None:
        """Run ``command(pipeline)`` (commands on keys beside the journal) when the open batch
        closes, or at once outside a batch."""
        with self._lock:
            if self._depth:
                self._later.append(command)
                return
        self._pipeline([command])

    def _pipeline(self, commands: list[Callable[[Any], object]]) -> None:
        with self.client.pipeline(transaction=False) as pipe:
            for command in commands:
                command(pipe)
            pipe.execute()
        self.round_trips += 1


@contextmanager
def redis_claim(journal: RedisJournal, name: str) -> Iterator[None]:
    """Hold the lock ``<prefix>:claim:<name>`` on the journal's server (waits for it, trying
    again after CLAIM_POLL seconds, doubled after each miss up to CLAIM_POLL_MAX: a short first
    wait, since claims are short, and few tries, each a round trip, while a long one lasts)."""
    from redis.exceptions import LockError

    lock = journal.client.lock(f"{journal.prefix}:claim:{name}", timeout=CLAIM_TTL)
    wait = CLAIM_POLL
    while not lock.acquire(blocking=False):
        time.sleep(wait)
        wait = min(2 * wait, CLAIM_POLL_MAX)
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
        self._journal = journal
        self._client = journal.client
        self._prefix = journal.prefix
        self._runner = runner
        self._grace = grace

    def hold(self, trial_id: int) -> None:
        """Record this runner as the holder of ``trial_id`` and that it is alive (when the
        open batch closes: one round trip for the batch's trials)."""

        def record(pipe: Any) -> None:
            pipe.hset(f"{self._prefix}:holder", str(trial_id), self._runner)
            pipe.set(f"{self._prefix}:alive:{self._runner}", 1, ex=self._grace)

        self._journal.with_batch(record)

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
