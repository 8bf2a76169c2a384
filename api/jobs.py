"""Searches as background jobs inside the server.

A bounded pool of worker threads calls :func:`optimizer.search.run_search` for one search
at a time each. Nothing about a job lives in this process: the spec, status, budget and
every finished trial are in the Optuna storage, so on start-up the pool picks up every
stored search whose status is ``queued`` or ``running`` (a server killed mid-search goes
on where it stopped, keeping every finished trial). ``run_search`` checks the stored
status between batches, so a cancelled search stops after the batch in flight; the pool's
own ``should_stop`` is checked the same way when the server shuts down.

Bounds: at most ``max_queue`` searches wait or run here (:meth:`JobPool.admit` refuses the
next one with :class:`QueueFull`, which the service answers 429 with Retry-After), and
requests waiting for a search to finish (``?wait=``) park on a condition the pool notifies
when a search stops, at most ``max_waiters`` of them, so request threads stay free for
everyone else (``/healthz`` always answers).
"""

from __future__ import annotations

import logging
import queue
import threading
import time
from typing import Any, Callable

from optimizer.errors import InputError

log = logging.getLogger("api.jobs")
RESUMABLE = ("queued", "running")
RECHECK = 5.0  # s: how soon a search held up by other runners' trials is looked at again


class QueueFull(Exception):
    """The pool holds ``max_queue`` searches already; ``retry_after`` is a hint in seconds."""

    def __init__(self, limit: int, retry_after: int) -> None:
        super().__init__(f"{limit} searches are queued or running here")
        self.limit, self.retry_after = limit, retry_after


class JobPool:
    """``workers`` threads running stored searches; ``run=False`` only queues (external
    workers on the same storage run the trials)."""

    def __init__(
        self,
        storage: Any,
        *,
        workers: int = 1,
        run: bool = True,
        stale_after: float | None = None,
        max_queue: int = 64,
        max_waiters: int = 4,
    ) -> None:
        self.storage = storage
        self.workers = workers
        self.run = run
        self.stale_after = stale_after  # None: storage.STALE_AFTER
        self.max_queue = max_queue
        self._reserved = 0
        self._waiters = threading.BoundedSemaphore(max(1, max_waiters))
        self._changed = threading.Condition()
        self._queue: queue.Queue[str] = queue.Queue()
        self._pending: set[str] = set()
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._threads: list[threading.Thread] = []

    def start(self) -> None:
        """Start the worker threads and queue every resumable stored search."""
        if not self.run or self._threads:
            return
        for i in range(self.workers):
            thread = threading.Thread(target=self._work, name=f"stagefit-search-{i}", daemon=True)
            thread.start()
            self._threads.append(thread)
        self.resume()

    def resume(self) -> list[str]:
        """Queue every stored search whose status is queued or running; returns their ids."""
        from optimizer.search import list_searches

        ids = [s["id"] for s in reversed(list_searches(self.storage)) if s["status"] in RESUMABLE]
        for search_id in ids:
            self.submit(search_id)
        if ids:
            log.info("resuming %d stored search(es): %s", len(ids), ", ".join(ids))
        return ids

    def admit(self) -> None:
        """Reserve a place for one new search (QueueFull if ``max_queue`` are queued or
        running); :meth:`submit` or :meth:`release` settles it."""
        with self._lock:
            held = len(self._pending) if self.run else self._stored_queued()
            if held + self._reserved >= self.max_queue:
                raise QueueFull(self.max_queue, retry_after=max(5, 5 * (held // max(self.workers, 1))))
            self._reserved += 1

    def release(self) -> None:
        """Give back a place reserved by :meth:`admit`."""
        with self._lock:
            self._reserved = max(0, self._reserved - 1)

    def _stored_queued(self) -> int:
        from optimizer.search import list_searches

        return sum(s["status"] == "queued" for s in list_searches(self.storage))

    def wait(self, search_id: str, timeout: float, finished: Callable[[], bool]) -> bool:
        """Park until ``finished()`` or ``timeout`` s, woken when any search stops here (and
        every second, for searches run by external workers). False at once, without
        waiting, when ``max_waiters`` requests wait already."""
        if timeout <= 0 or not self._waiters.acquire(blocking=False):
            return finished()
        try:
            deadline = time.monotonic() + timeout
            while not finished():
                left = deadline - time.monotonic()
                if left <= 0:
                    return False
                with self._changed:
                    self._changed.wait(min(left, 1.0))
            return True
        finally:
            self._waiters.release()

    def notify(self) -> None:
        """Wake the waiters (a search stopped, or was cancelled)."""
        with self._changed:
            self._changed.notify_all()

    def submit(self, search_id: str, *, reserved: bool = False) -> None:
        """Queue ``search_id`` unless it is already queued or running here."""
        with self._lock:
            if reserved:
                self._reserved = max(0, self._reserved - 1)
            if not self.run or search_id in self._pending:
                return
            self._pending.add(search_id)
        self._queue.put(search_id)

    def active(self, search_id: str) -> bool:
        """True while ``search_id`` is queued or running in this pool."""
        with self._lock:
            return search_id in self._pending

    def stop(self, timeout: float = 30.0) -> None:
        """Ask every worker to stop after its batch in flight and wait for them."""
        self._stop.set()
        for thread in self._threads:
            thread.join(timeout)
        self._threads = []

    def _work(self) -> None:
        from optimizer.search import run_search

        while not self._stop.is_set():
            try:
                search_id = self._queue.get(timeout=0.2)
            except queue.Empty:
                continue
            again: float | None = None
            try:
                run_search(self.storage, search_id, should_stop=self._stop.is_set)
                again = self._held_up(search_id)
            except InputError as error:  # deleted meanwhile, or it cannot run (run_search marked it failed)
                log.warning("search %s stopped: %s", search_id, error)
            except Exception as error:  # a bug or a storage failure: logged, the server goes on
                log.exception("search %s stopped with an unexpected error", search_id)
                _mark_failed(self.storage, search_id, f"{type(error).__name__}: {error}")
            finally:
                with self._lock:
                    self._pending.discard(search_id)
                self.notify()
            if again is not None and not self._stop.is_set():
                self._later(search_id, again)

    def _held_up(self, search_id: str) -> float | None:
        """After run_search returned: None if the search is over (or we are stopping);
        otherwise it waits on trials still marked running. Those of a process that died are
        failed (storage.recover_stale_trials, ``stale_after``) so the budget is met by new
        trials (0 s: retry now); others may be another runner's batch in flight (retry in a
        few seconds)."""
        from optimizer.storage import STALE_AFTER, recover_stale_trials

        if self._stop.is_set():
            return None
        study_id = self.storage.get_study_id_from_name(search_id)
        if self.storage.get_study_user_attrs(study_id).get("status") != "running":
            return None
        freed, waiting = recover_stale_trials(
            self.storage, search_id, STALE_AFTER if self.stale_after is None else self.stale_after
        )
        if freed:
            return 0.0
        return RECHECK if waiting else None

    def _later(self, search_id: str, delay: float) -> None:
        if delay <= 0:
            self.submit(search_id)
            return
        timer = threading.Timer(delay, self.submit, args=(search_id,))
        timer.daemon = True
        timer.start()


def _mark_failed(storage: Any, search_id: str, reason: str) -> None:
    """Record status 'failed' and its reason on the study (so it is not resumed again and again)."""
    try:
        from optimizer.search import fail_search

        fail_search(storage, search_id, reason)
    except Exception:
        log.exception("could not mark search %s as failed", search_id)
