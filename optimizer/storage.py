"""Where searches live: Optuna storages by URL.

- ``None``: in memory (library calls; gone with the process).
- a file path (``runs/stagefit.journal``) or ``journal:///abs/path``: Optuna's journal
  storage on a file, the embedded default (one file, safe for several processes on one
  machine through its file lock; about ten times faster per trial than SQLite here).
- ``sqlite:///...``, ``postgresql://...`` and any other SQLAlchemy URL: Optuna's RDB
  storage, the shared deployment that any number of workers join.

Storages are cached per URL within a process, so the journal is replayed once.

Crash safety in a shared (RDB) storage: every running trial carries a heartbeat
(:class:`TrialHeartbeat`, recorded as soon as the trial is asked and then every
``STAGEFIT_HEARTBEAT_INTERVAL`` seconds, default 10); a running trial whose heartbeat is
older than ``STAGEFIT_GRACE_PERIOD`` seconds (default 30) belonged to a worker that died,
and the next batch of any worker fails it and queues it again (Optuna's heartbeat check and
retry callback, at most 3 retries; :func:`fail_stale_trials`). :func:`claim_batch` makes "count the trials, ask the
next batch" one step across every process sharing a search, so a budget is met exactly.
"""
from __future__ import annotations

import fcntl
import hashlib
import inspect
import json
import logging
import os
import socket
import threading
import warnings
import weakref
from contextlib import contextmanager
from datetime import datetime, timedelta
from pathlib import Path
from typing import IO, Iterator

import optuna
from optuna.storages import BaseStorage
from optuna.storages._heartbeat import is_heartbeat_enabled
from optuna.storages.journal._file import BaseJournalFileLock, get_lock_file

from optimizer.errors import InputError

DEFAULT_JOURNAL = Path("runs") / "stagefit.journal"
_RDB_SCHEMES = ("sqlite", "postgresql", "postgres", "mysql")
_cache: dict[str, BaseStorage] = {}
_lock = threading.Lock()
_claim_files: "weakref.WeakKeyDictionary[BaseStorage, Path]" = weakref.WeakKeyDictionary()
_journal_backends: "weakref.WeakKeyDictionary[BaseStorage, _BatchSyncedJournal]" = weakref.WeakKeyDictionary()
_claim_locks: dict[str, threading.Lock] = {}
HEARTBEAT_INTERVAL = 10  # s between heartbeats of a running trial (STAGEFIT_HEARTBEAT_INTERVAL)
GRACE_PERIOD = 30  # s without a heartbeat before a running trial is failed (STAGEFIT_GRACE_PERIOD)
MAX_RETRY = 3  # times a failed (stale) trial is queued again
log = logging.getLogger("stagefit.storage")
# Heartbeats and their retry callback are marked experimental in Optuna; we rely on them
# knowingly (tests/test_workers.py checks them), so their warnings are noise here.
warnings.filterwarnings("ignore", category=optuna.exceptions.ExperimentalWarning,
                        message=r".*(heartbeat|Retry\w*Callback|fail_stale_trials)")
# Study.ask warns that heartbeats belong to Study.optimize: our batches record them (TrialHeartbeat).
warnings.filterwarnings("ignore", message="Heartbeat of storage is supposed to be used with Study.optimize")


class _FlockLock(BaseJournalFileLock):
    """The journal's write lock: ``fcntl.flock`` on a file beside it. Cheaper than Optuna's
    lock files (no file created and removed per record), and the kernel releases it when its
    holder dies, so a killed process never leaves the journal locked."""

    def __init__(self, path: Path) -> None:
        self._path = path
        self._held = threading.local()  # each thread its own descriptor, so threads exclude each other too

    def acquire(self) -> bool:
        handle: IO[bytes] = open(self._path, "ab")
        fcntl.flock(handle, fcntl.LOCK_EX)
        self._held.handle = handle
        return True

    def release(self) -> None:
        handle = getattr(self._held, "handle", None)
        if handle is not None:
            self._held.handle = None
            fcntl.flock(handle, fcntl.LOCK_UN)
            handle.close()


class _BatchSyncedJournal(optuna.storages.journal.JournalFileBackend):
    """Optuna's journal file, each record flushed to the operating system at once (so a killed
    process loses nothing it wrote) but forced to disk once per batch (:func:`sync`) rather
    than once per record: a search writes about eight records per trial, and an fsync each
    took most of a journal search's time here. A power cut can lose the batch in hand."""

    def append_logs(self, logs: list[dict]) -> None:
        text = "".join(json.dumps(log, separators=(",", ":")) + "\n" for log in logs)
        with get_lock_file(self._lock):
            with open(self._file_path, "ab") as handle:
                handle.write(text.encode("utf-8"))

    def sync(self) -> None:
        """Force the journal's records to disk."""
        with open(self._file_path, "ab") as handle:
            os.fsync(handle.fileno())


def _journal(path: Path) -> BaseStorage:
    path.parent.mkdir(parents=True, exist_ok=True)
    backend = _BatchSyncedJournal(str(path), lock_obj=_FlockLock(path.with_name(path.name + ".lock")))
    storage = optuna.storages.journal.JournalStorage(backend)
    _claim_files[storage] = path.with_name(path.name + ".claim")
    _journal_backends[storage] = backend
    return storage


