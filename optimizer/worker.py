"""A search worker: runs the trials of searches queued in a shared storage.

Any number of workers, on any number of machines, join one storage (PostgreSQL in a shared
deployment; the API server with ``STAGEFIT_QUEUE_ONLY=1`` only queues searches). Each pass
lists the stored searches and, for every one that is queued or running with budget left,
runs batches with :func:`optimizer.search.run_search` until its budget is met. The budget is
shared through the storage, and a worker killed mid-batch leaves its trials to be failed by
the heartbeat check and retried by another worker (see ``optimizer/storage.py``).

A worker stops cleanly (after the batch in hand) on SIGTERM or SIGINT.
"""

from __future__ import annotations

import logging
import os
import signal
import threading
import zlib
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


def work_once(storage, *, should_stop: Callable[[], bool], seed_offset: int = 0) -> int:
    """One pass over the stored searches; returns the trials finished meanwhile in the
    searches this pass ran batches of (0 = idle: nothing this worker could do)."""
    from optimizer.search import list_searches, run_search
    from optimizer.storage import recover_stale_trials, stale_after_seconds

    done = 0
    for status in list_searches(storage):
        if should_stop():
            break
        if not _runnable(status):
            continue
        seen: list[int] = []  # finished-trial counts at the start of each batch
        try:
            run_search(
                storage,
                status["id"],
                should_stop=should_stop,
                seed_offset=seed_offset,
                progress=lambda finished, budget: seen.append(finished),  # noqa: B023 (called within this run)
            )
        except InputError as exc:  # a search deleted meanwhile, or a stored spec that no longer fits
            log.warning("search %s skipped: %s", status["id"], exc)
            continue
        if len(seen) > 1:  # at least one batch ran here
            log.info("search %s: %d of %d trials finished", status["id"], seen[-1], status["budget"])
            done += max(seen[-1] - seen[0], 1)
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
    total = 0
    log.info("worker %d on %s (seed offset %d)", os.getpid(), _safe_url(storage_url), offset)
    while not stop.is_set():
        try:
            finished = work_once(storage, should_stop=stop.is_set, seed_offset=offset)
        except Exception:  # storage unreachable for a moment, or a bug: logged, retried after a pause
            log.exception("worker pass failed; retrying in %.1f s", poll)
            stop.wait(poll)
            continue
        total += finished
        if once and not any(_runnable(s) for s in list_searches(storage)):
            break
        if finished == 0:
            # idle, or another worker holds the last running trials (a killed worker's
            # trials are failed and retried once their heartbeat is stale)
            stop.wait(poll)
    log.info("worker %d stopping after %d trials", os.getpid(), total)
    return total


def _safe_url(url: str) -> str:
    """The storage URL without a password, for logs."""
    if "://" in url and "@" in url:
        scheme, rest = url.split("://", 1)
        credentials, host = rest.rsplit("@", 1)
        return f"{scheme}://{credentials.split(':', 1)[0]}@{host}"
    return url
