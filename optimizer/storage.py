"""Where searches live: Optuna storages by URL.

- ``None``: in memory (library calls; gone with the process).
- a file path (``runs/stagefit.journal``) or ``journal:///abs/path``: Optuna's journal
  storage on a file, the embedded default (one file, safe for several processes on one
  machine through its file lock; about ten times faster per trial than SQLite here).
- ``sqlite:///...``, ``postgresql://...`` and any other SQLAlchemy URL: Optuna's RDB
  storage, the shared deployment that any number of workers join.

Storages are cached per URL within a process, so the journal is replayed once.
"""
from __future__ import annotations

import threading
from pathlib import Path

import optuna
from optuna.storages import BaseStorage

from optimizer.errors import InputError

DEFAULT_JOURNAL = Path("runs") / "stagefit.journal"
_RDB_SCHEMES = ("sqlite", "postgresql", "postgres", "mysql")
_cache: dict[str, BaseStorage] = {}
_lock = threading.Lock()


def _journal(path: Path) -> BaseStorage:
    path.parent.mkdir(parents=True, exist_ok=True)
    lock = optuna.storages.journal.JournalFileOpenLock(str(path))
    return optuna.storages.journal.JournalStorage(
        optuna.storages.journal.JournalFileBackend(str(path), lock_obj=lock))


def _rdb(url: str) -> BaseStorage:
    return optuna.storages.RDBStorage(url, engine_kwargs={"pool_pre_ping": True})


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
