"""Where searches live: Optuna storages by URL.

- ``None``: in memory (library calls; gone with the process).
- a file path (``runs/stagefit.journal``) or ``journal:///abs/path``: Optuna's journal
  storage on a file, the embedded default (one file, safe for several processes on one
  machine through its file lock; about ten times faster per trial than SQLite here).
- ``sqlite:///...``, ``postgresql://...`` and any other SQLAlchemy URL: Optuna's RDB
  storage, the shared deployment that any number of workers join.
- ``redis://host:port/db``: Optuna's journal on a Redis server (:mod:`optimizer.redis_journal`),
  the fastest shared storage (benchmarks/results/workers.md); ``make cluster`` runs it.
- ``grpc://host:port``: Optuna's gRPC storage proxy (a server in front of an RDB storage,
  started with ``optuna.storages.run_grpc_proxy_server``); measured, not chosen.

Storages are cached per URL within a process, so the journal is replayed once, and only when
first used: a status poll or a listing in a process that has not replayed it reads the
journal's snapshot and the records after it instead (:func:`journal_summary`,
:func:`save_snapshot`).

Crash safety in a shared (RDB) storage: every running trial carries a heartbeat
(:class:`TrialHeartbeat`, recorded as soon as the trial is asked and then every
``STAGEFIT_HEARTBEAT_INTERVAL`` seconds, default 10); a running trial whose heartbeat is
older than ``STAGEFIT_GRACE_PERIOD`` seconds (default 30) belonged to a worker that died,
and the next batch of any worker fails it and queues it again (Optuna's heartbeat check and
retry callback, at most 3 retries; :func:`recover_stale_trials`, which also fails a
trial of a storage without heartbeats once it is ``STAGEFIT_STALE_AFTER`` seconds old). :func:`claim_batch` makes "count the trials, ask the
next batch" one step across every process sharing a search, so a budget is met exactly.
"""

from __future__ import annotations

import copy
import fcntl
import hashlib
import inspect
import json
import logging
import math
import os
import shutil
import socket
import sys
import threading
import time
import warnings
import weakref
from contextlib import contextmanager
from dataclasses import dataclass, field
from datetime import datetime, timedelta, timezone
from pathlib import Path
from typing import IO, Any, Callable, Container, Generator, Iterable, Iterator

import optuna
from optuna.storages import BaseStorage

# Every private Optuna name stagefit relies on is here and nowhere else, each with why the
# public API does not suffice (checked against the versions pyproject.toml allows;
# tests/test_storage_compat.py pins the range, tests/test_workers.py exercises each use).
# is_heartbeat_enabled: whether a storage records heartbeats; public Optuna only runs
# heartbeats inside Study.optimize, and our batches (ask/tell) record their own.
from optuna.storages._heartbeat import is_heartbeat_enabled

# BaseJournalFileLock: the journal's lock interface, so the journal can take a kernel flock
# (released when its holder dies) instead of Optuna's lock files; the public
# JournalFileBackend accepts a lock object but the base class to write one is private.
from optuna.storages.journal._file import BaseJournalFileLock

# JournalStorageReplayResult (the journal's replayed state; its _trials, _studies,
# _study_id_to_trial_ids, _trial_id_to_study_id, _next_study_id, log_number_read,
# _trial_exists_and_updatable and the _apply_* methods of study and trial records) and
# JournalStorage's _replay_result, _thread_lock, _sync_with_backend, _worker_id_prefix: the
# replay shares equal distributions (:class:`_SharedDistributions`), copies a trial a record
# changes field by field and drops a deleted study's trials, reads only the trials after a
# number (:func:`trials_from`), starts on first use rather than when opened (from the replay
# snapshot if there is one: :func:`save_replay`), and a snapshot is taken of its state at a
# known record (:func:`save_snapshot`); the public API copies every trial of a study on each
# read and has no hook for any of these.
from optuna.storages.journal._storage import JournalStorageReplayResult

# _CONSTRAINTS_KEY: the prefix of the system attr a constraint is stored under (Trial.set_constraint's
# key), so a trial's attributes are set in one storage step (:func:`record_trial`).
from optuna.study._constrained_optimization import _CONSTRAINTS_KEY

# _tell_with_warning: Study.tell without its return value; the public tell returns a deep
# copy of the finished trial (every parameter's distribution, every attribute), which the
# search never reads and which cost about a third of a tell.
from optuna.study._tell import _tell_with_warning
from optuna.trial import TrialState

from optimizer.errors import InputError, StorageError


def _rdb_models():
    """optuna.storages._rdb.models: stale running trials of an RDB storage without heartbeats
    are found by one SQL query on the trials table; the public API would read every trial of
    the study. Imported late: SQLAlchemy is slow to import."""
    from optuna.storages._rdb import models

    return models


def trial_id(trial: "optuna.Trial | optuna.trial.FrozenTrial") -> int:
    """The storage id of a trial (Optuna's private ``_trial_id``): heartbeats and state changes
    of a trial outside Study.optimize go through the storage, whose public methods take that
    id, and Trial exposes only its number."""
    return trial._trial_id


def study_id(study: optuna.Study) -> int:
    """The storage id of a study (Optuna's private ``_study_id``): the storage's public
    methods take it, and Study exposes only its name (a lookup per call otherwise)."""
    return study._study_id


def study_storage(study: optuna.Study) -> BaseStorage:
    """The storage of a study (Optuna's private ``_storage``): a sampler is handed the study
    only, and reading its trials incrementally (:func:`trials_from`) needs the storage."""
    return study._storage


def unwrapped(storage: BaseStorage) -> BaseStorage:
    """The storage under Optuna's cache wrapper (its private ``_backend``), else itself: the
    RDB storage's engine and heartbeat settings are only on the wrapped storage."""
    return getattr(storage, "_backend", storage)


DEFAULT_JOURNAL = Path("runs") / "stagefit.journal"
_RDB_SCHEMES = ("sqlite", "postgresql", "postgres", "mysql")
_cache: dict[str, BaseStorage] = {}
_lock = threading.Lock()
_claim_files: "weakref.WeakKeyDictionary[BaseStorage, Path]" = weakref.WeakKeyDictionary()
_journal_backends: "weakref.WeakKeyDictionary[BaseStorage, _BatchSyncedJournal]" = weakref.WeakKeyDictionary()
_claim_locks: dict[str, threading.Lock] = {}
_redis_backends: "weakref.WeakKeyDictionary[BaseStorage, Any]" = weakref.WeakKeyDictionary()
HEARTBEAT_INTERVAL = 10  # s between heartbeats of a running trial (STAGEFIT_HEARTBEAT_INTERVAL)
GRACE_PERIOD = 30  # s without a heartbeat before a running trial is failed (STAGEFIT_GRACE_PERIOD)
MAX_RETRY = 3  # times a failed (stale) trial is queued again
STALE_AFTER = 120.0  # s: without heartbeats, a trial asked this long ago and never told was lost with its process
log = logging.getLogger("stagefit.storage")


def quiet_optuna() -> None:
    """Optuna logs every told trial at INFO, and a search tells thousands: keep its log to
    warnings. Called when a search runs (never at import: a program importing stagefit keeps
    its own logging settings until it runs one)."""
    optuna.logging.set_verbosity(optuna.logging.WARNING)


# Heartbeats and their retry callback are marked experimental in Optuna; we rely on them
# knowingly (tests/test_workers.py checks them), so their warnings are noise here.
warnings.filterwarnings(
    "ignore",
    category=optuna.exceptions.ExperimentalWarning,
    message=r".*(heartbeat|Retry\w*Callback|fail_stale_trials)",
)
# Study.ask warns that heartbeats belong to Study.optimize: our batches record them (TrialHeartbeat).
warnings.filterwarnings("ignore", message="Heartbeat of storage is supposed to be used with Study.optimize")


class _FlockLock(BaseJournalFileLock):
    """The journal's write lock: ``fcntl.flock`` on a file beside it. Cheaper than Optuna's
    lock files (no file created and removed per record), and the kernel releases it when its
    holder dies, so a killed process never leaves the journal locked."""

    def __init__(self, path: Path) -> None:
        self.path = path
        self._held = threading.local()  # each thread its own descriptor, so threads exclude each other too

    def acquire(self) -> bool:
        handle: IO[bytes] = open(self.path, "ab")
        fcntl.flock(handle, fcntl.LOCK_EX)
        self._held.handle = handle
        return True

    def release(self) -> None:
        handle = getattr(self._held, "handle", None)
        if handle is not None:
            self._held.handle = None
            fcntl.flock(handle, fcntl.LOCK_UN)
            handle.close()


def _valid_record(line: bytes) -> dict | None:
    """The journal record on ``line`` (one JSON object with an integer ``op_code`` and a
    ``worker_id``), or None if the line is damaged."""
    try:
        record = json.loads(line)
    except (ValueError, RecursionError):  # JSONDecodeError, bad UTF-8, absurd nesting
        return None
    if (
        isinstance(record, dict)
        and isinstance(record.get("op_code"), int)
        and not isinstance(record.get("op_code"), bool)
        and isinstance(record.get("worker_id"), str)
    ):
        return record
    return None


# json.dumps(record, separators=(",", ":")), the journal's encoding, without a new encoder made per record
_encode = json.JSONEncoder(separators=(",", ":")).encode


