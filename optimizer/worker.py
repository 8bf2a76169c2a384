"""A search worker: runs the trials of searches queued in a shared storage.

Any number of workers, on any number of machines, join one storage (a journal on Redis in a
shared deployment, or PostgreSQL; the API server with ``STAGEFIT_QUEUE_ONLY=1`` only queues
searches). Each pass lists the stored searches and, for every one that is queued or running
with budget left, runs batches with :func:`optimizer.search.run_search` until its budget is
met; the worker that finds the last trials told ranks the search. The budget is shared through the storage, and a worker killed mid-batch
leaves its trials to be failed by the heartbeat check and retried by another worker (see
``optimizer/storage.py``). Each worker logs its trials, their rate and its CPU time per trial.

A worker stops cleanly (after the batch in hand) on SIGTERM or SIGINT.
"""

from __future__ import annotations

import logging
import os
import signal
import threading
import time
import zlib
from dataclasses import dataclass
from typing import Callable

from optimizer.errors import InputError

log = logging.getLogger("stagefit.worker")
RUNNABLE = ("queued", "running")


def worker_seed_offset() -> int:
    """A sampler seed offset of this worker's own, so that workers sharing a search do not
    all propose the same designs (the search's seed stays the base)."""
    return 1 + zlib.crc32(f"{os.uname().nodename}:{os.getpid()}".encode()) % 1_000_000


def _runnable(status: dict) -> bool:
    """Queued or running: budget left, or trials of another worker still to finish."""
    return status["status"] in RUNNABLE


@dataclass
class WorkTally:
    """What one worker did: trials it told, and the wall and CPU seconds of its trial batches
    (the finishing step, ranking and assessing a search's shortlist, counted apart)."""

    trials: int = 0
    batch_wall: float = 0.0
    batch_cpu: float = 0.0
    finish_wall: float = 0.0

    def summary(self) -> str:
        """One line for the log: trials, their rate and CPU time per trial."""
        per = self.trials or 1
        return (
            f"{self.trials} trials in {self.batch_wall:.1f} s of batches ({self.trials / (self.batch_wall or 1):.1f} "
            f"trials/s, {1000 * self.batch_cpu / per:.2f} ms CPU per trial), finishing {self.finish_wall:.1f} s"
        )


def _ranked_elsewhere(attrs: dict) -> bool:
    """Whether another worker has taken the search to rank it (its mark, user attr
    ``finishing``, made for the present budget and younger than STAGEFIT_STALE_AFTER)."""
    from optimizer.storage import stale_after_seconds

    mark = attrs.get("finishing")
    return (
        isinstance(mark, dict)
        and mark.get("budget") == attrs.get("budget")
        and time.time() - float(mark.get("at", 0)) < stale_after_seconds()
    )


def _take_finishing(storage, search_id: str) -> bool:
    """Whether this worker ranks the search now: its last trials are told and no other worker
    has taken it (the mark is set under the search's claim). Ranking takes seconds, and
    workers that run out of trials together would all rank it otherwise. A mark older than
    STAGEFIT_STALE_AFTER (its worker died), or made for another budget (the search was
    extended since), is taken over."""
    from optimizer.search.study import load_study, study_attrs, trial_counts
    from optimizer.storage import claim_batch, runner_id

    with claim_batch(storage, search_id):
        study, _ = load_study(storage, search_id)
        attrs = study_attrs(study)
        budget = int(attrs["budget"])
        finished, running = trial_counts(study)
        if attrs.get("status") != "running" or finished < budget or running or _ranked_elsewhere(attrs):
            return False
        study.set_user_attr("finishing", {"runner": runner_id(), "at": time.time(), "budget": budget})
        return True


def _open_to_this_worker(storage, status: dict) -> bool:
    """Queued or running, and not being ranked by another worker."""
    from optimizer.search.study import stored_attrs

    if not _runnable(status):
        return False
    try:
        return not _ranked_elsewhere(stored_attrs(storage, status["id"])[1])
    except InputError:  # deleted meanwhile
        return False


