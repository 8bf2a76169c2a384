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
- a read (after an append, or alone) returns the new records as one text, a JSON array's body,
  parsed by one ``json.loads``; the records this process handed over already (a batch's, below)
  are left out by the server, not sent back and parsed again;
- inside a batch (:meth:`open_batch` ... :meth:`close_batch`, ``storage.batched_writes``) the
  records that only change a trial this process created (its parameters, attributes,
  intermediate values and its final state) are handed to this process's reader at once and
  sent in one append when the batch closes, and reads do not go to the server. Other
  processes' records that the server numbered before them are read afterwards (the server
  keeps the true order, which every other reader replays). Changing the order of such
  records changes nothing: Optuna numbers studies and trials by the order of the records
  that create them, and those (and a waiting trial's pop, a study's attributes and
  deletion) are never deferred: each is sent at once with the deferred records before it (a
  batch's new trials together, in one append: ``storage.create_trials``, their numbers one
  after another).
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
import uuid
from collections import deque
from contextlib import contextmanager
from typing import Any, Callable, Iterator

from optuna.storages.journal import BaseJournalBackend

READ_CHUNK = 1000  # records fetched by one MGET
CLAIM_TTL = 60  # s a claim is held at most (a killed holder's claim lapses then)
# s a runner waits for a held claim's release before it tries again anyway (whole: Redis 5 takes no fraction)
CLAIM_WAIT = 1
# The journal's record codes (its format: Optuna's JournalOperation) for the records a batch defers:
# a trial's parameter, state and values, intermediate value, user and system attribute.
_SET_TRIAL_PARAM, _SET_TRIAL_STATE_VALUES, _SET_TRIAL_ATTRS = 5, 6, (7, 8, 9)
_RUNNING, _WAITING = 0, 4  # trial states that are not final (Optuna's TrialState)
# The records numbered ``from`` on (at most ``count``, up to the first one numbered but not
# written yet), but those in the skip ranges [a, b) (this process's own, handed over already),
# as one JSON array's body: the records joined by commas. Returns {next, text, more}: the number
# after the last record read, the text, and 0 (read to the end), 1 (``count`` read: more may
# follow) or 2 (stopped at a record not written yet). One bulk reply, parsed by one json.loads:
# a reply of one value per record cost redis-py's parser and json.loads a call per record, most
# of what reading another worker's trials cost.
_READ_ON = """
local function read_on(prefix, from, count, skips)
    local last = tonumber(redis.call('get', prefix .. ':log_number'))
    if last == nil then return {from, '', 0} end
    local more = 0
    if last > from + count - 1 then last, more = from + count - 1, 1 end
    if last < from then return {from, '', 0} end
    local keys = {}
    for n = from, last do keys[#keys + 1] = prefix .. ':log:' .. n end
    local kept, n = {}, from
    for _, value in ipairs(redis.call('mget', unpack(keys))) do
        if not value then return {n, table.concat(kept, ','), 2} end
        local skip = false
        for _, range in ipairs(skips) do
            if n >= range[1] and n < range[2] then skip = true end
        end
        if not skip then kept[#kept + 1] = value end
        n = n + 1
    end
    return {n, table.concat(kept, ','), more}
end
local function skips_at(first)  -- ARGV[4]: the count of skip ranges, then their bounds from ARGV[5] on
    local skips = {}
    for i = 0, tonumber(ARGV[4]) - 1 do
        skips[#skips + 1] = {tonumber(ARGV[first + 2 * i]), tonumber(ARGV[first + 2 * i + 1])}
    end
    return skips
end
"""
# ARGV: prefix, from, count, k, k skip ranges (a, b), the number of deferred records d, the records:
# number the records one by one after the counter, then return the first number and what
# read_on returns (the d deferred records, at the head of the records, skipped), all in one step
_APPEND = (
    _READ_ON
    + """
local counter = ARGV[1] .. ':log_number'
if redis.call('exists', counter) == 0 then redis.call('set', counter, -1) end
local first = tonumber(redis.call('get', counter)) + 1
local k = tonumber(ARGV[4])
for i = 6 + 2 * k, #ARGV do
    local n = redis.call('incr', counter)
    redis.call('set', ARGV[1] .. ':log:' .. n, ARGV[i])
end
local skips = skips_at(5)
skips[#skips + 1] = {first, first + tonumber(ARGV[5 + 2 * k])}
local out = read_on(ARGV[1], tonumber(ARGV[2]), tonumber(ARGV[3]), skips)
return {first, out[1], out[2], out[3]}
"""
)
# ARGV: prefix, from, count, k, k skip ranges (a, b): what read_on returns, in one round trip
_READ = (
    _READ_ON
    + """
return read_on(ARGV[1], tonumber(ARGV[2]), tonumber(ARGV[3]), skips_at(5))
"""
)

# a claim let go: deleted if it still holds this runner's token, and one token (at most) put in
# its wake-up list for a runner waiting on it (the list expires with the claim's lifetime)
_RELEASE = """
if redis.call('get', KEYS[1]) == ARGV[1] then redis.call('del', KEYS[1]) end
redis.call('lpush', KEYS[2], 1)
redis.call('ltrim', KEYS[2], 0, 0)
redis.call('expire', KEYS[2], ARGV[2])
"""