class _BatchSyncedJournal(optuna.storages.journal.JournalFileBackend):
    """Optuna's journal file, made to survive a crash and to write faster.

    Reading: Optuna's own reader stops at the first damaged line and the whole file is lost
    to the process. Here a complete line that is not a journal record (torn by a crash or a
    full disk, then followed by later records) is skipped with a warning naming its byte
    offset, and every record before and after it is read; an unfinished last line (no
    newline yet) is left for the next read, since a writer may be in the middle of it.
    Record numbers count the records read, as Optuna's replay expects.

    Writing: records are flushed to the operating system at once (a killed process loses
    nothing it wrote) but forced to disk once per search batch (:func:`sync`), not per
    record. Inside :meth:`open_batch` ... :meth:`close_batch` (:func:`batched_writes`) this
    process holds the journal's write lock and keeps its records in memory: this process's
    reads see them after the file's records (numbered as if appended, which they will be:
    nobody else can append meanwhile), and they are appended in one write when the batch
    closes. A search writes four records per trial (its creation with its parameters, the
    record, the constraint, the result; a seed's parameters one each); one open, lock and
    write each was most of a journal search's time. Other threads of this process writing meanwhile join the open
    batch (waiting for the lock instead would deadlock on Optuna's storage lock), so their
    records too reach the file when it closes. A file left ending mid-line by a crash gets
    a newline first, so the torn fragment never swallows the next record."""

    def __init__(self, file_path: str, lock_path: str | None = None) -> None:
        self._flock = _FlockLock(Path(lock_path or file_path + ".lock"))
        super().__init__(file_path, self._flock)
        self._path = file_path  # Optuna keeps it as the private _file_path
        self._resume = (0, 0)  # (records read, byte offset just after the last of them)
        self._warned: set[int] = set()
        self._batch_lock = threading.Lock()  # the batch state, and plain appends against a batch opening
        self._depth = 0  # batches open in this process (threads may overlap theirs)
        self._held: IO[bytes] | None = None  # the write lock's descriptor while a batch is open
        self._pending: list[tuple[bytes, dict]] = []  # the batch's records: (line, record)
        self._base = 0  # records on file when the batch opened
        self.waiting_made = 0  # records read that create a waiting (enqueued) trial
        self._synced = -math.inf  # time.monotonic() of the last fsync
        self.records_read = 0  # records read from the file for the replay (its snapshot's not counted)

    def _scan(self, number: int, offset: int) -> Iterator[tuple[int, int, dict]]:
        """(record number, byte offset after it, record) of every readable record after
        ``offset`` (where ``number`` records have been read), to the last complete line."""
        with open(self._path, "rb") as handle:
            handle.seek(offset)
            for line in handle:
                if not line.endswith(b"\n"):
                    break  # unfinished: a writer is at it, or a crash tore the tail (terminated on the next write)
                start, offset = offset, offset + len(line)
                record = _valid_record(line)
                if record is None:
                    if start not in self._warned:
                        self._warned.add(start)
                        log.warning(
                            "journal %s: damaged record at byte offset %d (%d bytes) skipped; "
                            "`stagefit storage repair %s` rewrites the file without it",
                            self._path,
                            start,
                            len(line),
                            self._path,
                        )
                    continue
                number += 1
                yield number, offset, record

    def read_logs(self, log_number_from: int) -> Generator[dict[str, Any], None, None]:
        with self._batch_lock:  # a batch's records not read yet (all of them if the file is not read to its end)
            held, base = self._held is not None, self._base
            pending = self._pending[max(log_number_from - base, 0) :] if held else []
        if held and log_number_from >= base:  # the file is read already
            for _, record in pending:
                yield self._seen({**record})
            return
        position = self._resume if self._resume[0] <= log_number_from else (0, 0)  # (records read, byte offset)
        try:
            for number, offset, record in self._scan(*position):
                position = (number, offset)
                if number > log_number_from:
                    self.records_read += 1
                    yield self._seen(record)
        finally:
            self._resume = position
        for _, record in pending:
            yield self._seen({**record})

    def _seen(self, record: dict) -> dict:
        """``record``, counted in :attr:`waiting_made` if it creates a waiting trial (the
        journal's CREATE_TRIAL record with a WAITING state: an enqueued trial), its parameter
        or attribute name interned: the replay keeps each in every trial's dicts, and each
        record read from the file brings its own copy (0.3 KB a trial)."""
        self.waiting_made += creates_waiting_trial(record)
        op = record["op_code"]
        if op == _SET_TRIAL_PARAM:
            record["param_name"] = sys.intern(record["param_name"])
        elif op in _SET_TRIAL_ATTRS:
            field_ = _SET_TRIAL_ATTRS[op]
            record[field_] = {sys.intern(k): v for k, v in record[field_].items()}
        return record

    def _write(self, lines: list[bytes]) -> int:
        """Append ``lines`` in one write (under the write lock); the file's size after it."""
        text = b"".join(lines)
        with open(self._path, "a+b") as handle:
            if handle.seek(0, os.SEEK_END) > 0:
                handle.seek(-1, os.SEEK_END)
                if handle.read(1) != b"\n":
                    text = b"\n" + text  # close a line torn by a crash
            handle.write(text)
            return handle.tell()

    def append_logs(self, logs: list[dict]) -> None:
        lines = [_encode(log).encode("utf-8") + b"\n" for log in logs]
        with self._batch_lock:
            if self._held is not None:  # read back as given, not parsed again: as Optuna's in-memory storage does
                self._pending.extend(zip(lines, logs))
                return
            self._flock.acquire()
            try:
                self._write(lines)
            finally:
                self._flock.release()

    def open_batch(self) -> None:
        """Hold the write lock and keep this process's records in memory until the last open
        batch closes (:meth:`close_batch`)."""
        with self._batch_lock:
            self._depth += 1
            if self._depth > 1:
                return
            handle: IO[bytes] = open(self._flock.path, "ab")
            fcntl.flock(handle, fcntl.LOCK_EX)
            position = self._resume
            for number, offset, _ in self._scan(*position):
                position = (number, offset)
            self._resume, self._base, self._held = position, position[0], handle

    def close_batch(self) -> None:
        """Append the batch's records in one write and release the write lock."""
        with self._batch_lock:
            self._depth -= 1
            if self._depth > 0:
                return
            handle, pending = self._held, self._pending
            self._held, self._pending = None, []
            try:
                if pending:
                    size = self._write([line for line, _ in pending])
                    if self._resume[0] == self._base:  # this process read the file to its end: go on after the batch
                        self._resume = (self._base + len(pending), size)
            finally:
                assert handle is not None
                fcntl.flock(handle, fcntl.LOCK_UN)
                handle.close()

    def sync(self, every: float = 0.0) -> None:
        """Force the journal's records to disk, unless it was done less than ``every`` s ago."""
        if time.monotonic() - self._synced < every:
            return
        with open(self._path, "ab") as handle:
            os.fsync(handle.fileno())
        self._synced = time.monotonic()


_CREATE_TRIAL = 4  # the journal's record code for a new trial (its file format)
_SET_TRIAL_PARAM = 5  # ... for a trial's parameter
_SET_TRIAL_USER_ATTR, _SET_TRIAL_SYSTEM_ATTR = 8, 9  # ... for a trial's user and system attribute
_SET_TRIAL_ATTRS = {_SET_TRIAL_USER_ATTR: "user_attr", _SET_TRIAL_SYSTEM_ATTR: "system_attr"}  # ... and their fields


def creates_waiting_trial(record: dict) -> bool:
    """Whether a journal record creates a waiting (enqueued) trial: a CREATE_TRIAL record with
    a WAITING state (a file or a Redis journal alike)."""
    return record["op_code"] == _CREATE_TRIAL and record.get("state") == TrialState.WAITING


class _WaitingIndex:
    """Optuna looks for waiting (enqueued) trials at every ask by reading every trial of the
    study, which makes a search quadratic in its trials. Waiting trials are made only by
    enqueueing (the seeds, retried trials), so a storage counts the ones it has seen made
    (:meth:`_waiting_made`) and, once a look found none waiting, answers that look at once
    until another is made."""

    def _waiting_made(self, study_id: int) -> int:
        raise NotImplementedError

    def get_all_trials(
        self, study_id: int, deepcopy: bool = True, states: "Container[TrialState] | None" = None
    ) -> list[optuna.trial.FrozenTrial]:
        if states is None or tuple(states) != (TrialState.WAITING,):
            return super().get_all_trials(study_id, deepcopy, states)  # type: ignore[misc]
        made = self._waiting_made(study_id)
        if self._none_waiting.get(study_id) == made:
            return []
        found = super().get_all_trials(study_id, deepcopy, states)  # type: ignore[misc]
        if not found:
            self._none_waiting[study_id] = made
        return found


REPLAY_WORTH = 4  # a replay snapshot is written once the deleted trials not in one are a quarter of the live ones


class _TrialsById(dict):
    """The replay's trials by id. Optuna numbers a new trial ``len(trials)``: every trial ever
    made in a study that existed then, deleted studies' included; ``dropped`` counts the
    trials of deleted studies left out, so the ids go on as Optuna's own replay gives them.

    A study restored from the replay snapshot keeps its trials as the snapshot's text until a
    reader or a record first asks for one of them (:meth:`defer`; ``owner``: trial id -> study
    id): a process that runs one search on a journal holding many builds none of the others'
    trials. Looking up, testing for or getting such a trial builds its study's trials first."""

    dropped = 0

    def __init__(self) -> None:
        super().__init__()
        self.deferred: dict[int, tuple[memoryview, int]] = {}  # study id -> (its trials' JSON text, how many)
        self.deferred_count = 0
        self.owner: dict[int, int] = {}
        self.build: "Callable[[int, memoryview], None] | None" = None  # builds a deferred study's trials from its text

    def __len__(self) -> int:
        return dict.__len__(self) + self.dropped + self.deferred_count

    def live(self) -> int:
        """Trials of the live studies, built or deferred."""
        return dict.__len__(self) + self.deferred_count

    def defer(self, study_id_: int, text: memoryview, count: int) -> None:
        self.deferred[study_id_] = (text, count)
        self.deferred_count += count

    def forget(self, study_id_: int) -> int:
        """Drop a deferred study's trials unbuilt (its study deleted); how many it had (0: none deferred)."""
        _, count = self.deferred.pop(study_id_, (b"", 0))
        self.deferred_count -= count
        return count

    def built(self, study_id_: int) -> None:
        """Build a deferred study's trials (nothing if it has none deferred)."""
        found = self.deferred.pop(study_id_, None)
        if found is not None:
            self.deferred_count -= found[1]
            assert self.build is not None
            self.build(study_id_, found[0])

    def _deferred_owner(self, trial_id_: object) -> int | None:
        owner = self.owner.get(trial_id_)  # type: ignore[call-overload]
        return owner if owner is not None and owner in self.deferred else None

    def __missing__(self, trial_id_: int) -> optuna.trial.FrozenTrial:
        owner = self._deferred_owner(trial_id_)
        if owner is None:
            raise KeyError(trial_id_)
        self.built(owner)
        return dict.__getitem__(self, trial_id_)

    def __contains__(self, trial_id_: object) -> bool:
        return dict.__contains__(self, trial_id_) or self._deferred_owner(trial_id_) is not None

    def get(self, trial_id_: int, default: Any = None) -> Any:
        """``self[trial_id_]`` (building a deferred study's trials), or ``default``."""
        try:
            return self[trial_id_]
        except KeyError:
            return default