def sync(storage: BaseStorage) -> None:
    """Make what a runner wrote durable (a journal file's once-per-batch fsync; databases
    commit every write themselves)."""
    backend = _journal_backends.get(storage)
    if backend is not None:
        backend.sync()


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
        raise InputError.single("STAGEFIT_GRACE_PERIOD", grace,
                                f"more seconds than STAGEFIT_HEARTBEAT_INTERVAL ({interval})")
    # Optuna 4.9 renamed the retry callback and its keyword; accept both.
    retry_cls = getattr(optuna.storages, "RetryHeartbeatStaleTrialCallback", None) \
        or optuna.storages.RetryFailedTrialCallback
    keyword = ("heartbeat_stale_trial_callback"
               if "heartbeat_stale_trial_callback" in inspect.signature(optuna.storages.RDBStorage).parameters
               else "failed_trial_callback")
    return optuna.storages.RDBStorage(url, engine_kwargs={"pool_pre_ping": True},
                                      heartbeat_interval=interval, grace_period=grace,
                                      **{keyword: retry_cls(max_retry=MAX_RETRY)})


def fail_stale_trials(study: optuna.Study, storage: BaseStorage) -> None:
    """Fail the running trials of runners that died, and queue them again (Optuna's heartbeat
    check and retry callback). A runner killed between asking a trial and recording its first
    heartbeat leaves a running trial Optuna never finds stale; such a trial, older than the
    grace period (by this machine's clock) and still without a heartbeat, is given one here,
    so it goes stale and is retried one grace period later. A no-op without heartbeats."""
    rdb = getattr(storage, "_backend", storage)  # the RDB storage under Optuna's cache
    if not (isinstance(rdb, optuna.storages.RDBStorage) and is_heartbeat_enabled(rdb)):
        return
    from optuna.storages._rdb import models
    from sqlalchemy.orm import Session

    cutoff = datetime.now() - timedelta(seconds=rdb.grace_period)
    with Session(rdb.engine) as session:
        running = (session.query(models.TrialModel)
                   .outerjoin(models.TrialHeartbeatModel,
                              models.TrialHeartbeatModel.trial_id == models.TrialModel.trial_id)
                   .filter(models.TrialModel.study_id == study._study_id,
                           models.TrialModel.state == optuna.trial.TrialState.RUNNING,
                           models.TrialHeartbeatModel.trial_id.is_(None)))
        # datetime_start: this machine's local time (however the Optuna version stores it)
        unbeaten = [t.trial_id for t in running if t.datetime_start is not None and t.datetime_start < cutoff]
    for trial_id in unbeaten:
        rdb.record_heartbeat(trial_id)
    optuna.storages.fail_stale_trials(study)


def runner_id() -> str:
    """This process as recorded on the trials it runs: host:pid."""
    return f"{socket.gethostname()}:{os.getpid()}"


@contextmanager
def claim_batch(storage: BaseStorage, search_id: str) -> Iterator[None]:
    """Hold the search's claim: one runner at a time counts the trials and asks its batch,
    across the threads of this process and the processes sharing ``storage`` (a PostgreSQL
    advisory lock, or a lock file beside a journal), so that parallel runners never ask more
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
    stale), and a thread records all of them every heartbeat interval until :meth:`close`.
    A no-op for storages without heartbeats (journal, memory)."""

    def __init__(self, storage: BaseStorage) -> None:
        self._storage = storage
        self._enabled = is_heartbeat_enabled(storage)
        self._trial_ids: list[int] = []
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    def add(self, trial: optuna.Trial) -> optuna.Trial:
        """Record the trial's first heartbeat and which runner holds it (system attr
        ``runner``: host:pid), so a dead worker's trials can be told apart."""
        if self._enabled:
            self._storage.record_heartbeat(trial._trial_id)
            self._storage.set_trial_system_attr(trial._trial_id, "runner", runner_id())
            self._trial_ids.append(trial._trial_id)
            if self._thread is None:
                self._thread = threading.Thread(target=self._beat, name="trial-heartbeat", daemon=True)
                self._thread.start()
        return trial

    def _beat(self) -> None:
        interval = self._storage.get_heartbeat_interval()
        while not self._stop.wait(interval):
            for trial_id in list(self._trial_ids):
                try:
                    self._storage.record_heartbeat(trial_id)
                except Exception:  # the database away for a moment: the next beat tries again
                    log.warning("heartbeat of trial %d not recorded", trial_id, exc_info=True)

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
        return optuna.storages.InMemoryStorage()
    text = str(url).strip()
    if not text:
        raise InputError.single("storage", text, "a journal file path, journal:///path, or a database URL "
                                "such as postgresql://user@host/db")
    with _lock:
        if text not in _cache:
            scheme = text.split(":", 1)[0].split("+", 1)[0].lower() if "://" in text else ""
            if scheme == "journal":
                _cache[text] = _journal(Path(text[len("journal://"):]))
            elif scheme in _RDB_SCHEMES:
                _cache[text] = _rdb(text)
            elif scheme:
                raise InputError.single("storage", text, "a journal file path, journal:///path, sqlite:///path "
                                        "or postgresql://user@host/db")
            else:
                _cache[text] = _journal(Path(text))
        return _cache[text]
