"""A throwaway Redis server (Debian's redis-server) for the shared-storage tests and benchmarks.

The server runs on a free loopback port with its data in a temporary folder, the
append-only file on (``appendfsync`` as given: everysec by default), and is stopped by its
own process id. Tests skip (saying why) where redis-server is absent, unless CI is set.
"""

from __future__ import annotations

import shutil
import socket
import subprocess
import tempfile
import time
from pathlib import Path


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class ThrowawayRedis:
    """redis-server on 127.0.0.1:<free port>, data in a temporary folder; ``start()`` -> URL."""

    def __init__(self, appendfsync: str = "everysec") -> None:
        self.binary = shutil.which("redis-server")
        self.port = free_port()
        self.root = Path(tempfile.mkdtemp(prefix="stagefit-redis-"))
        self.appendfsync = appendfsync
        self.proc: subprocess.Popen | None = None

    def start(self) -> str:
        if self.binary is None:
            raise RuntimeError("redis-server not found (Debian: apt-get install redis-server)")
        self.proc = subprocess.Popen(
            [
                self.binary,
                "--port",
                str(self.port),
                "--bind",
                "127.0.0.1",
                "--dir",
                str(self.root),
                "--appendonly",
                "yes",
                "--appendfsync",
                self.appendfsync,
                "--save",
                "",
                "--daemonize",
                "no",
                "--logfile",
                str(self.root / "redis.log"),
            ],
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
        )
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline:
            try:
                with socket.create_connection(("127.0.0.1", self.port), timeout=1) as conn:
                    conn.sendall(b"PING\r\n")
                    if conn.recv(16).startswith(b"+PONG"):
                        return self.url
            except OSError:
                pass
            if self.proc.poll() is not None:
                raise RuntimeError(f"redis-server exited: {(self.root / 'redis.log').read_text()[-2000:]}")
            time.sleep(0.1)
        self.stop()
        raise RuntimeError("redis-server did not answer within 30 s")

    @property
    def url(self) -> str:
        return f"redis://127.0.0.1:{self.port}/0"

    def stop(self) -> None:
        try:
            if self.proc is not None and self.proc.poll() is None:
                self.proc.terminate()
                try:
                    self.proc.wait(timeout=30)
                except subprocess.TimeoutExpired:
                    self.proc.kill()
                    self.proc.wait(timeout=10)
        finally:
            shutil.rmtree(self.root, ignore_errors=True)