class _SharedDistributions(JournalStorageReplayResult):
    """Optuna's replay of a journal, with equal parameter distributions shared: the replay
    builds a new distribution object for every parameter of every trial (0.1 KB each, three
    per trial of a one-topology search: 20 MB of a 64,000-trial search's memory), whether
    the trial was made with its parameters or they were set one by one. A trial made with
    its parameters has them read here, each distribution's JSON parsed once per search
    rather than once per trial (a quarter of the cost of replaying the search's own trials).

    A record that changes a trial (its attributes, its final state) is applied as Optuna's
    replay applies it, to a copy of the trial (a trial handed to a reader never changes under
    it), but a copy made by copying its fields: Optuna's ``copy.copy`` of a trial goes through
    the generic pickling protocol, and four such copies per trial (another writer's trials
    arrive with two user attributes, a constraint and a result) were a third of applying them.
    A trial copied or created by the same read (one :meth:`apply_logs`) is not copied again:
    no reader has it yet (readers take trials under the storage's lock, after the read)."""

    def __init__(self, worker_id_prefix: str) -> None:
        super().__init__(worker_id_prefix)
        self._trials = _TrialsById()
        self._trials.owner = self._trial_id_to_study_id
        self._trials.build = self._build_deferred
        self.dead_since_snapshot = 0  # trials of studies deleted since the replay snapshot (or the first record)
        self.snapshot_records = 0  # the records the replay snapshot covers (restored or written here; 0: none)
        self._shared: dict[optuna.distributions.BaseDistribution, optuna.distributions.BaseDistribution] = {}
        self._parsed: dict[str, optuna.distributions.BaseDistribution] = {}  # by its JSON
        # while armed (a list: _JournalStorage.create_new_trials), the ids of the trials this thread's records create
        self.created_here: list[int] | None = None
        self._unread: set[int] = set()  # trials copied or created by the read being applied (no reader has them)

    def apply_logs(self, logs: Iterable[dict[str, Any]]) -> None:
        self._unread.clear()
        try:
            super().apply_logs(logs)
        finally:
            self._unread.clear()

    def _apply_delete_study(self, log: dict[str, Any]) -> None:
        """As Optuna's replay deletes a study, and its trials with it: Optuna keeps them (they
        count for the ids of later trials, which :class:`_TrialsById` still counts), so a
        journal that held many deleted searches kept every one of their trials in memory, and
        its replay snapshot (:func:`save_replay`) would have to carry them."""
        study_id_ = log["study_id"]
        existed = study_id_ in self._studies
        super()._apply_delete_study(log)
        if existed:
            dropped = self._study_id_to_trial_ids.pop(study_id_, [])
            self.dead_since_snapshot += len(dropped)
            built = not self._trials.forget(study_id_)  # a deferred study's trials go unbuilt
            for t in dropped:
                if built:
                    del self._trials[t]
                self._trial_id_to_study_id.pop(t, None)
            self._trials.dropped += len(dropped)

    def _changed(self, log: dict[str, Any]) -> "optuna.trial.FrozenTrial | None":
        """A copy of the trial ``log`` changes, put in its place (the trial itself if this
        read copied or created it), if it exists and is not finished (Optuna's check: a record
        of this process on a finished trial raises, another's is ignored), else None.
        ``copy.copy`` of a trial, made as fast as its fields allow."""
        trial_id_ = log["trial_id"]
        if not self._trial_exists_and_updatable(trial_id_, log):
            return None
        if trial_id_ in self._unread:
            return self._trials[trial_id_]
        old = self._trials[trial_id_]
        trial = self._trials[trial_id_] = object.__new__(type(old))
        trial.__dict__.update(old.__dict__)
        self._unread.add(trial_id_)
        return trial

    def _apply_set_trial_user_attr(self, log: dict[str, Any]) -> None:
        trial = self._changed(log)
        if trial is not None:
            trial.user_attrs = {**trial.user_attrs, **log["user_attr"]}

    def _apply_set_trial_system_attr(self, log: dict[str, Any]) -> None:
        trial = self._changed(log)
        if trial is not None:
            trial.system_attrs = {**trial.system_attrs, **log["system_attr"]}

    def _apply_set_trial_state_values(self, log: dict[str, Any]) -> None:
        """A finishing record as Optuna's replay applies it (completion time in local time
        without a zone, the state, the values if given); any other through Optuna's."""
        state = TrialState(log["state"])
        if not state.is_finished():
            super()._apply_set_trial_state_values(log)
            return
        trial = self._changed(log)
        if trial is not None:
            trial.datetime_complete = datetime.fromisoformat(log["datetime_complete"]).astimezone().replace(tzinfo=None)
            trial.state = state
            if log["values"] is not None:
                trial.values = log["values"]

    def _build_deferred(self, study_id_: int, text: memoryview) -> None:
        """Build a study's trials from its replay snapshot text (:func:`save_replay`), under the
        ids its study lists, numbered in its order."""
        for number, (trial_id_, form) in enumerate(
            zip(self._study_id_to_trial_ids[study_id_], json.loads(bytes(text)))
        ):
            dict.__setitem__(self._trials, trial_id_, self._trial_of_form(number, trial_id_, form))

    def _trial_of_form(self, number: int, trial_id_: int, t: dict) -> optuna.trial.FrozenTrial:
        """A trial of the replay snapshot (:func:`_replay_form`) as the replay holds it."""
        distributions = {k: self._distribution(v) for k, v in t["distributions"].items()}
        return optuna.trial.FrozenTrial(
            number=number,
            state=TrialState(t["state"]),
            value=None,
            values=t["values"],
            datetime_start=datetime.fromisoformat(t["datetime_start"]) if t["datetime_start"] else None,
            datetime_complete=datetime.fromisoformat(t["datetime_complete"]) if t["datetime_complete"] else None,
            params={k: distributions[k].to_external_repr(v) for k, v in t["params"].items()},
            distributions=distributions,
            user_attrs=t["user_attrs"],
            system_attrs=t["system_attrs"],
            intermediate_values={int(k): v for k, v in t["intermediate_values"].items()},
            trial_id=trial_id_,
        )

    def _distribution(self, text: str) -> optuna.distributions.BaseDistribution:
        if text not in self._parsed:
            d = optuna.distributions.json_to_distribution(text)
            self._parsed[text] = self._shared.setdefault(d, d)
        return self._parsed[text]

    def _apply_create_trial(self, log: dict[str, Any]) -> None:
        # a deferred study's trials first (a new one may take a waiting one's place)
        self._trials.built(log["study_id"])
        given = log.get("distributions")
        made = len(self._trials)  # the id Optuna's replay gives the trial, if it is made (its study exists)
        super()._apply_create_trial({**log, "distributions": {}, "params": {}} if given else log)
        if len(self._trials) == made:
            return
        self._unread.add(made)
        if given:  # its parameters as Optuna's replay reads them
            trial = self._trials[made]
            trial.distributions = {k: self._distribution(v) for k, v in given.items()}
            trial.params = {k: trial.distributions[k].to_external_repr(v) for k, v in log["params"].items()}
        if self.created_here is not None and self._is_issued_by_this_worker(log):
            self.created_here.append(made)

    def _apply_set_trial_param(self, log: dict[str, Any]) -> None:
        super()._apply_set_trial_param(log)
        trial = self._trials.get(log["trial_id"])
        name = log["param_name"]
        if trial is not None and name in trial.distributions:
            trial.distributions[name] = self._shared.setdefault(trial.distributions[name], trial.distributions[name])


def _planned(template_trial: "optuna.trial.FrozenTrial | None") -> bool:
    """A running trial template, not finished (the search's planned trials, made with their
    parameters): what :meth:`_JournalStorage.create_new_trial` writes itself."""
    return (
        template_trial is not None
        and template_trial.state == TrialState.RUNNING
        and template_trial.values is None
        and template_trial.datetime_complete is None
    )


class _JournalStorage(_WaitingIndex, optuna.storages.journal.JournalStorage):
    """Optuna's journal storage on :class:`_BatchSyncedJournal` or a
    :class:`~optimizer.redis_journal.RedisJournal`, with the waiting-trial look answered from
    the records read (another process's enqueued trials count too)."""

    def __init__(self, backend: Any) -> None:
        self._journal = backend
        self._file = isinstance(backend, _BatchSyncedJournal)
        self._none_waiting: dict[int, int] = {}
        self._distribution_json: dict[int, tuple[optuna.distributions.BaseDistribution, str]] = {}
        self._opening = True
        self.replayed = (
            False  # read on first use, not when opened: a status answered from the snapshot reads only its tail
        )
        super().__init__(backend)
        self._replay_result = _SharedDistributions(self._worker_id_prefix)  # nothing replayed yet
        self._opening = False

    def _sync_with_backend(self) -> None:
        """Optuna's (apply the records not read yet), returning at once inside this process's
        batch on a journal file once every record of it is read: nobody else can append while the
        batch holds the write lock (the search's per-trial steps each sync, some six a trial)."""
        if self._opening:
            return
        backend = self._journal
        if self._file and backend._held is not None:
            if self._replay_result.log_number_read == backend._base + len(backend._pending):
                return
        if not self.replayed and self._file and self._replay_result.log_number_read == 0:
            _restored_replay(self, backend)  # a journal file's replay snapshot, if it has one
        self.replayed = True
        super()._sync_with_backend()

    def delete_study(self, study_id: int) -> None:
        """As Optuna's; on a journal file the replay snapshot is written then (:func:`save_replay`),
        so later processes replay none of the deleted studies' records, once the trials deleted
        since the last snapshot are at least 1/REPLAY_WORTH of the live ones (a snapshot costs
        what the live trials hold: it is not rewritten for every small deletion)."""
        super().delete_study(study_id)
        replay = self._replay_result
        if (
            isinstance(replay, _SharedDistributions)
            and REPLAY_WORTH * replay.dead_since_snapshot >= replay._trials.live()
        ):
            save_replay(self)

    def _waiting_made(self, study_id: int) -> int:
        self.get_study_directions(study_id)  # a read: the records other processes wrote meanwhile are read in
        return self._journal.waiting_made

    def create_new_trial(self, study_id: int, template_trial: "optuna.trial.FrozenTrial | None" = None) -> int:
        """As Optuna's, but a running trial made with its parameters (the search's planned
        trials) has each distribution's JSON encoded once per storage, not once per trial
        (Optuna encodes every distribution of every trial: a fifth of making one). The
        record is the one Optuna writes, field for field."""
        if not _planned(template_trial):
            return super().create_new_trial(study_id, template_trial)
        with self._thread_lock:
            self._write_log(_CREATE_TRIAL, self._creation(study_id, template_trial))
            self._sync_with_backend()
            return self._replay_result._last_created_trial_id_by_this_process

    def create_new_trials(self, study_id: int, templates: "list[optuna.trial.FrozenTrial]") -> list[int]:
        """:meth:`create_new_trial` for each of ``templates`` (running trials made with their
        parameters), their records appended in one step and read back once; returns the new
        trials' ids in the order of ``templates``. On a Redis journal that is one round trip
        for a batch's trials (numbered one after another by the server's script: no other
        writer's record falls between them), where one per trial, made while the search's
        claim was held, kept the other runners waiting; on a journal file one write. The
        records are the ones :meth:`create_new_trial` writes, in the same order."""
        if not all(_planned(t) for t in templates):
            return [self.create_new_trial(study_id, t) for t in templates]
        if not templates:
            return []
        with self._thread_lock:
            replay = self._replay_result
            logs = [
                {"op_code": _CREATE_TRIAL, "worker_id": replay.worker_id, **self._creation(study_id, t)}
                for t in templates
            ]
            made = replay.created_here = []
            try:  # (a study deleted meanwhile: the replay of this process's record raises KeyError, as Optuna's)
                self._backend.append_logs(logs)
                self._sync_with_backend()
            finally:
                replay.created_here = None
        return made

    def _creation(self, study_id: int, template_trial: optuna.trial.FrozenTrial) -> dict[str, Any]:
        """The fields of the CREATE_TRIAL record of a planned trial (as Optuna writes them)."""
        start = template_trial.datetime_start
        return {
            "study_id": study_id,
            "datetime_start": start.astimezone(timezone.utc).isoformat(timespec="microseconds") if start else None,
            "state": template_trial.state,
            "value": None,
            "values": None,
            "distributions": {k: self._json_of(d) for k, d in template_trial.distributions.items()},
            "params": {
                k: template_trial.distributions[k].to_internal_repr(v) for k, v in template_trial.params.items()
            },
            "user_attrs": template_trial.user_attrs,
            "system_attrs": template_trial.system_attrs,
            "intermediate_values": template_trial.intermediate_values,
        }

    def set_trial_attrs(self, trial_id: int, user_attrs: dict[str, Any], system_attrs: dict[str, Any]) -> None:
        """Set a trial's user and system attributes in one step: one record each, as Optuna's
        set_trial_user_attr and set_trial_system_attr write them, read back together."""
        with self._thread_lock:
            for key, value in user_attrs.items():
                self._write_log(_SET_TRIAL_USER_ATTR, {"trial_id": trial_id, "user_attr": {key: value}})
            for key, value in system_attrs.items():
                self._write_log(_SET_TRIAL_SYSTEM_ATTR, {"trial_id": trial_id, "system_attr": {key: value}})
            self._sync_with_backend()

    def _json_of(self, distribution: optuna.distributions.BaseDistribution) -> str:
        """``distribution_to_json(distribution)``, kept per distribution object (the search
        space's objects are made once per search)."""
        kept = self._distribution_json.get(id(distribution))
        if kept is None or kept[0] is not distribution:
            kept = self._distribution_json[id(distribution)] = (
                distribution,
                optuna.distributions.distribution_to_json(distribution),
            )
        return kept[1]


