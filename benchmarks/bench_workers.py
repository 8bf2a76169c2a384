"""Shared deployments: Optuna's engines for many workers, side by side on the same search.

    .venv/bin/python benchmarks/bench_workers.py                  # -> benchmarks/results/workers.md
    BENCH_MODE=quick .venv/bin/python benchmarks/bench_workers.py  # fewer trials

The search: benchmarks/specs/bs_e96_divider_buffer.yaml (E96, the Monte Carlo robustness
screen on: yield basis, 100 builds per screened design), seed 0, batch 64. Engines:

- in memory and the journal file: the one-machine references;
- PostgreSQL through Optuna's RDB storage (fsync on, as a durable deployment runs it);
- Optuna's gRPC storage proxy (``run_grpc_proxy_server``) in front of that PostgreSQL;
- Optuna's journal on a Redis server (append-only file on, ``appendfsync everysec``), once
  with Optuna's own ``JournalRedisBackend`` and once with stagefit's bulk backend
  (``optimizer/redis_journal.py``), which the ``redis://`` storage URL uses; and that one
  again with ``appendfsync always``.

Part 1, one runner in this process: wall time and the per-trial overhead over the in-memory
run (same seed, same trials). Part 2, 1 and 2 ``stagefit worker --once`` processes on the
durable shared engines: trials/s of the whole and per worker, and a scan of every worker log
for a traceback. PostgreSQL: STAGEFIT_TEST_POSTGRES (a role that may create databases) or a
throwaway cluster; Redis: a throwaway redis-server (Debian's package).
"""

from __future__ import annotations

import os
import statistics
import subprocess
import sys
import tempfile
import time
import uuid
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))
sys.path.insert(0, str(ROOT / "benchmarks"))

import optuna  # noqa: E402
from run_facts import RunFacts, bench_mode  # noqa: E402

from optimizer.search import create_search, load_search, open_storage, run_search, with_search  # noqa: E402
from optimizer.spec import load_spec  # noqa: E402
from pg_fixture import ThrowawayCluster, free_port, reachable, stop_processes, with_database  # noqa: E402
from redis_fixture import ThrowawayRedis  # noqa: E402

RESULTS = ROOT / "benchmarks" / "results" / "workers.md"
SPEC = ROOT / "benchmarks" / "specs" / "bs_e96_divider_buffer.yaml"
STAGEFIT = [sys.executable, "-m", "optimizer.cli"]
TRIALS = {"quick": 256, "full": 512}
REPEATS = {"quick": 1, "full": 3}
SLOW = ("PostgreSQL, Optuna RDB", "gRPC proxy -> PostgreSQL")  # run once: tens of times slower per trial
TARGETS = {"overhead_ms": 3.0, "two_workers": 1.7}


def _spec(trials: int):
    return with_search(load_spec(SPEC), trials=trials, seed=0)


def _new_database(admin_url: str) -> str:
    import psycopg

    name = f"bench_{uuid.uuid4().hex[:10]}"
    with psycopg.connect(admin_url, autocommit=True) as conn:
        conn.execute(f'CREATE DATABASE "{name}"')
    return with_database(admin_url, name)


def _durable_postgres(admin_url: str) -> None:
    """fsync and synchronous commit on (the throwaway cluster starts with fsync off)."""
    import psycopg

    with psycopg.connect(admin_url, autocommit=True) as conn:
        conn.execute("ALTER SYSTEM SET fsync = on")
        conn.execute("ALTER SYSTEM SET synchronous_commit = on")
        conn.execute("SELECT pg_reload_conf()")


def _grpc_proxy(pg_url: str, logdir: Path) -> tuple[subprocess.Popen, str]:
    """Optuna's gRPC storage proxy in front of ``pg_url`` in a child process -> (process, URL)."""
    port = free_port()
    code = (
        "import optuna\nfrom optimizer.storage import open_storage\n"
        f"optuna.storages.run_grpc_proxy_server(open_storage({pg_url!r}), host='127.0.0.1', port={port})"
    )
    proc = subprocess.Popen(
        [sys.executable, "-c", code], cwd=ROOT, stdout=(logdir / "grpc.log").open("w"), stderr=subprocess.STDOUT
    )
    url = f"grpc://127.0.0.1:{port}"
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        try:
            optuna.storages.GrpcStorageProxy(host="127.0.0.1", port=port).wait_server_ready(timeout=1)
            return proc, url
        except Exception:  # not listening yet
            if proc.poll() is not None:
                raise RuntimeError((logdir / "grpc.log").read_text()[-2000:]) from None
    raise RuntimeError("the gRPC proxy did not start within 60 s")


