"""PostgreSQL for the tests: one server per test session, a fresh database per module.

Where the server comes from, in order:
1. ``STAGEFIT_TEST_POSTGRES`` (a ``postgresql://`` URL whose role may create databases;
   ``.ci/run`` starts the machine's cluster and sets it). If it is set but unreachable the
   tests fail: somebody asked for that server.
2. A throwaway cluster: ``initdb`` into a temporary directory (as the ``postgres`` user when
   running as root, since the server refuses to run as root), ``pg_ctl start`` on a free
   loopback port, stopped and removed at the end of the session.
3. Otherwise every test using the fixture is skipped, saying why. With
   ``STAGEFIT_REQUIRE_POSTGRES=1`` (set by ``.ci/run``) it fails instead.

Fixtures: ``postgres_server`` (session; the admin URL) and ``postgres_url`` (module; the URL
of a new, empty database, dropped afterwards).
"""

from __future__ import annotations

import glob
import os
import shutil
import socket
import subprocess
import tempfile
import uuid
from pathlib import Path
from urllib.parse import urlsplit, urlunsplit

import pytest

ENV_URL = "STAGEFIT_TEST_POSTGRES"
ENV_REQUIRE = "STAGEFIT_REQUIRE_POSTGRES"


def _connect(url: str, timeout: int = 5, autocommit: bool = False):
    import psycopg

    return psycopg.connect(url, connect_timeout=timeout, autocommit=autocommit)


def reachable(url: str) -> str | None:
    """None when a connection to `url` succeeds, else the reason it did not."""
    try:
        _connect(url).close()
        return None
    except Exception as exc:  # any driver or socket error: report it, do not raise
        return f"{type(exc).__name__}: {str(exc).strip()}"


def with_database(url: str, dbname: str) -> str:
    """`url` with its database path replaced by `dbname`."""
    parts = urlsplit(url)
    return urlunsplit((parts.scheme, parts.netloc, "/" + dbname, parts.query, parts.fragment))


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


def _pg_bindir() -> str | None:
    """The newest PostgreSQL server bin directory (Debian layout first, then PATH)."""
    versions = [Path(p).parent.parent for p in glob.glob("/usr/lib/postgresql/*/bin/initdb")]
    versions = sorted((v for v in versions if v.name.isdigit()), key=lambda v: int(v.name))
    if versions:
        return str(versions[-1] / "bin")
    initdb = shutil.which("initdb")
    return str(Path(initdb).resolve().parent) if initdb else None


class ThrowawayCluster:
    """A private PostgreSQL cluster in a temporary directory, on a free loopback port."""

    def __init__(self) -> None:
        self.bindir = _pg_bindir()
        if self.bindir is None:
            raise RuntimeError("no PostgreSQL server binaries (initdb) found; install Debian's postgresql package")
        self.as_user: list[str] = []
        if os.geteuid() == 0:
            runuser = shutil.which("runuser")
            try:
                import pwd

                pwd.getpwnam("postgres")
            except KeyError:
                raise RuntimeError("running as root and there is no 'postgres' user to run the server as") from None
            if runuser is None:
                raise RuntimeError("running as root and 'runuser' is missing")
            self.as_user = [runuser, "-u", "postgres", "--"]
        self.root = Path(tempfile.mkdtemp(prefix="stagefit-pg-"))
        self.data = self.root / "data"
        self.port = free_port()
        self.log = self.root / "server.log"
        if self.as_user:
            shutil.chown(self.root, user="postgres")

    def _run(self, *args: str, timeout: float = 120) -> None:
        subprocess.run(
            [*self.as_user, *args],
            check=True,
            timeout=timeout,
            stdout=subprocess.PIPE,
            stderr=subprocess.STDOUT,
            cwd=self.root,
        )

    def start(self) -> str:
        self._run(
            f"{self.bindir}/initdb", "-D", str(self.data), "-U", "postgres", "--auth=trust", "-E", "UTF8", "--locale=C"
        )
        options = f"-c listen_addresses=127.0.0.1 -p {self.port} -k {self.root} -c fsync=off"
        self._run(
            f"{self.bindir}/pg_ctl", "-D", str(self.data), "-l", str(self.log), "-o", options, "-w", "-t", "60", "start"
        )
        return f"postgresql://postgres@127.0.0.1:{self.port}/postgres"

    def stop(self) -> None:
        try:
            if (self.data / "postmaster.pid").exists():
                self._run(f"{self.bindir}/pg_ctl", "-D", str(self.data), "-m", "fast", "-w", "stop", timeout=60)
        finally:
            shutil.rmtree(self.root, ignore_errors=True)


def stop_processes(procs, timeout: float = 30) -> None:
    """SIGTERM each process still running (workers finish their batch), then SIGKILL any
    that has not exited within ``timeout`` seconds."""
    import signal

    for p in procs:
        if p.poll() is None:
            p.send_signal(signal.SIGTERM)
    for p in procs:
        try:
            p.wait(timeout=timeout)
        except subprocess.TimeoutExpired:
            p.kill()
            p.wait(timeout=10)


def _unavailable(reason: str):
    if os.environ.get(ENV_REQUIRE) == "1":
        pytest.fail(f"PostgreSQL required ({ENV_REQUIRE}=1) but unavailable: {reason}")
    pytest.skip(f"no PostgreSQL for these tests: {reason}")


@pytest.fixture(scope="session")
def postgres_server():
    """Admin URL of a PostgreSQL server whose role may create databases."""
    url = os.environ.get(ENV_URL)
    if url:
        problem = reachable(url)
        if problem:
            pytest.fail(f"{ENV_URL}={url} is set but unreachable: {problem}")
        yield url
        return
    try:
        import psycopg  # noqa: F401
    except ImportError:
        _unavailable("the psycopg driver is not installed (pip install 'psycopg[binary]')")
    try:
        cluster = ThrowawayCluster()
    except RuntimeError as exc:
        _unavailable(f"{ENV_URL} is not set and no throwaway cluster can be made: {exc}")
    try:
        url = cluster.start()
    except (subprocess.SubprocessError, OSError) as exc:
        detail = getattr(exc, "stdout", b"") or b""
        log = cluster.log.read_text(errors="replace")[-500:] if cluster.log.exists() else ""
        cluster.stop()
        _unavailable(
            f"{ENV_URL} is not set and a throwaway cluster did not start: {exc} "
            f"{detail.decode(errors='replace')[-500:]} {log}"
        )
    try:
        yield url
    finally:
        cluster.stop()


@pytest.fixture(scope="module")
def postgres_url(postgres_server, request):
    """URL of a new, empty database for this test module (dropped afterwards)."""
    module = Path(str(request.node.fspath)).stem.replace("-", "_")[:30]
    dbname = f"stagefit_{module}_{uuid.uuid4().hex[:8]}"
    from psycopg import sql

    with _connect(postgres_server, autocommit=True) as admin:
        admin.execute(sql.SQL("CREATE DATABASE {}").format(sql.Identifier(dbname)))
    yield with_database(postgres_server, dbname)
    with _connect(postgres_server, autocommit=True) as admin:
        admin.execute(sql.SQL("DROP DATABASE IF EXISTS {} WITH (FORCE)").format(sql.Identifier(dbname)))