class _MemoryStorage(_WaitingIndex, optuna.storages.InMemoryStorage):
    """Optuna's in-memory storage with the waiting-trial look answered from the trials
    enqueued here (nothing else can add to it)."""

    def __init__(self) -> None:
        super().__init__()
        self._none_waiting: dict[int, int] = {}
        self._made = 0

    def create_new_trial(self, study_id: int, template_trial: "optuna.trial.FrozenTrial | None" = None) -> int:
        """As Optuna's, but a running trial made with its parameters (the search's planned
        trials) takes its parameters, distributions and attributes as given (the dicts
        copied, not their contents): Optuna deep-copies the template, every distribution with
        it, which cost as much as the rest of asking for a trial."""
        if template_trial is None or template_trial.state != TrialState.RUNNING or template_trial.intermediate_values:
            self._made += template_trial is not None and template_trial.state == TrialState.WAITING
            return super().create_new_trial(study_id, template_trial)
        made = super().create_new_trial(study_id)  # running, nothing given yet
        with self._lock:
            stored = self.get_trial(made)  # this storage's own trial, not a copy: no one has read it yet
            stored.params, stored.distributions = dict(template_trial.params), dict(template_trial.distributions)
            stored.user_attrs, stored.system_attrs = dict(template_trial.user_attrs), dict(template_trial.system_attrs)
        return made

    def _waiting_made(self, study_id: int) -> int:
        return self._made

    def set_trial_attrs(self, trial_id: int, user_attrs: dict[str, Any], system_attrs: dict[str, Any]) -> None:
        """Set a trial's user and system attributes in one step: what Optuna's
        set_trial_user_attr and set_trial_system_attr do one attribute at a time (each a copy
        of the trial and of its attribute dict), with one copy of each."""
        with self._lock:
            trial = self._get_trial(trial_id)
            self.check_trial_is_updatable(trial_id, trial.state)
            trial = copy.copy(trial)
            trial.user_attrs = {**trial.user_attrs, **user_attrs}
            trial.system_attrs = {**trial.system_attrs, **system_attrs}
            self._set_trial(trial_id, trial)


def tell(study: optuna.Study, trial: optuna.Trial, values: list[float]) -> None:
    """Finish ``trial`` with ``values`` as ``study.tell`` does (the sampler's after_trial, the
    state and values stored), without making the deep copy of the trial it returns."""
    _tell_with_warning(study=study, trial=trial, value_or_values=values)


def create_trials(storage: BaseStorage, study_id_: int, templates: list[optuna.trial.FrozenTrial]) -> list[int]:
    """``storage.create_new_trial(study_id_, template_trial=t)`` for each of ``templates`` in
    turn; a journal (file or Redis) writes them in one step
    (:meth:`_JournalStorage.create_new_trials`). Returns their trial ids in order."""
    if isinstance(storage, _JournalStorage):
        return storage.create_new_trials(study_id_, templates)
    return [storage.create_new_trial(study_id_, template_trial=t) for t in templates]


def record_trial(
    study: optuna.Study,
    trial: optuna.Trial,
    user_attrs: dict[str, Any],
    constraints: dict[str, float],
    values: list[float],
) -> None:
    """Give ``trial`` its user attrs and constraints, then tell it ``values``: what
    ``trial.set_user_attr``, ``trial.set_constraint`` (a value as float, NaN refused) and
    :func:`tell` do, call by call. On a journal and in memory the attributes are set in one
    storage step (:meth:`_JournalStorage.set_trial_attrs`, :meth:`_MemoryStorage.set_trial_attrs`):
    the same records, without a read-back or a copy of the trial per attribute and a read of the
    trial before each constraint."""
    storage = study_storage(study)
    if not isinstance(storage, (_JournalStorage, _MemoryStorage)):
        for key, value in user_attrs.items():
            trial.set_user_attr(key, value)
        for key, value in constraints.items():
            trial.set_constraint(key, value)
    else:
        system = {}
        for key, value in constraints.items():
            system[f"{_CONSTRAINTS_KEY}:{key}"] = float(value)
            if math.isnan(system[f"{_CONSTRAINTS_KEY}:{key}"]):
                raise ValueError(f"Attempted to set a constraint for {key!r}, but NaN is not allowed.")
        storage.set_trial_attrs(trial_id(trial), user_attrs, system)
    tell(study, trial, values)


def trials_from(storage: BaseStorage, study_id_: int, number: int) -> list[optuna.trial.FrozenTrial]:
    """The study's trials numbered ``number`` and up, in number order (not copied: do not
    change them), reading none before ``number`` where the storage allows it: Optuna's
    public API returns every trial of a study, which makes anything done per batch over
    "the trials since last time" quadratic in the search. A journal's replayed trials (a
    file or a Redis server: its private ``_replay_result``, synced with the backend first
    under the storage's ``_thread_lock``) and the in-memory storage's trial lists (its private ``_studies``,
    under ``_lock``) are sliced; any other storage gives every trial and is sliced here."""
    if isinstance(storage, optuna.storages.journal.JournalStorage):
        with storage._thread_lock:
            storage._sync_with_backend()
            replay = storage._replay_result
            return [replay._trials[t] for t in replay._study_id_to_trial_ids[study_id_][number:]]
    if isinstance(storage, _MemoryStorage):
        with storage._lock:
            return storage._studies[study_id_].trials[number:]
    return storage.get_all_trials(study_id_, deepcopy=False)[number:]


def trial_count(storage: BaseStorage, study_id_: int, known: int = 0) -> int:
    """The number of trials of a study, of which at least ``known`` are known to exist: a
    journal or memory counts only the trials from ``known`` on (:func:`trials_from`), any
    other storage answers its own count."""
    if isinstance(storage, (optuna.storages.journal.JournalStorage, _MemoryStorage)):
        return known + len(trials_from(storage, study_id_, known))
    return storage.get_n_trials(study_id_)


@dataclass
class TrialTally:
    """Finished, running and feasible trials of one study and its best trial by ``key``
    (smallest first), kept up to date by :meth:`update`, which reads only the trials from
    the first one not yet finished (:func:`trials_from`): a batch's or a status poll's cost
    does not grow with the search. ``feasible``: constraint ``violation`` at most 0. On
    equal keys the earlier trial stays best, unless ``same(a, b)`` says the later one is
    the same design (then the later one, as a ranking that collapses duplicates keeps)."""

    storage: BaseStorage | None  # None: counted from a journal's records (JournalSummary), not read from a storage
    study_id: int
    key: "Callable[[optuna.trial.FrozenTrial], tuple] | None" = None
    same: "Callable[[optuna.trial.FrozenTrial, optuna.trial.FrozenTrial], bool] | None" = None
    complete: int = 0
    running: int = 0
    feasible: int = 0
    best: "optuna.trial.FrozenTrial | None" = None
    _low: int = 0  # every trial numbered below is finished and counted
    _counted: set[int] = field(default_factory=set)  # finished trials numbered _low and up, counted
    _best_key: tuple = ()
    memo: dict = field(default_factory=dict)  # what a caller derives from the tally (e.g. the best's record)

    def update(self, trials: "list[optuna.trial.FrozenTrial] | None" = None) -> "TrialTally":
        """Count the trials finished since the last update; returns itself. ``trials``: the
        study's trials from number ``_low`` on, when the caller has them (else read here)."""
        running, settled = 0, True
        if trials is None:
            assert self.storage is not None
            trials = trials_from(self.storage, self.study_id, self._low)
        for t in trials:
            if t.state.is_finished():
                if t.number not in self._counted:
                    self.count(t)
                if settled:
                    self._low = t.number + 1
                    self._counted.discard(t.number)
                else:
                    self._counted.add(t.number)
            else:
                settled = False
                running += t.state == optuna.trial.TrialState.RUNNING
        self.running = running
        return self

    def count(self, trial: optuna.trial.FrozenTrial) -> None:
        """Count one finished trial (each once)."""
        if trial.state != optuna.trial.TrialState.COMPLETE:
            return
        self.complete += 1
        self.feasible += trial.system_attrs.get("constraints:violation", 1.0) <= 0
        if self.key is None:
            return
        key = self.key(trial)
        if (
            self.best is None
            or key < self._best_key
            or (key == self._best_key and self.same is not None and self.same(trial, self.best))
        ):
            self.best, self._best_key = trial, key


_tallies: "weakref.WeakKeyDictionary[BaseStorage, dict[tuple, TrialTally]]" = weakref.WeakKeyDictionary()


def tally(
    storage: BaseStorage, study_id_: int, key: "Callable | None" = None, same: "Callable | None" = None
) -> TrialTally:
    """The up-to-date :class:`TrialTally` of a study, kept per storage in this process, so
    repeated status polls read only what changed since the last one."""
    with _lock:
        tallies = _tallies.setdefault(storage, {})
        kept = tallies.setdefault((study_id_, key, same), TrialTally(storage, study_id_, key, same))
    with _tally_lock:
        return kept.update()


_tally_lock = threading.Lock()

_STUDY_OPS = (0, 1, 2, 3)  # the journal's record codes: create, delete study; set a study's user, system attr
_TRIAL_OPS = (4, 5, 6, 8, 9)  # create trial, set its parameter, state and values, user attr, system attr


def _when(text: str | None) -> datetime | None:
    """A journal's ISO time as Optuna's replay reads it (local time, naive)."""
    return datetime.fromisoformat(text).astimezone().replace(tzinfo=None) if text else None