def one_runner(storage, trials: int) -> dict:
    """create + run (no finishing step) with one runner in this process; wall s and best score."""
    spec = _spec(trials)
    start = time.perf_counter()
    search_id = create_search(spec, storage)
    run_search(storage, search_id, finish=False)
    wall = time.perf_counter() - start
    trials_done = [
        t
        for t in optuna.load_study(study_name=search_id, storage=storage).get_trials(deepcopy=False)
        if t.state == optuna.trial.TrialState.COMPLETE
    ]
    return {"wall": wall, "complete": len(trials_done)}


def workers(url: str, trials: int, count: int, logdir: Path, tag: str) -> dict:
    """``count`` worker processes (--once) on a search created here; wall s to 'done', trials
    each worker finished (from the trials' runner attribute where recorded), tracebacks."""
    storage = open_storage(url)
    search_id = create_search(_spec(trials), storage)
    logs = [logdir / f"{tag}-w{count}-{i}.log" for i in range(count)]
    procs = []
    start = time.perf_counter()
    try:
        for log in logs:
            procs.append(
                subprocess.Popen(
                    [*STAGEFIT, "worker", "--storage", url, "--once", "--poll", "0.2"],
                    cwd=ROOT,
                    stdout=log.open("w"),
                    stderr=subprocess.STDOUT,
                )
            )
        for p in procs:
            p.wait(timeout=3600)
        wall = time.perf_counter() - start
    finally:
        stop_processes(procs, timeout=60)
    status = load_search(storage, search_id, top=1).status
    tracebacks = [log.name for log in logs if "Traceback" in log.read_text()]
    return {
        "wall": wall,
        "complete": status["trials_done"],
        "status": status["status"],
        "codes": [p.returncode for p in procs],
        "tracebacks": tracebacks,
    }