# KEYS[1]: the holders' hash; ARGV: the liveness keys' prefix, the trial ids joined by commas (one
# argument: a batch's worth of ids each its own argument cost the client more than the look itself).
# Returns the ids whose holder is recorded and has no liveness key, each holder looked up once.
_DEAD = """
local dead, alive = {}, {}
for id in string.gmatch(ARGV[2], '[^,]+') do
    local holder = redis.call('hget', KEYS[1], id)
    if holder then
        if alive[holder] == nil then alive[holder] = redis.call('exists', ARGV[1] .. holder) == 1 end
        if not alive[holder] then dead[#dead + 1] = tonumber(id) end
    end
end
return dead
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
        self._release = self.client.register_script(_RELEASE)
        self.dead_held = self.client.register_script(_DEAD)
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
            first, *read = self._append(args=[*self._read_args(), len(deferred), *deferred, *texts])
        except Exception:  # the server away: the deferred records, handed over already, go with the next append
            self._pending = deferred + self._pending
            raise
        self.round_trips += 1
        if deferred:  # handed over already: skipped when read back
            self._skip.append((int(first), int(first) + len(deferred)))
        self._read_on(read)  # to the end: a record this sent (a new trial's) is read back at once

    def _read_args(self) -> list[Any]:
        """The read scripts' arguments: prefix, read position, chunk, the skip ranges."""
        return [self.prefix, self._next, READ_CHUNK, len(self._skip), *(n for r in self._skip for n in r)]

    def _read_on(self, read: list[Any]) -> None:
        """Queue the records of ``read`` (a read script's answer from ``_next`` on) and
        whatever the server holds after them."""
        while True:
            more = self._take(*read)
            if not more:
                return
            if more == 2:  # numbered by a writer not done yet (Optuna's own writer, which sets after its incr)
                time.sleep(0.05)
            read = self._read(args=self._read_args())
            self.round_trips += 1

    def _take(self, after: int, text: bytes, more: int) -> int:
        """Queue the records in ``text`` (the server's records from ``_next`` to ``after``, but
        those in the skip ranges, joined by commas) for the reader; returns the script's
        ``more``."""
        if text:
            self._ready.extend(json.loads(b"[" + text + b"]"))
        self._next = int(after)
        while self._skip and self._skip[0][1] <= self._next:
            self._skip.pop(0)
        return int(more)

    def read_logs(self, log_number_from: int) -> Iterator[dict[str, Any]]:
        with self._lock:
            if log_number_from != self._handed:  # a reader starting afresh: the server's numbering
                self._next = self._handed = log_number_from
                self._ready.clear()
                self._skip.clear()
            if not self._depth:  # in a batch, nothing is read from the server
                self._read_on(self._read(args=self._read_args()))
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
    """Hold the lock ``<prefix>:claim:<name>`` on the journal's server (a key set if absent,
    with an expiry: a killed holder's claim lapses after CLAIM_TTL seconds). A runner that
    finds it held blocks on the list ``<prefix>:claim:<name>:free`` (BLPOP), into which the
    holder puts a token when it lets go, so the waiter tries again at once, in one round trip
    per wait: polling (a try every few milliseconds, each a round trip) woke up to 20 ms
    late, and two workers take the claim in turn every batch. A wait lasts CLAIM_WAIT at most
    before another try (a holder that died puts no token)."""
    key, token = f"{journal.prefix}:claim:{name}", uuid.uuid4().hex
    client = journal.client
    while not client.set(key, token, nx=True, ex=CLAIM_TTL):
        client.blpop([f"{key}:free"], timeout=CLAIM_WAIT)
    try:
        yield
    finally:  # let go only if still this runner's (it lapses after CLAIM_TTL if the holder stalled), and wake a waiter
        journal._release(keys=[key, f"{key}:free"], args=[token, CLAIM_TTL])


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
        self._lock = threading.Lock()
        self._held: list[int] | None = None  # trials held in the open batch, not yet recorded

    def hold(self, trial_id: int) -> None:
        """Record this runner as the holder of ``trial_id`` and that it is alive (when the
        open batch closes: one round trip for the batch's trials, and in it two commands for
        all of them, one hash write and one beat; two per trial cost the client a command's
        packing each, about a tenth of a lone worker's time)."""
        with self._lock:
            held, new = self._held, self._held is None
            if held is None:
                held = self._held = []
            held.append(trial_id)
        if not new:
            return

        def record(pipe: Any) -> None:  # (run again with the same trials if the server was away)
            with self._lock:
                if self._held is held:  # trials held from now on go with the next batch
                    self._held = None
            pipe.hset(f"{self._prefix}:holder", mapping=dict.fromkeys(map(str, held), self._runner))
            pipe.set(f"{self._prefix}:alive:{self._runner}", 1, ex=self._grace)

        self._journal.with_batch(record)

    def beat(self) -> None:
        self._client.set(f"{self._prefix}:alive:{self._runner}", 1, ex=self._grace)

    def dead(self, trial_ids: list[int]) -> list[int]:
        """The trials among ``trial_ids`` whose recorded holder is no longer alive, looked up
        by one server-side script (one round trip: before every batch a runner looks at the
        other runners' running trials)."""
        if not trial_ids:
            return []
        return [
            int(t)
            for t in self._journal.dead_held(
                keys=[f"{self._prefix}:holder"], args=[f"{self._prefix}:alive:", ",".join(map(str, trial_ids))]
            )
        ]