class JournalSummary:
    """What a status poll and a listing need of every study in a journal file, kept from the
    journal's records without Optuna's replay (which rebuilds every trial of every study,
    42 s for 16,000 trials under load): each study's name, directions and attrs, its trial
    count, a :class:`TrialTally` of its finished trials (complete, feasible, best by ``key``)
    and its unfinished trials in full. ``records`` and ``offset``: the records applied and
    the byte offset just after the last of them.

    Records are applied as Optuna's replay applies them (JournalStorageReplayResult: trial
    ids counted over the trials of studies that exist, numbers per study, a study name
    created once, updates to a finished or unknown trial ignored, a running trial never
    started twice), so the counts and the best equal those of the replayed storage
    (tests/test_snapshot.py compares them)."""

    def __init__(self, key: "Callable | None", same: "Callable | None") -> None:
        self.key, self.same = key, same
        self.records = 0
        self.offset = 0
        self.next_study = 0
        self.next_trial = 0
        self.studies: dict[int, dict] = {}  # study id -> name, directions, user_attrs, system_attrs, trials (count)
        self.tallies: dict[int, TrialTally] = {}
        self.best: dict[int, tuple[int, dict]] = {}  # study id -> (trial id, the best trial in journal form)
        self.open: dict[int, dict] = {}  # trial id -> an unfinished trial in journal form

    def study_id(self, name: str) -> int | None:
        return next((i for i, s in self.studies.items() if s["name"] == name), None)

    def counts(self, study_id_: int) -> tuple[int, int, int]:
        """(complete, running, feasible) trials of a study."""
        counted = self.tallies[study_id_]
        running = sum(t["study"] == study_id_ and t["state"] == TrialState.RUNNING.value for t in self.open.values())
        return counted.complete, running, counted.feasible

    def catch_up(self, backend: "_BatchSyncedJournal") -> None:
        """Apply the journal's records written after :attr:`offset` (its complete lines)."""
        for number, offset, record in backend._scan(self.records, self.offset):
            self.apply(record)
            self.records, self.offset = number, offset

    def apply(self, log: dict) -> None:
        """Apply one journal record."""
        op = log["op_code"]
        if op in _STUDY_OPS:
            self._apply_study(op, log)
        elif op == _TRIAL_OPS[0]:
            self._create_trial(log)
        elif op in _TRIAL_OPS:
            trial = self.open.get(log.get("trial_id", -1))
            if trial is None:
                return  # finished (updates are ignored), or of a deleted study
            if op == 5:
                trial["params"][log["param_name"]] = log["param_value_internal"]
                trial["distributions"][log["param_name"]] = log["distribution"]
            elif op == 6:
                state = TrialState(log["state"])
                if state == TrialState.RUNNING:
                    if trial["state"] == TrialState.RUNNING.value:
                        return  # started by another process already
                    trial["datetime_start"] = log["datetime_start"]
                if state.is_finished():
                    trial["datetime_complete"] = log["datetime_complete"]
                trial["state"] = state.value
                if log["values"] is not None:
                    trial["values"] = log["values"]
                if state.is_finished():
                    self._finish(log["trial_id"])
            else:
                trial["user_attrs" if op == 8 else "system_attrs"].update(
                    log["user_attr" if op == 8 else "system_attr"]
                )

    def _apply_study(self, op: int, log: dict) -> None:
        if op == 0:
            if self.study_id(log["study_name"]) is None:
                self.studies[self.next_study] = {
                    "name": log["study_name"],
                    "directions": log["directions"],
                    "user_attrs": {},
                    "system_attrs": {},
                    "trials": 0,
                }
                self.tallies[self.next_study] = TrialTally(None, self.next_study, self.key, self.same)
                self.next_study += 1
            return
        found = self.studies.get(log["study_id"])
        if found is None:
            return
        if op == 1:
            del self.studies[log["study_id"]], self.tallies[log["study_id"]]
            self.best.pop(log["study_id"], None)
            self.open = {i: t for i, t in self.open.items() if t["study"] != log["study_id"]}
        else:
            field_ = "user_attrs" if op == 2 else "system_attrs"  # replaced, not changed: a reader may hold the old
            found[field_] = {**found[field_], **log["user_attr" if op == 2 else "system_attr"]}

    def _create_trial(self, log: dict) -> None:
        study = self.studies.get(log["study_id"])
        if study is None:
            return
        trial_id_ = self.next_trial
        self.next_trial += 1
        values = log.get("values")
        if values is None and log.get("value") is not None:
            values = [log["value"]]
        self.open[trial_id_] = {
            "study": log["study_id"],
            "number": study["trials"],
            "state": int(log.get("state", TrialState.RUNNING.value)),
            "params": dict(log.get("params") or {}),
            "distributions": dict(log.get("distributions") or {}),
            "user_attrs": dict(log.get("user_attrs") or {}),
            "system_attrs": dict(log.get("system_attrs") or {}),
            "values": values,
            "datetime_start": log.get("datetime_start"),
            "datetime_complete": log.get("datetime_complete"),
        }
        study["trials"] += 1
        if TrialState(self.open[trial_id_]["state"]).is_finished():
            self._finish(trial_id_)

    def _finish(self, trial_id_: int) -> None:
        trial = self.open.pop(trial_id_)
        counted = self.tallies[trial["study"]]
        before = counted.best
        counted.count(self.frozen(trial_id_, trial))
        if counted.best is not before:
            self.best[trial["study"]] = (trial_id_, trial)

    @staticmethod
    def frozen(trial_id_: int, trial: dict) -> optuna.trial.FrozenTrial:
        """A trial in journal form as Optuna's replay builds it."""
        distributions = {k: optuna.distributions.json_to_distribution(v) for k, v in trial["distributions"].items()}
        return optuna.trial.FrozenTrial(
            number=trial["number"],
            state=TrialState(trial["state"]),
            value=None,
            values=trial["values"],
            datetime_start=_when(trial["datetime_start"]),
            datetime_complete=_when(trial["datetime_complete"]),
            params={k: distributions[k].to_external_repr(v) for k, v in trial["params"].items()},
            distributions=distributions,
            user_attrs=trial["user_attrs"],
            system_attrs=trial["system_attrs"],
            intermediate_values={},
            trial_id=trial_id_,
        )

    def to_json(self) -> dict:
        return {
            "records": self.records,
            "offset": self.offset,
            "next_study": self.next_study,
            "next_trial": self.next_trial,
            "studies": {
                str(i): {**s, "complete": self.tallies[i].complete, "feasible": self.tallies[i].feasible}
                for i, s in self.studies.items()
            },
            "best": {str(i): list(b) for i, b in self.best.items()},
            "open": {str(i): t for i, t in self.open.items()},
        }

    @classmethod
    def from_json(cls, data: dict, key: "Callable | None", same: "Callable | None") -> "JournalSummary":
        summary = cls(key, same)
        summary.records, summary.offset = int(data["records"]), int(data["offset"])
        summary.next_study, summary.next_trial = int(data["next_study"]), int(data["next_trial"])
        for text, study in data["studies"].items():
            i = int(text)
            complete, feasible = int(study.pop("complete")), int(study.pop("feasible"))
            summary.studies[i] = study
            summary.tallies[i] = TrialTally(None, i, key, same, complete=complete, feasible=feasible)
        for text, (trial_id_, trial) in data["best"].items():
            i = int(text)
            summary.best[i] = (int(trial_id_), trial)
            counted = summary.tallies[i]
            counted.best = cls.frozen(int(trial_id_), trial)
            counted._best_key = key(counted.best) if key is not None else ()
        summary.open = {int(i): t for i, t in data["open"].items()}
        return summary


SNAPSHOT_EVERY = 1_000_000  # bytes (about 300 trials): a search writes a new snapshot once its journal grew this much
_SNAPSHOT_FORMAT = "stagefit journal snapshot"
_SNAPSHOT_VERSION = 1
_MARK = 4096  # bytes of the journal hashed at its head and just before the snapshot's offset
_summaries: "weakref.WeakKeyDictionary[BaseStorage, JournalSummary]" = weakref.WeakKeyDictionary()
_summary_lock = threading.Lock()


def snapshot_path(journal: str | Path) -> Path:
    """The snapshot file beside a journal file."""
    return Path(f"{journal}.snapshot")


def _digest(path: str, start: int, end: int) -> str:
    """SHA-256 of the journal's bytes [start, end) (of fewer if the file is shorter)."""
    with open(path, "rb") as handle:
        handle.seek(start)
        return hashlib.sha256(handle.read(end - start)).hexdigest()


def _write_snapshot(backend: "_BatchSyncedJournal", summary: JournalSummary) -> int:
    """Write the snapshot beside the journal (:func:`_write_cache`); returns its size in bytes."""
    payload = json.dumps(summary.to_json(), separators=(",", ":")).encode("utf-8")
    return _write_cache(backend, snapshot_path(backend._path), summary.records, summary.offset, payload)


def _write_cache(
    backend: "_BatchSyncedJournal", target: Path, records: int, offset: int, payload: bytes | list[bytes]
) -> int:
    """Write a cache of the journal's state at record ``records`` (byte ``offset``) to
    ``target``: a header line (what it covers, the journal's bytes it was taken against, the
    payload's length and SHA-256), then the payload (bytes, or its pieces in order: written
    one after another, never joined into a copy); to a temporary file first, then os.replace,
    so a reader sees the old file or the new one. Returns its size in bytes."""
    pieces = [payload] if isinstance(payload, bytes) else payload
    digest = hashlib.sha256()
    for piece in pieces:
        digest.update(piece)
    header = {
        "format": _SNAPSHOT_FORMAT,
        "version": _SNAPSHOT_VERSION,
        "records": records,
        "offset": offset,
        "head": _digest(backend._path, 0, min(offset, _MARK)),
        "mark": _digest(backend._path, max(offset - _MARK, 0), offset),
        "length": sum(len(piece) for piece in pieces),
        "sha256": digest.hexdigest(),
    }
    temporary = target.with_name(f".{target.name}.{os.getpid()}.{threading.get_ident()}.tmp")
    with open(temporary, "wb") as handle:
        size = handle.write(json.dumps(header).encode("utf-8") + b"\n")
        for piece in pieces:
            size += handle.write(piece)
    os.replace(temporary, target)
    return size


def _read_cache(backend: "_BatchSyncedJournal", target: Path, parse: bool = True) -> tuple[dict, Any] | None:
    """(header, parsed payload; the payload's bytes without ``parse``) of a cache
    :func:`_write_cache` wrote, or None if it is missing, damaged, half-written, or taken of
    other bytes than the journal now holds (rewritten by a repair, or another journal)."""
    try:
        data = target.read_bytes()
    except FileNotFoundError:
        return None
    except OSError as exc:
        log.warning("journal snapshot %s unreadable (%s): the journal is replayed in full", target, exc)
        return None
    head, _, payload = data.partition(b"\n")
    try:
        header = json.loads(head)
        fits = (
            header["format"] == _SNAPSHOT_FORMAT
            and header["version"] == _SNAPSHOT_VERSION
            and header["length"] == len(payload)
            and header["sha256"] == hashlib.sha256(payload).hexdigest()
        )
    except (ValueError, TypeError, KeyError):
        fits = False
    if not fits:
        log.warning("journal snapshot %s damaged or half-written: ignored, the journal is replayed in full", target)
        return None
    offset = header["offset"]
    try:
        same_bytes = os.path.getsize(backend._path) >= offset and (
            _digest(backend._path, 0, min(offset, _MARK)) == header["head"]
            and _digest(backend._path, max(offset - _MARK, 0), offset) == header["mark"]
        )
    except OSError:
        same_bytes = False
    if not same_bytes:
        log.info("journal snapshot %s was taken of other journal bytes: ignored", target)
        return None
    if not parse:
        return header, payload
    try:
        return header, json.loads(payload)
    except ValueError:
        log.warning("journal snapshot %s unreadable: ignored, the journal is replayed in full", target)
        return None