def main() -> int:
    mode = bench_mode()
    facts = RunFacts.start()
    trials, repeats = TRIALS[mode], REPEATS[mode]
    logdir = Path(tempfile.mkdtemp(prefix="bench-workers-"))
    cluster = redis_server = proxy = None
    admin = os.environ.get("STAGEFIT_TEST_POSTGRES")
    if admin and reachable(admin):
        sys.exit(f"STAGEFIT_TEST_POSTGRES is set but unreachable: {reachable(admin)}")
    try:
        if not admin:
            cluster = ThrowawayCluster()
            admin = cluster.start()
        _durable_postgres(admin)
        redis_server = ThrowawayRedis("everysec")
        redis_url = redis_server.start()
        pg_for_proxy = _new_database(admin)
        proxy, grpc_url = _grpc_proxy(pg_for_proxy, logdir)
        from optimizer.redis_journal import RedisJournal

        redis_client = RedisJournal(redis_url).client
        engines = {
            "in memory (reference)": lambda k: open_storage(None),
            "journal file": lambda k: open_storage(logdir / f"j{k}.journal"),
            "PostgreSQL, Optuna RDB": lambda k: open_storage(_new_database(admin)),
            "gRPC proxy -> PostgreSQL": lambda k: open_storage(grpc_url),
            "Redis, Optuna's JournalRedisBackend": lambda k: optuna.storages.journal.JournalStorage(
                optuna.storages.journal.JournalRedisBackend(redis_url, prefix=f"optuna{k}")
            ),
            "Redis, stagefit bulk backend": lambda k: open_storage(f"{redis_url[:-1]}{1 + k}"),
        }
        single: dict[str, list[dict]] = {}
        for name, make in engines.items():
            single[name] = []
            for k in range(1 if name in SLOW else repeats):
                single[name].append(one_runner(make(k), trials))
                print(f"  {name}: {single[name][-1]['wall']:.2f} s", flush=True)
        redis_client.config_set("appendfsync", "always")
        name = "Redis, stagefit bulk backend, appendfsync always"
        single[name] = []
        for k in range(repeats):  # a database of the server's 16 each, so no run replays another's records
            single[name].append(one_runner(open_storage(f"{redis_url[:-1]}{4 + k}"), trials))
            print(f"  {name}: {single[name][-1]['wall']:.2f} s", flush=True)
        redis_client.config_set("appendfsync", "everysec")

        scaling: dict[str, list[tuple[int, dict]]] = {}
        shared = {
            "Redis, stagefit bulk backend": lambda count: f"{redis_url[:-1]}{7 + count}",
            "PostgreSQL, Optuna RDB": lambda count: _new_database(admin),
        }
        for name, url_of in shared.items():
            scaling[name] = []
            for count in (1, 2):
                result = workers(url_of(count), trials, count, logdir, name.split(",")[0].lower())
                scaling[name].append((count, result))
                print(
                    f"  {name}, {count} worker(s): {result['wall']:.2f} s, {result['complete']} trials, "
                    f"exit codes {result['codes']}, tracebacks {result['tracebacks'] or 'none'}",
                    flush=True,
                )
    finally:
        if proxy is not None:
            stop_processes([proxy], timeout=30)
        if redis_server is not None:
            redis_server.stop()
        if cluster is not None:
            cluster.stop()

    med = lambda runs: statistics.median(r["wall"] for r in runs)  # noqa: E731
    rng = lambda runs: f"{min(r['wall'] for r in runs):.2f}..{max(r['wall'] for r in runs):.2f}"  # noqa: E731
    memory = med(single["in memory (reference)"])
    overhead = {name: 1000 * (med(runs) - memory) / trials for name, runs in single.items()}
    lines = [
        "# Shared deployments: Optuna's engines for many workers",
        "",
        f"`benchmarks/bench_workers.py`, BENCH_MODE={mode}: {SPEC.name} (E96 divider_ce, Monte Carlo "
        f"robustness screen on), {trials:,} trials, seed 0, batch 64; {repeats} run(s) per engine (PostgreSQL and "
        "the gRPC proxy: 1), median (min..max). PostgreSQL with fsync and synchronous commit on; Redis with the append-only file on.",
        "",
    ]
    lines += facts.markdown("redis", "grpcio", "psycopg", "sqlalchemy")
    lines += [
        "## One runner: per-trial cost of the storage",
        "",
        "| engine | durable | wall s | trials/s | overhead over in memory, ms/trial |",
        "| --- | --- | ---: | ---: | ---: |",
    ]
    durable = {
        "in memory (reference)": "no",
        "journal file": "fsync per batch",
        "PostgreSQL, Optuna RDB": "every commit",
        "gRPC proxy -> PostgreSQL": "every commit",
        "Redis, Optuna's JournalRedisBackend": "AOF, fsync every second",
        "Redis, stagefit bulk backend": "AOF, fsync every second",
        "Redis, stagefit bulk backend, appendfsync always": "AOF, fsync every write",
    }
    for name, runs in single.items():
        lines.append(
            f"| {name} | {durable[name]} | {med(runs):.2f} ({rng(runs)}) | {trials / med(runs):.0f} | "
            f"{overhead[name]:.1f} |"
        )
    lines += [
        "",
        "## Workers (`stagefit worker --once` processes on one search)",
        "",
        "| engine | workers | wall s | trials/s | trials/s per worker | speed-up | finished | tracebacks |",
        "| --- | ---: | ---: | ---: | ---: | ---: | ---: | --- |",
    ]
    for name, rows in scaling.items():
        one = rows[0][1]["wall"]
        for count, r in rows:
            lines.append(
                f"| {name} | {count} | {r['wall']:.2f} | {trials / r['wall']:.0f} | "
                f"{trials / r['wall'] / count:.0f} | {one / r['wall']:.2f}x | {r['complete']} | "
                f"{', '.join(r['tracebacks']) or 'none'} |"
            )
    chosen = "Redis, stagefit bulk backend"
    speedup = scaling[chosen][0][1]["wall"] / scaling[chosen][1][1]["wall"]
    met = lambda ok: "met" if ok else "**missed**"  # noqa: E731
    lines += [
        "",
        "## Targets (the chosen engine: Redis journal, stagefit bulk backend)",
        "",
        "| target | measured | met |",
        "| --- | --- | --- |",
        f"| per-trial shared-storage overhead < {TARGETS['overhead_ms']:g} ms | {overhead[chosen]:.1f} ms | "
        f"{met(overhead[chosen] < TARGETS['overhead_ms'])} |",
        f"| 2 workers >= {TARGETS['two_workers']}x one worker's trials/s | {speedup:.2f}x | "
        f"{met(speedup >= TARGETS['two_workers'])} |",
        f"| no traceback in any worker log | "
        f"{sum(len(r['tracebacks']) for rows in scaling.values() for _, r in rows)} logs with one | "
        f"{met(not any(r['tracebacks'] for rows in scaling.values() for _, r in rows))} |",
    ]
    text = "\n".join(lines) + "\n"
    print(text)
    RESULTS.write_text(text)  # the header names the mode
    print(f"wrote {RESULTS}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