def work_once(storage, *, should_stop: Callable[[], bool], seed_offset: int = 0, tally: WorkTally | None = None) -> int:
    """One pass over the stored searches; returns the trials this worker told or recovered in
    them (0 = idle: nothing this worker could do). ``tally`` adds up what it did."""
    from optimizer.search import finish_search, list_searches, run_search
    from optimizer.storage import recover_stale_trials, stale_after_seconds

    tally = tally or WorkTally()
    done = 0
    for status in list_searches(storage):
        if should_stop():
            break
        if not _open_to_this_worker(storage, status):  # done, or another worker is ranking it
            continue
        wall, cpu = time.perf_counter(), time.process_time()
        try:
            told = run_search(storage, status["id"], should_stop=should_stop, seed_offset=seed_offset, finish=False)
            if told:  # a pass that found no trial to run (others hold the last ones) is idle time
                tally.trials += told
                tally.batch_wall += time.perf_counter() - wall
                tally.batch_cpu += time.process_time() - cpu
            wall = time.perf_counter()
            if not should_stop() and _take_finishing(storage, status["id"]):
                finish_search(storage, status["id"])
            tally.finish_wall += time.perf_counter() - wall
        except InputError as exc:  # a search deleted meanwhile, or a stored spec that no longer fits
            log.warning("search %s skipped: %s", status["id"], exc)
            continue
        if told:
            log.info("search %s: %d trials told here (worker total: %s)", status["id"], told, tally.summary())
            done += told
        elif not should_stop():  # held up by running trials: those of a runner that died are asked again
            done += recover_stale_trials(storage, status["id"], stale_after_seconds())[0]
    return done


def run_worker(storage_url: str, *, poll: float = 2.0, once: bool = False, stop: threading.Event | None = None) -> int:
    """Work until stopped (SIGTERM/SIGINT, or ``stop`` set); with ``once``, until no stored
    search has budget left. Idle passes sleep ``poll`` seconds. Returns the trials finished."""
    from optimizer.search import list_searches
    from optimizer.storage import open_storage

    if not poll > 0:
        raise InputError.single("--poll", poll, "a number of seconds above 0")
    stop = stop or threading.Event()
    if threading.current_thread() is threading.main_thread():
        for sig in (signal.SIGTERM, signal.SIGINT):
            signal.signal(sig, lambda *_: stop.set())
    storage = None
    while storage is None:
        try:
            storage = open_storage(storage_url)
        except InputError:
            raise
        except Exception:  # database not up yet, or another process creating its tables right now
            log.warning("storage %s not ready; retrying in %.1f s", _safe_url(storage_url), poll, exc_info=True)
            if stop.wait(poll):
                return 0
    offset = worker_seed_offset()
    tally, total = WorkTally(), 0
    log.info("worker %d on %s (seed offset %d)", os.getpid(), _safe_url(storage_url), offset)
    while not stop.is_set():
        try:
            finished = work_once(storage, should_stop=stop.is_set, seed_offset=offset, tally=tally)
        except Exception:  # storage unreachable for a moment, or a bug: logged, retried after a pause
            log.exception("worker pass failed; retrying in %.1f s", poll)
            stop.wait(poll)
            continue
        total += finished
        if once and not any(_open_to_this_worker(storage, s) for s in list_searches(storage)):
            break
        if finished == 0:
            # idle, or another worker holds the last running trials (a killed worker's
            # trials are failed and retried once their heartbeat is stale)
            stop.wait(poll)
    log.info("worker %d stopping: %s", os.getpid(), tally.summary())
    return total


def _safe_url(url: str) -> str:
    """The storage URL without a password, for logs."""
    if "://" in url and "@" in url:
        scheme, rest = url.split("://", 1)
        credentials, host = rest.rsplit("@", 1)
        return f"{scheme}://{credentials.split(':', 1)[0]}@{host}"
    return url