def _read_snapshot(
    backend: "_BatchSyncedJournal", key: "Callable | None", same: "Callable | None"
) -> JournalSummary | None:
    """The journal's snapshot (:func:`_read_cache`), or None if there is no usable one."""
    found = _read_cache(backend, snapshot_path(backend._path))
    if found is None:
        return None
    header, data = found
    try:
        summary = JournalSummary.from_json(data, key, same)
    except (ValueError, TypeError, KeyError, AttributeError):
        log.warning(
            "journal snapshot %s unreadable: ignored, the journal is replayed in full", snapshot_path(backend._path)
        )
        return None
    return summary if (summary.records, summary.offset) == (header["records"], header["offset"]) else None


def journal_summary(
    storage: BaseStorage, key: "Callable | None" = None, same: "Callable | None" = None
) -> JournalSummary | None:
    """The :class:`JournalSummary` of a journal file this process has not replayed: its
    snapshot brought up to date with the records after it (kept per storage, so repeated
    polls read only what was written since). None for any other storage, for a journal this
    process has replayed (its own trials are current: :func:`tally`), and for a journal
    without a usable snapshot (then the full replay answers). ``key``, ``same``: as for
    :class:`TrialTally`, the same on every call."""
    backend = _journal_backends.get(storage)
    if backend is None or getattr(storage, "replayed", True):
        return None
    with _summary_lock:
        kept = _summaries.get(storage)
        if kept is None:
            kept = _read_snapshot(backend, key, same)
            if kept is None:
                return None
            _summaries[storage] = kept
        kept.catch_up(backend)
        return kept


def save_snapshot(
    storage: BaseStorage, key: "Callable | None" = None, same: "Callable | None" = None, every: int = 0
) -> None:
    """Write the snapshot of a journal file (:func:`snapshot_path`) if it has grown ``every``
    bytes, and four times the last snapshot's size, past the last one this process wrote. Made from this process's replayed
    state (:func:`_summary_of`; the tallies are incremental), so a write costs what the
    studies' attrs and unfinished trials cost, not what the journal holds. Nothing for other
    storages. Called between a search's batches and when it ends; a snapshot is a cache,
    never the record: a reader that finds it missing, damaged or stale replays the journal."""
    backend = _journal_backends.get(storage)
    if backend is None:
        return
    offset, size = _snapshot_marks.get(storage, (0, 0))
    if every and os.path.getsize(backend._path) - offset < max(every, 4 * size):
        return
    summary = _summary_of(storage, backend, key, same)
    if summary is not None:
        _snapshot_marks[storage] = (summary.offset, _write_snapshot(backend, summary))


# per journal storage: (journal offset, bytes) of the last snapshot this process wrote; a new one is
# written once the journal has grown four times the last one's size (or ``every``), so writing
# snapshots costs at most a quarter of the journal's own writes however many searches it holds
_snapshot_marks: "weakref.WeakKeyDictionary[BaseStorage, tuple[int, int]]" = weakref.WeakKeyDictionary()


def _journal_form(trial: optuna.trial.FrozenTrial, study_id_: int) -> dict:
    """A replayed trial as :class:`JournalSummary` keeps it (the journal's encodings)."""
    return {
        "study": study_id_,
        "number": trial.number,
        "state": trial.state.value,
        "params": {k: trial.distributions[k].to_internal_repr(v) for k, v in trial.params.items()},
        "distributions": {k: optuna.distributions.distribution_to_json(d) for k, d in trial.distributions.items()},
        "user_attrs": trial.user_attrs,
        "system_attrs": trial.system_attrs,
        "values": trial.values,
        "datetime_start": trial.datetime_start.isoformat() if trial.datetime_start else None,
        "datetime_complete": trial.datetime_complete.isoformat() if trial.datetime_complete else None,
    }


def _summary_of(
    storage: BaseStorage, backend: _BatchSyncedJournal, key: "Callable | None", same: "Callable | None"
) -> JournalSummary | None:
    """The :class:`JournalSummary` of a journal storage's replayed state, at the record its
    backend has read to (None while a batch of this process is open: its records are not on
    file yet). Each study's tally is the one :func:`tally` keeps, brought up to date from the
    replayed trials under the storage's lock, so nothing is read past that record. A study whose
    trials are still deferred (:class:`_TrialsById`: untouched since the replay snapshot) takes
    its tally from this process's reading of the listing snapshot where that one holds it with
    as many trials (it read the same records of that study), so writing the snapshot builds none."""
    summary = JournalSummary(key, same)
    listed = _summaries.get(storage)
    if listed is not None and (listed.key, listed.same) != (key, same):
        listed = None
    with _tally_lock, storage._thread_lock:
        storage._sync_with_backend()
        replay = storage._replay_result
        if backend._held is not None or backend._resume[0] != replay.log_number_read:
            return None
        summary.records, summary.offset = backend._resume
        summary.next_study, summary.next_trial = replay._next_study_id, len(replay._trials)
        for sid, study in replay._studies.items():
            ids = replay._study_id_to_trial_ids[sid]
            summary.studies[sid] = {
                "name": study.study_name,
                "directions": [d.value for d in study.directions],
                "user_attrs": study.user_attrs,
                "system_attrs": study.system_attrs,
                "trials": len(ids),
            }
            if (
                sid in replay._trials.deferred
                and listed is not None
                and listed.studies.get(sid, {}).get("trials") == len(ids)
            ):
                summary.tallies[sid] = listed.tallies[sid]
                if sid in listed.best:
                    summary.best[sid] = listed.best[sid]
                summary.open.update({t: form for t, form in listed.open.items() if form["study"] == sid})
                continue
            with _lock:
                kept = _tallies.setdefault(storage, {}).setdefault(
                    (sid, key, same), TrialTally(storage, sid, key, same)
                )
            kept.update([replay._trials[t] for t in ids[kept._low :]])
            summary.tallies[sid] = kept
            if kept.best is not None:
                summary.best[sid] = (trial_id(kept.best), _journal_form(kept.best, sid))
            for t in ids[kept._low :]:
                if not replay._trials[t].state.is_finished():
                    summary.open[t] = _journal_form(replay._trials[t], sid)
    return summary


def replay_path(journal: str | Path) -> Path:
    """The replay snapshot beside a journal file (:func:`save_replay`)."""
    return Path(f"{journal}.replay")


def save_replay(storage: BaseStorage) -> bool:
    """Write the replay snapshot of a journal file: this process's replayed state (every
    study and every trial of it, at the record its backend has read to, in the journal's
    encodings), so that a process opening the journal later restores it and replays only the
    records after it. A deleted study is in it no more (the replay drops its trials): opening
    a journal then costs what its live searches hold, however many searches were deleted
    from it (a journal used for many ``--fresh`` runs). Each study's trials are a text of
    their own, built only when the restoring process first reads one of them
    (:class:`_TrialsById`); a study this process never built is written back as the text it
    restored. Written when a search is deleted and the deleted trials since the last one are
    worth it (:meth:`_JournalStorage.delete_study`); a cache, never the record, checked against
    the journal's bytes as the snapshot is (:func:`_read_cache`). Returns whether it was written
    (not while a batch of this process is open, nor for other storages)."""
    backend = _journal_backends.get(storage)
    if backend is None:
        return False
    with storage._thread_lock:
        storage._sync_with_backend()
        replay = storage._replay_result
        if backend._held is not None or backend._resume[0] != replay.log_number_read:
            return False
        records, offset = backend._resume
        encoded: dict[int, str] = {}  # distribution_to_json by the distribution object's id (shared ones)
        studies, texts = [], []
        for sid, study in replay._studies.items():
            deferred = replay._trials.deferred.get(sid)
            ids = replay._study_id_to_trial_ids[sid]
            text = (
                deferred[0]
                if deferred is not None
                else json.dumps([_replay_form(replay._trials[t], encoded) for t in ids], separators=(",", ":")).encode()
            )
            texts.append(text)
            studies.append(
                {
                    "id": sid,
                    "name": study.study_name,
                    "directions": [d.value for d in study.directions],
                    "user_attrs": study.user_attrs,
                    "system_attrs": study.system_attrs,
                    "trial_ids": ids,
                    "length": len(text),
                }
            )
        index = {"layout": REPLAY_LAYOUT, "next_study": replay._next_study_id, "next_trial": len(replay._trials)}
        index["studies"] = studies
        payload = [json.dumps(index, separators=(",", ":")).encode("utf-8"), b"\n", *texts]
        replay.dead_since_snapshot, replay.snapshot_records = 0, records
    _write_cache(backend, replay_path(backend._path), records, offset, payload)
    return True


REPLAY_TAIL = 5_000  # records (about 1,000 trials) past the replay snapshot that make a new one worth writing


def save_replay_when_worth(storage: BaseStorage) -> bool:
    """Write the replay snapshot (:func:`save_replay`) of a journal file that is kept for more
    than one search (it holds another live search, or has a replay snapshot already) once the
    records past the last snapshot are REPLAY_TAIL or more: the next process on it then
    restores this one's searches instead of replaying their records (some 0.3 s per 4,000-trial
    search, against some 0.13 s to write it), and builds only those it reads. A command calls it
    when its search is done; a journal holding one search is left as it is. Returns whether it was written."""
    backend = _journal_backends.get(storage)
    replay = getattr(storage, "_replay_result", None)
    if backend is None or not isinstance(replay, _SharedDistributions):
        return False
    with storage._thread_lock:
        storage._sync_with_backend()
        if replay.log_number_read - replay.snapshot_records < REPLAY_TAIL:
            return False
        if len(replay._studies) < 2 and not replay_path(backend._path).is_file():
            return False
    return save_replay(storage)


REPLAY_LAYOUT = 2  # the replay snapshot's payload: an index line, then each study's trials as a text of its own


def _replay_form(trial: optuna.trial.FrozenTrial, encoded: dict[int, str]) -> dict:
    """A trial as the replay snapshot keeps it (the journal's encodings; ``encoded``: each
    distribution object's JSON, made once)."""
    distributions = {}
    for k, d in trial.distributions.items():
        if id(d) not in encoded:
            encoded[id(d)] = optuna.distributions.distribution_to_json(d)
        distributions[k] = encoded[id(d)]
    return {
        "state": trial.state.value,
        "params": {k: trial.distributions[k].to_internal_repr(v) for k, v in trial.params.items()},
        "distributions": distributions,
        "user_attrs": trial.user_attrs,
        "system_attrs": trial.system_attrs,
        "values": trial.values,
        "intermediate_values": {str(k): v for k, v in trial.intermediate_values.items()},
        "datetime_start": trial.datetime_start.isoformat() if trial.datetime_start else None,
        "datetime_complete": trial.datetime_complete.isoformat() if trial.datetime_complete else None,
    }


