"""What every benchmark result carries: the machine, its load, the versions and the exact command.

    facts = RunFacts.start()      # at the start of the run (load average now)
    ...
    lines += facts.markdown()     # at the end: one paragraph with both load figures

``BENCH_MODE`` (quick | full) is read here too, so every benchmark agrees on it: quick
fits a CI-sized machine in minutes, full runs the large sizes.
"""

from __future__ import annotations

import os
import platform
import shlex
import sys
import time
from dataclasses import dataclass, field
from datetime import datetime, timezone
from importlib import metadata
from pathlib import Path

MODES = ("quick", "full")


def write_keeping_notes(path: Path, text: str) -> None:
    """Write a results file's generated ``text``, keeping the notes written by hand below it in
    the old file: everything from its first ``## Notes`` heading (generated text has none)."""
    old = path.read_text(encoding="utf-8") if path.exists() else ""
    notes = old[old.index("\n## Notes") :] if "\n## Notes" in old else ""
    path.write_text(text + notes, encoding="utf-8")


def bench_mode(default: str = "full") -> str:
    """BENCH_MODE from the environment (quick or full); a clear error otherwise."""
    mode = os.environ.get("BENCH_MODE", default).strip().lower() or default
    if mode not in MODES:
        sys.exit(f"BENCH_MODE={mode!r}: expected one of {', '.join(MODES)}")
    return mode


def _version(name: str) -> str:
    try:
        return metadata.version(name)
    except metadata.PackageNotFoundError:
        return "absent"


def _cpu_model() -> str:
    try:
        for line in open("/proc/cpuinfo", encoding="utf-8"):
            if line.startswith("model name"):
                return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or platform.machine()


@dataclass
class RunFacts:
    """The conditions of one benchmark run."""

    command: str
    started: str
    load_start: float
    wall_start: float = field(default_factory=time.monotonic)

    @classmethod
    def start(cls) -> "RunFacts":
        argv = [os.path.relpath(sys.argv[0])] + sys.argv[1:] if sys.argv and sys.argv[0] else sys.argv
        prefix = f"BENCH_MODE={os.environ['BENCH_MODE']} " if os.environ.get("BENCH_MODE") else ""
        return cls(
            command=prefix + ".venv/bin/python " + shlex.join(argv),
            started=datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC"),
            load_start=os.getloadavg()[0],
        )

    def markdown(self, *packages: str) -> list[str]:
        """A paragraph: command, date, machine, load at start and end, versions."""
        names = ("numpy", "optuna", *packages)
        versions = ", ".join(f"{n} {_version(n)}" for n in dict.fromkeys(names))
        minutes = (time.monotonic() - self.wall_start) / 60
        return [
            f"Command: `{self.command}` ({self.started}, {minutes:.1f} min). "
            f"Machine: {_cpu_model()}, {os.cpu_count()} cores, {platform.system()} {platform.release()}; "
            f"load average {self.load_start:.2f} at the start and {os.getloadavg()[0]:.2f} at the end "
            "(the cores are shared with other work: figures above about 1 per core are slowed by it). "
            f"Python {platform.python_version()}, {versions}.",
            "",
        ]