def _restored_replay(storage: "_JournalStorage", backend: _BatchSyncedJournal) -> bool:
    """Restore a journal storage's replayed state from its replay snapshot (:func:`save_replay`)
    before its first replay: the studies and their trial ids at once, each study's trials
    deferred until first read; the backend then reads on from the record after it. False
    (nothing changed) without a usable snapshot."""
    found = _read_cache(backend, replay_path(backend._path), parse=False)
    if found is None:
        return False
    header, payload = found
    replay = _SharedDistributions(storage._worker_id_prefix)
    head, _, texts = payload.partition(b"\n")
    chunks = memoryview(texts)
    try:
        index = json.loads(head)
        if not isinstance(index, dict) or index.get("layout") != REPLAY_LAYOUT:  # an earlier version's: rewritten later
            log.info("journal replay snapshot %s of another layout: ignored", backend._path)
            return False
        start = 0
        for study in index["studies"]:
            sid = int(study["id"])
            replay._next_study_id = sid  # made as its creation record makes it, under its own id
            replay._apply_create_study(
                {"study_name": study["name"], "directions": study["directions"], "worker_id": ""}
            )
            made = replay._studies[sid]
            made.user_attrs, made.system_attrs = study["user_attrs"], study["system_attrs"]
            ids = replay._study_id_to_trial_ids[sid] = [int(t) for t in study["trial_ids"]]
            for t in ids:
                replay._trial_id_to_study_id[t] = sid
            end = start + int(study["length"])
            if end > len(texts):
                raise ValueError("a study's trials run past the payload")
            if ids:
                replay._trials.defer(sid, chunks[start:end], len(ids))  # a view: the text is not copied
            start = end
        replay._next_study_id = int(index["next_study"])
        replay._trials.dropped = int(index["next_trial"]) - replay._trials.live()
        replay.log_number_read = replay.snapshot_records = int(header["records"])
    except (ValueError, TypeError, KeyError, AttributeError):
        log.warning("journal replay snapshot %s unreadable: ignored, the journal is replayed in full", backend._path)
        return False
    storage._replay_result = replay
    backend._resume = (replay.log_number_read, int(header["offset"]))
    return True


@dataclass
class JournalReport:
    """What :func:`check_journal` found in a journal file: the readable records, each damaged
    line (byte offset, length) and an unfinished last line (offset, length) if any."""

    path: Path
    size: int
    records: int
    damaged: list[tuple[int, int]] = field(default_factory=list)
    torn_tail: tuple[int, int] | None = None
    backup: Path | None = None

    @property
    def clean(self) -> bool:
        return not self.damaged and self.torn_tail is None

    def describe(self) -> str:
        """One line per finding, for the CLI."""
        lines = [
            f"{self.path}: {self.size} bytes, {self.records} readable records, "
            + ("no damage" if self.clean else f"{len(self.damaged) + (self.torn_tail is not None)} damaged line(s)")
        ]
        lines += [f"  damaged record at byte offset {o} ({n} bytes)" for o, n in self.damaged]
        if self.torn_tail:
            lines.append(f"  unfinished last line at byte offset {self.torn_tail[0]} ({self.torn_tail[1]} bytes)")
        return "\n".join(lines)


def _scan(
    handle: IO[bytes], keep: IO[bytes] | None = None
) -> tuple[int, list[tuple[int, int]], tuple[int, int] | None]:
    """(records, damaged lines, unfinished tail) of a journal; good records copied to ``keep``."""
    records, damaged, tail, offset = 0, [], None, 0
    for line in handle:
        if not line.endswith(b"\n"):
            tail = (offset, len(line))
        elif _valid_record(line) is None:
            damaged.append((offset, len(line)))
        else:
            records += 1
            if keep is not None:
                keep.write(line)
        offset += len(line)
    return records, damaged, tail


def _journal_file(path: str | Path) -> Path:
    found = Path(str(path)[len("journal://") :] if str(path).startswith("journal://") else path)
    if not found.is_file():
        raise InputError.single("FILE", str(path), "an existing journal file (e.g. runs/stagefit.journal)")
    return found


def check_journal(path: str | Path) -> JournalReport:
    """Read a journal file as the service does and report every damaged line."""
    found = _journal_file(path)
    try:
        with open(found, "rb") as handle:
            records, damaged, tail = _scan(handle)
        return JournalReport(found, found.stat().st_size, records, damaged, tail)
    except OSError as exc:
        raise StorageError(f"cannot read the journal {found}: {exc}") from None


def repair_journal(path: str | Path) -> JournalReport:
    """Rewrite a damaged journal with its readable records only, holding the journal's write
    lock; the original is kept beside it as ``FILE.bak-<UTC time>``. Stop the service and
    workers first: a process that had read the damaged file keeps its own view of it.
    Returns the report of what was dropped (``backup`` set if anything was rewritten)."""
    report = check_journal(path)
    if report.clean:
        return report
    found = report.path
    if not report.records:  # nothing of a journal to keep: another kind of file, left as it is
        raise InputError.single(
            "FILE", str(path), "a journal file with readable records (this one has none: it is left as it is)"
        )
    lock = _FlockLock(found.with_name(found.name + ".lock"))
    lock.acquire()
    try:
        stamp = datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%SZ")
        backup = found.with_name(f"{found.name}.bak-{stamp}")
        temporary = found.with_name(f".{found.name}.repair-{os.getpid()}")
        shutil.copy2(found, backup)
        with open(found, "rb") as source, open(temporary, "wb") as target:
            records, damaged, tail = _scan(source, target)
            target.flush()
            os.fsync(target.fileno())
        os.replace(temporary, found)  # atomic: readers see the old file or the new one
        directory = os.open(found.parent, os.O_RDONLY)
        try:
            os.fsync(directory)
        finally:
            os.close(directory)
    except OSError as exc:
        raise StorageError(f"cannot repair the journal {found}: {exc}") from None
    finally:
        lock.release()
    snapshot_path(found).unlink(missing_ok=True)  # taken of the bytes before the repair
    replay_path(found).unlink(missing_ok=True)
    with _lock:
        for key in [k for k, v in _cache.items() if _claim_files.get(v) == found.with_name(found.name + ".claim")]:
            del _cache[key]  # replayed afresh on next open
    return JournalReport(found, report.size, records, damaged, tail, backup)


JOURNAL_PROBE_LINES = 8  # lines read from an existing file's head to tell a journal from another file


def _refuse_other_files(path: Path) -> None:
    """InputError when ``path`` is an existing file that is not a journal: none of its first
    JOURNAL_PROBE_LINES lines is a journal record (an empty file, or one whose only line is a
    first record still being written, starts a journal). Appending to it would mix journal
    records into the user's file."""
    try:
        with open(path, "rb") as handle:
            head = [line for _, line in zip(range(JOURNAL_PROBE_LINES), handle)]
    except FileNotFoundError:
        return
    except OSError as exc:
        raise StorageError(f"cannot read the journal {path}: {exc}") from None
    complete = [line for line in head if line.endswith(b"\n")]
    if any(_valid_record(line) is not None for line in complete):
        return
    if not head or (not complete and head[0].startswith(b'{"op_code"')):
        return
    raise InputError.single(
        "storage",
        str(path),
        "a journal file of stagefit (this file holds no journal record in its first lines: another kind of "
        "file, left as it is), or a path where none exists yet",
    )


def _journal(path: Path) -> BaseStorage:
    _refuse_other_files(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    backend = _BatchSyncedJournal(str(path), str(path.with_name(path.name + ".lock")))
    storage = _JournalStorage(backend)
    _claim_files[storage] = path.with_name(path.name + ".claim")
    _journal_backends[storage] = backend
    return storage


def _redis(url: str) -> BaseStorage:
    from optimizer.redis_journal import RedisJournal

    backend = RedisJournal(url)
    storage = _JournalStorage(backend)
    _redis_backends[storage] = backend
    return storage


def _grpc(url: str) -> BaseStorage:
    from urllib.parse import urlsplit

    parts = urlsplit(url)
    try:
        port = parts.port
    except ValueError:
        port = None
    if not parts.hostname or port is None:
        raise InputError.single("storage", url, "grpc://host:port, the address of an Optuna gRPC storage proxy")
    return optuna.storages.GrpcStorageProxy(host=parts.hostname, port=port)


@contextmanager
def batched_writes(storage: BaseStorage) -> Iterator[None]:
    """Within the block, a journal file's records are appended in one write when it ends
    (the block holds the journal's write lock; reads in this process see the records at
    once); a Redis journal's records of this process's trials are sent in one append when it
    ends (no lock: :mod:`optimizer.redis_journal`). Databases and memory write as before.
    Keep the block short: other processes wait for a journal file's lock to write."""
    backend = _journal_backends.get(storage) or _redis_backends.get(storage)
    if backend is None:
        yield
        return
    backend.open_batch()
    try:
        yield
    finally:
        backend.close_batch()


SYNC_EVERY = 1.0  # s: a journal file is forced to disk at most this often while a search runs


def sync(storage: BaseStorage, every: float = 0.0) -> None:
    """Make what a runner wrote durable: a journal file's fsync, skipped if one was done less
    than ``every`` s ago (a search passes SYNC_EVERY between batches, so a power cut loses
    at most about a second of trials, and 0 when it stops); databases commit every write
    themselves. A killed process loses nothing either way: every record is written to the
    operating system at once."""
    backend = _journal_backends.get(storage)
    if backend is not None:
        backend.sync(every)


def _seconds(name: str, default: int) -> int:
    text = os.environ.get(name, "").strip()
    if not text:
        return default
    try:
        value = int(text)
    except ValueError:
        value = 0
    if value < 1:
        raise InputError.single(name, text, "a whole number of seconds, at least 1")
    return value


def _rdb(url: str) -> BaseStorage:
    """RDB storage with heartbeats on running trials and stale trials retried."""
    interval = _seconds("STAGEFIT_HEARTBEAT_INTERVAL", HEARTBEAT_INTERVAL)
    grace = _seconds("STAGEFIT_GRACE_PERIOD", max(GRACE_PERIOD, 3 * interval))
    if grace <= interval:
        raise InputError.single(
            "STAGEFIT_GRACE_PERIOD", grace, f"more seconds than STAGEFIT_HEARTBEAT_INTERVAL ({interval})"
        )
    # Optuna 4.9 renamed the retry callback and its keyword; accept both.
    retry_cls = (
        getattr(optuna.storages, "RetryHeartbeatStaleTrialCallback", None) or optuna.storages.RetryFailedTrialCallback
    )
    keyword = (
        "heartbeat_stale_trial_callback"
        if "heartbeat_stale_trial_callback" in inspect.signature(optuna.storages.RDBStorage).parameters
        else "failed_trial_callback"
    )
    return optuna.storages.RDBStorage(
        url,
        engine_kwargs={"pool_pre_ping": True},
        heartbeat_interval=interval,
        grace_period=grace,
        **{keyword: retry_cls(max_retry=MAX_RETRY)},
    )


def recover_stale_trials(
    storage: BaseStorage, search: "str | optuna.Study", stale_after: float | None = None
) -> tuple[int, int]:
    """Fail the running trials of runners that died, so the budget is met by new trials; the
    one place this is done (run_search between batches, and the CLI, the server's job pool
    and the workers when a search waits on running trials). Returns (trials failed now,
    trials still running).

    On a journal on Redis, each runner's liveness is kept on the server (:class:`TrialHeartbeat`,
    :class:`~optimizer.redis_journal.RunnerLiveness`): the running trials whose holder's
    liveness key has expired are failed (``stale_after`` is not needed there). With
    heartbeats (a shared RDB storage): Optuna's heartbeat check and retry callback fail
    and queue again every trial whose heartbeat is older than the grace period. A runner
    killed between asking a trial and recording its first heartbeat leaves a running trial
    Optuna never finds stale; such a trial, older than the grace period (by this machine's
    clock) and still without a heartbeat, is given one here, so it goes stale and is retried
    one grace period later. Without heartbeats (a journal file, memory), a running trial
    asked more than ``stale_after`` seconds ago belongs to a process that died (nothing is
    failed when ``stale_after`` is None: between batches a slow runner cannot be told from a
    dead one). ``search``: the study, or its name."""
    study = (
        search
        if isinstance(search, optuna.Study)
        else optuna.load_study(study_name=search, storage=storage, sampler=optuna.samplers.RandomSampler())
    )
    liveness = _liveness(storage)
    if liveness is not None:  # journal on Redis: runners' liveness kept on the server
        running = _running(storage, study)
        failed = 0
        for dead in liveness.dead([trial_id(t) for t in running]):
            try:
                storage.set_trial_state_values(dead, optuna.trial.TrialState.FAIL)
                failed += 1
            except (RuntimeError, ValueError):  # finished or failed by another runner meanwhile
                pass
        _log_failed(study, failed)
        return failed, len(running) - failed
    rdb = unwrapped(storage)  # the RDB storage under Optuna's cache
    if isinstance(rdb, optuna.storages.RDBStorage) and is_heartbeat_enabled(rdb):
        before = _running(storage, study)
        _fail_unbeaten(study, rdb)
        with warnings.catch_warnings():  # Optuna marks the stale-trial check experimental
            warnings.simplefilter("ignore", optuna.exceptions.ExperimentalWarning)
            optuna.storages.fail_stale_trials(study)
        after = _running(storage, study)
        return max(len(before) - len(after), 0), len(after)
    if stale_after is None:
        return 0, 0
    now, failed, waiting = datetime.now(), 0, 0
    for trial in _running(storage, study):
        started = trial.datetime_start
        if started is not None and (now - started).total_seconds() >= stale_after:
            try:
                storage.set_trial_state_values(trial_id(trial), optuna.trial.TrialState.FAIL)
                failed += 1
            except (RuntimeError, optuna.exceptions.UpdateFinishedTrialError):  # told meanwhile by its runner
                pass
        else:
            waiting += 1
    _log_failed(study, failed)
    return failed, waiting


def _log_failed(study: optuna.Study, failed: int) -> None:
    if failed:
        log.warning(
            "search %s: %d trial(s) left running by a stopped process were failed and will be asked again",
            study.study_name,
            failed,
        )


def _running(storage: BaseStorage, study: optuna.Study) -> list[optuna.trial.FrozenTrial]:
    """The study's running trials. A journal or memory reads only the trials from the first
    one not finished at the last look on (:func:`trials_from`; a finished trial never runs
    again), so the look before every batch does not grow with the search; any other storage
    answers from its own query."""
    sid = study_id(study)
    if not isinstance(storage, (optuna.storages.journal.JournalStorage, _MemoryStorage)):
        return storage.get_all_trials(sid, deepcopy=False, states=(optuna.trial.TrialState.RUNNING,))
    with _lock:
        lows = _running_lows.setdefault(storage, {})
    low = lows.get(sid, 0)
    trials = trials_from(storage, sid, low)
    settled = next((k for k, t in enumerate(trials) if not t.state.is_finished()), len(trials))
    lows[sid] = max(lows.get(sid, 0), low + settled)  # threads may race: a lower mark is only slower
    return [t for t in trials[settled:] if t.state == optuna.trial.TrialState.RUNNING]


# per storage and study id: every trial numbered below is finished (the look for running trials starts there)
_running_lows: "weakref.WeakKeyDictionary[BaseStorage, dict[int, int]]" = weakref.WeakKeyDictionary()


def _fail_unbeaten(study: optuna.Study, rdb: optuna.storages.RDBStorage) -> None:
    """Give a first heartbeat to running trials older than the grace period that have none
    (their runner died before recording it), so Optuna's check finds them stale."""
    from sqlalchemy.orm import Session

    models = _rdb_models()
    cutoff = datetime.now() - timedelta(seconds=rdb.grace_period)
    with Session(rdb.engine) as session:
        running = (
            session.query(models.TrialModel)
            .outerjoin(models.TrialHeartbeatModel, models.TrialHeartbeatModel.trial_id == models.TrialModel.trial_id)
            .filter(
                models.TrialModel.study_id == study_id(study),
                models.TrialModel.state == optuna.trial.TrialState.RUNNING,
                models.TrialHeartbeatModel.trial_id.is_(None),
            )
        )
        # datetime_start: this machine's local time (however the Optuna version stores it)
        unbeaten = [t.trial_id for t in running if t.datetime_start is not None and t.datetime_start < cutoff]
    for number in unbeaten:
        rdb.record_heartbeat(number)


def stale_after_seconds() -> float:
    """Seconds after which a running trial without heartbeats is taken as lost with its
    process (STAGEFIT_STALE_AFTER, default STALE_AFTER)."""
    text = os.environ.get("STAGEFIT_STALE_AFTER", "").strip()
    try:
        value = float(text) if text else STALE_AFTER
    except ValueError:
        value = -1.0
    if not 0 <= value <= 86400:
        raise InputError.single("STAGEFIT_STALE_AFTER", text, "a number of seconds from 0 to 86400")
    return value


def _liveness(storage: BaseStorage):
    """The runner liveness of a journal on Redis (this process as the runner), else None."""
    backend = _redis_backends.get(storage)
    if backend is None:
        return None
    from optimizer.redis_journal import RunnerLiveness

    interval = _seconds("STAGEFIT_HEARTBEAT_INTERVAL", HEARTBEAT_INTERVAL)
    return RunnerLiveness(backend, runner_id(), _seconds("STAGEFIT_GRACE_PERIOD", max(GRACE_PERIOD, 3 * interval)))


def runner_id() -> str:
    """This process as recorded on the trials it runs: host:pid."""
    return f"{socket.gethostname()}:{os.getpid()}"


@contextmanager
def claim_batch(storage: BaseStorage, search_id: str) -> Iterator[None]:
    """Hold the search's claim: one runner at a time counts the trials and asks its batch,
    across the threads of this process and the processes sharing ``storage`` (a PostgreSQL
    advisory lock, a lock file beside a journal, or a lock on the journal's Redis server), so that parallel runners never ask more
    trials than the budget has left. A killed holder's claim is released with its connection
    or file descriptor."""
    with _lock:
        local = _claim_locks.setdefault(search_id, threading.Lock())
    with local:
        if isinstance(storage, optuna.storages.RDBStorage) and storage.engine.dialect.name == "postgresql":
            key = int.from_bytes(hashlib.blake2b(search_id.encode(), digest_size=8).digest(), "big", signed=True)
            conn = storage.engine.connect().execution_options(isolation_level="AUTOCOMMIT")
            try:
                conn.exec_driver_sql("SELECT pg_advisory_lock(%(k)s)", {"k": key})
                try:
                    yield
                finally:
                    conn.exec_driver_sql("SELECT pg_advisory_unlock(%(k)s)", {"k": key})
            except BaseException:
                conn.invalidate()  # never hand a connection that may still hold the lock back to the pool
                raise
            finally:
                conn.close()
        elif storage in _redis_backends:
            from optimizer.redis_journal import redis_claim

            with redis_claim(_redis_backends[storage], search_id):
                yield
        elif storage in _claim_files:
            with open(_claim_files[storage], "a") as handle:
                fcntl.flock(handle, fcntl.LOCK_EX)
                try:
                    yield
                finally:
                    fcntl.flock(handle, fcntl.LOCK_UN)
        else:  # in memory (one process) or another database: the thread lock is the claim
            yield


class TrialHeartbeat:
    """Heartbeats for the running trials of one batch, where the storage keeps them (RDB):
    :meth:`add` records one at once (a trial asked without a heartbeat would never be found
    stale), and a thread records all of them every heartbeat interval until :meth:`close`. On
    a journal on Redis, the runner's liveness key on the server instead (:class:`RunnerLiveness`).
    A no-op for storages without heartbeats (journal file, memory)."""

    def __init__(self, storage: BaseStorage) -> None:
        self._storage = storage
        self._enabled = is_heartbeat_enabled(storage)
        self._liveness = _liveness(storage)
        self._trial_ids: list[int] = []
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    def add(self, trial: optuna.Trial) -> optuna.Trial:
        """Record the trial's first heartbeat and which runner holds it (system attr
        ``runner``: host:pid), so a dead worker's trials can be told apart."""
        if self._liveness is not None:
            self._liveness.hold(trial_id(trial))
            if self._thread is None:
                self._thread = threading.Thread(target=self._beat, name="trial-heartbeat", daemon=True)
                self._thread.start()
        elif self._enabled:
            self._storage.record_heartbeat(trial_id(trial))
            self._storage.set_trial_system_attr(trial_id(trial), "runner", runner_id())
            self._trial_ids.append(trial_id(trial))
            if self._thread is None:
                self._thread = threading.Thread(target=self._beat, name="trial-heartbeat", daemon=True)
                self._thread.start()
        return trial

    def _beat(self) -> None:
        if self._liveness is not None:
            interval = _seconds("STAGEFIT_HEARTBEAT_INTERVAL", HEARTBEAT_INTERVAL)
            while not self._stop.wait(interval):
                try:
                    self._liveness.beat()
                except Exception:  # the server away for a moment: the next beat tries again
                    log.warning("heartbeat of runner %s not recorded", runner_id(), exc_info=True)
            return
        interval = self._storage.get_heartbeat_interval()
        while not self._stop.wait(interval):
            for number in list(self._trial_ids):
                try:
                    self._storage.record_heartbeat(number)
                except Exception:  # the database away for a moment: the next beat tries again
                    log.warning("heartbeat of trial %d not recorded", number, exc_info=True)

    def close(self) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join()

    def __enter__(self) -> "TrialHeartbeat":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def open_storage(url: str | Path | None) -> BaseStorage:
    """The Optuna storage for ``url`` (see the module docstring); cached per URL."""
    if url is None:
        return _MemoryStorage()
    text = str(url).strip()
    if not text:
        raise InputError.single(
            "storage", text, "a journal file path, journal:///path, or a database URL such as postgresql://user@host/db"
        )
    with _lock:
        if text not in _cache:
            scheme = text.split(":", 1)[0].split("+", 1)[0].lower() if "://" in text else ""
            if scheme == "journal":
                _cache[text] = _journal(Path(text[len("journal://") :]))
            elif scheme in _RDB_SCHEMES:
                _cache[text] = _rdb(text)
            elif scheme in ("redis", "rediss"):
                _cache[text] = _redis(text)
            elif scheme == "grpc":
                _cache[text] = _grpc(text)
            elif scheme:
                raise InputError.single(
                    "storage",
                    text,
                    "a journal file path, journal:///path, sqlite:///path, "
                    "postgresql://user@host/db, redis://host:port/db or grpc://host:port",
                )
            else:
                _cache[text] = _journal(Path(text))
        return _cache[text]
