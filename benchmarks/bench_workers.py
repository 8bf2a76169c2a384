"""Shared deployments: Optuna's engines for many workers, side by side on the same search.

    .venv/bin/python benchmarks/bench_workers.py                   # full -> benchmarks/results/workers.md
    BENCH_MODE=quick .venv/bin/python benchmarks/bench_workers.py   # -> benchmarks/results/workers-quick.md

The search: benchmarks/specs/bs_e96_divider_buffer.yaml (E96, the Monte Carlo robustness
screen on: yield basis, 100 builds per screened design), seed 0, batch 64: a light search, about
half a millisecond of CPU per trial, the storage's share at its largest. The workers run it and a
heavy one, benchmarks/specs/bs_e96_split_send.yaml (E96, screen on, three devices and every
non-inverting stage, the feedback pair among them: some 7 ms per trial), the search a user would
start workers for; the two-worker target is judged on that one. Engines:

- in memory and the journal file: the one-machine references;
- Optuna's journal on a Redis server (append-only file on, ``appendfsync everysec``) with
  stagefit's bulk backend (``optimizer/redis_journal.py``), which the ``redis://`` storage URL
  uses; quick mode stops here (under 5 minutes);
- full mode adds PostgreSQL through Optuna's RDB storage (fsync on, as a durable deployment runs
  it), Optuna's gRPC storage proxy (``run_grpc_proxy_server``) in front of that PostgreSQL,
  Optuna's own ``JournalRedisBackend``, and the bulk backend with ``appendfsync always``.

Part 1, one runner in this process, each engine in turn, repeated: wall and CPU time of the
run (without the finishing step), the per-trial overhead over the in-memory run of the same
round (same seed, same trials), the Redis server's own CPU time and the round trips to it.
Part 2, 1 and 2 ``stagefit worker --once`` processes on Redis (full mode: PostgreSQL too), on
the light and the heavy search: the trial phase (first trial asked to last told, from the stored
trials) and its trials/s, each worker's trials and CPU time per trial (its log), the cores they
kept busy (so the speed-up at equal work: the workers' seeds differ, and a heavy search's trials
differ in cost by stage), the ranking step apart, and a scan of every worker log for a traceback. PostgreSQL: STAGEFIT_TEST_POSTGRES (a role that may create
databases) or a throwaway cluster; Redis: a throwaway redis-server (Debian's package). Run it
niced on a shared machine; the load average is recorded beside every figure.

Where a second worker's CPU goes: ``BENCH_PROFILE=DIR`` runs every worker under cProfile with
the CPU clock (``time.process_time``: waiting for the claim or for a core costs nothing) and
writes ``DIR/<engine>-<light or heavy>-w<workers>-<i>.prof``; compare one worker of the
2-worker run with the 1-worker run, per trial told (each log's "stopping" line gives its trials), e.g.
``python -c "import pstats; pstats.Stats('DIR/redis-light-w2-0.prof').sort_stats('cumulative').print_stats(40)"``.
The profiler itself costs several times a trial's CPU: compare shares and calls per trial, not ms.
"""

from __future__ import annotations

import os
import re
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
from run_facts import RunFacts, bench_mode, write_keeping_notes  # noqa: E402

from optimizer.search import create_search, load_search, open_storage, run_search, with_search  # noqa: E402
from optimizer.spec import load_spec  # noqa: E402
from pg_fixture import ThrowawayCluster, free_port, reachable, stop_processes, with_database  # noqa: E402
from redis_fixture import ThrowawayRedis  # noqa: E402

RESULTS = {
    "quick": ROOT / "benchmarks" / "results" / "workers-quick.md",
    "full": ROOT / "benchmarks" / "results" / "workers.md",
}
SPEC = ROOT / "benchmarks" / "specs" / "bs_e96_divider_buffer.yaml"
# the workers' searches: the light one above, and the heavy one workers are for (the target's)
WORKLOADS = {"light": SPEC, "heavy": ROOT / "benchmarks" / "specs" / "bs_e96_split_send.yaml"}
STAGEFIT = [sys.executable, "-m", "optimizer.cli"]
# the CLI under cProfile with the CPU clock, the profile written to the first argument (BENCH_PROFILE)
PROFILED = (
    "import cProfile, runpy, sys, time\n"
    "out = sys.argv.pop(1)\n"
    "profile = cProfile.Profile(time.process_time)\n"
    "profile.enable()\n"
    "try:\n"
    "    runpy.run_module('optimizer.cli', run_name='__main__')\n"
    "finally:\n"
    "    profile.disable()\n"
    "    profile.dump_stats(out)\n"
)
TRIALS = {"quick": 512, "full": 512}  # one runner
# the workers' searches: long enough that ranking them and the workers' start are a small part
WORKER_TRIALS = {"quick": {"light": 8192, "heavy": 4096}, "full": {"light": 16384, "heavy": 8192}}
REPEATS = {"quick": 3, "full": 3}
SLOW = ("PostgreSQL, Optuna RDB", "gRPC proxy -> PostgreSQL")  # run once: tens of times slower per trial
TARGETS = {"overhead_ms": 3.0, "two_workers": 1.7}


def _spec(trials: int, path: Path = SPEC):
    return with_search(load_spec(path), trials=trials, seed=0)


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


def _cpu_of(pid: int) -> float:
    """CPU seconds (user + system) a process has used so far (/proc/<pid>/stat)."""
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def one_runner(storage, trials: int, server_pid: int | None) -> dict:
    """create + run (no finishing step) with one runner in this process: wall and CPU s, the
    Redis server's CPU s and round trips (where the storage is on Redis)."""
    from optimizer.storage import _redis_backends

    spec = _spec(trials)
    search_id = create_search(spec, storage)
    backend = _redis_backends.get(storage)
    trips = getattr(backend, "round_trips", 0)
    server = _cpu_of(server_pid) if server_pid else 0.0
    wall, cpu = time.perf_counter(), time.process_time()
    run_search(storage, search_id, finish=False)
    wall, cpu = time.perf_counter() - wall, time.process_time() - cpu
    complete = sum(
        t.state == optuna.trial.TrialState.COMPLETE
        for t in optuna.load_study(study_name=search_id, storage=storage).get_trials(deepcopy=False)
    )
    return {
        "wall": wall,
        "cpu": cpu,
        "server": (_cpu_of(server_pid) - server) if server_pid else 0.0,
        "trips": getattr(backend, "round_trips", 0) - trips,
        "complete": complete,
        "load": os.getloadavg()[0],
    }


STOPPING = re.compile(
    r"stopping: (\d+) trials in [\d.]+ s of batches \([\d.]+ trials/s, ([\d.]+) ms CPU per trial\), finishing ([\d.]+) s"
)


def workers(url: str, trials: int, count: int, logdir: Path, tag: str, workload: str = "light") -> dict:
    """``count`` worker processes (--once, niced as this process is) on a search of ``workload``
    created here: wall s to 'done', the trial phase (first trial asked to last told), each
    worker's trials, CPU ms per trial and ranking s (from its log), tracebacks, load average."""
    storage = open_storage(url)
    search_id = create_search(_spec(trials, WORKLOADS[workload]), storage)
    logs = [logdir / f"{tag}-{workload}-w{count}-{i}.log" for i in range(count)]
    procs = []
    load = os.getloadavg()[0]
    start = time.perf_counter()
    profiles = os.environ.get("BENCH_PROFILE")
    try:
        for log in logs:
            command = (
                [sys.executable, "-c", PROFILED, str(Path(profiles) / f"{log.stem}.prof")] if profiles else STAGEFIT
            )
            procs.append(
                subprocess.Popen(
                    [*command, "worker", "--storage", url, "--once", "--poll", "0.2"],
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
    told = optuna.load_study(study_name=search_id, storage=storage).get_trials(
        deepcopy=False, states=(optuna.trial.TrialState.COMPLETE,)
    )
    phase = (max(t.datetime_complete for t in told) - min(t.datetime_start for t in told)).total_seconds()
    each = []
    for log in logs:
        found = STOPPING.search(log.read_text())
        each.append(
            {"trials": int(found[1]), "cpu_ms": float(found[2]), "finishing": float(found[3])}
            if found
            else {"trials": 0, "cpu_ms": float("nan"), "finishing": 0.0}
        )
    return {
        "wall": wall,
        "phase": phase,
        "complete": status["trials_done"],
        "status": status["status"],
        "codes": [p.returncode for p in procs],
        "tracebacks": [log.name for log in logs if "Traceback" in log.read_text()],
        "each": each,
        "load": (load, os.getloadavg()[0]),
    }


def main() -> int:
    mode = bench_mode()
    facts = RunFacts.start()
    trials, repeats, worker_trials = TRIALS[mode], REPEATS[mode], WORKER_TRIALS[mode]
    logdir = Path(tempfile.mkdtemp(prefix="bench-workers-"))
    if os.environ.get("BENCH_PROFILE"):
        Path(os.environ["BENCH_PROFILE"]).mkdir(parents=True, exist_ok=True)
    cluster = redis_server = proxy = None
    admin = os.environ.get("STAGEFIT_TEST_POSTGRES")
    try:
        redis_server = ThrowawayRedis("everysec")
        redis_url = redis_server.start()
        server_pid = redis_server.proc.pid if redis_server.proc else None
        db = iter(range(16))  # a database of the server's 16 for each run, so no run replays another's records

        def redis_db() -> str:
            return f"{redis_url[:-1]}{next(db)}"

        engines = {
            "in memory (reference)": lambda k: open_storage(None),
            "journal file": lambda k: open_storage(logdir / f"j{k}.journal"),
            "Redis, stagefit bulk backend": lambda k: open_storage(redis_db()),
        }
        if mode == "full":
            if admin and reachable(admin):
                sys.exit(f"STAGEFIT_TEST_POSTGRES is set but unreachable: {reachable(admin)}")
            if not admin:
                cluster = ThrowawayCluster()
                admin = cluster.start()
            _durable_postgres(admin)
            proxy, grpc_url = _grpc_proxy(_new_database(admin), logdir)
            engines.update(
                {
                    "PostgreSQL, Optuna RDB": lambda k: open_storage(_new_database(admin)),
                    "gRPC proxy -> PostgreSQL": lambda k: open_storage(grpc_url),
                    "Redis, Optuna's JournalRedisBackend": lambda k: optuna.storages.journal.JournalStorage(
                        optuna.storages.journal.JournalRedisBackend(redis_url, prefix=f"optuna{k}")
                    ),
                }
            )
        single: dict[str, list[dict]] = {name: [] for name in engines}
        for k in range(repeats):  # rounds: every engine once per round, so each is compared within its round
            for name, make in engines.items():
                if name in SLOW and k:
                    continue  # tens of times slower per trial: once
                single[name].append(one_runner(make(k), trials, server_pid if "Redis" in name else None))
                r = single[name][-1]
                print(f"  {name}: {r['wall']:.2f} s wall, {r['cpu']:.2f} s CPU, load {r['load']:.1f}", flush=True)
        if mode == "full":
            from optimizer.redis_journal import RedisJournal

            RedisJournal(redis_url).client.config_set("appendfsync", "always")
            name = "Redis, stagefit bulk backend, appendfsync always"
            single[name] = [one_runner(open_storage(redis_db()), trials, server_pid) for _ in range(repeats)]
            RedisJournal(redis_url).client.config_set("appendfsync", "everysec")

        # (engine, workload) -> [(workers, result)]
        scaling: dict[tuple[str, str], list[tuple[int, dict]]] = {}
        shared = {"Redis, stagefit bulk backend": lambda: redis_db()}
        if mode == "full":
            shared["PostgreSQL, Optuna RDB"] = lambda: _new_database(admin)
        for name, url_of in shared.items():
            for workload, n in worker_trials.items():
                for count in (1, 2):
                    result = workers(url_of(), n, count, logdir, name.split(",")[0].lower(), workload)
                    scaling.setdefault((name, workload), []).append((count, result))
                    print(
                        f"  {name}, {workload}, {count} worker(s): trial phase {result['phase']:.2f} s, wall {result['wall']:.2f} s, "
                        f"{result['complete']} trials, per worker {result['each']}, exit codes {result['codes']}, "
                        f"tracebacks {result['tracebacks'] or 'none'}",
                        flush=True,
                    )
    finally:
        if proxy is not None:
            stop_processes([proxy], timeout=30)
        if redis_server is not None:
            redis_server.stop()
        if cluster is not None:
            cluster.stop()
    text = _report(mode, facts, trials, repeats, worker_trials, single, scaling)
    print(text)
    write_keeping_notes(RESULTS[mode], text)
    print(f"wrote {RESULTS[mode]}")
    return 0


def _busy(result: dict) -> float:
    """Cores the workers kept busy in the trial phase: their CPU s in their batches over its s."""
    return sum(e["cpu_ms"] * e["trials"] for e in result["each"]) / 1000 / result["phase"]


def _report(mode, facts, trials, repeats, worker_trials, single, scaling) -> str:
    """The results file: engines side by side, the workers, the targets."""
    memory = single["in memory (reference)"]
    med = statistics.median
    # per round: an engine's run against the in-memory run of the same round (load moves between rounds)
    over = {
        name: [1000 * (r["wall"] - m["wall"]) / trials for r, m in zip(runs, memory)] for name, runs in single.items()
    }
    over_cpu = {
        name: [1000 * (r["cpu"] - m["cpu"]) / trials for r, m in zip(runs, memory)] for name, runs in single.items()
    }
    spread = lambda xs: f"{med(xs):.2f} ({min(xs):.2f}..{max(xs):.2f})"  # noqa: E731
    lines = [
        "# Shared deployments: Optuna's engines for many workers",
        "",
        f"`benchmarks/bench_workers.py`, BENCH_MODE={mode}: {SPEC.name} (E96 divider_ce, Monte Carlo "
        f"robustness screen on), seed 0, batch 64. One runner: {trials:,} trials, {repeats} round(s), each engine once "
        "per round (PostgreSQL and the gRPC proxy: once), median (min..max); the overhead is taken against the "
        "in-memory run of the same round. Workers: "
        + "; ".join(f"{WORKLOADS[w].name} ({w}), {n:,} trials" for w, n in worker_trials.items())
        + ". Redis with the append-only file on"
        + (", PostgreSQL with fsync and synchronous commit on." if mode == "full" else ".")
        + " Wall figures move with the machine's load (given per row); CPU figures much less.",
        "",
    ]
    lines += facts.markdown("redis", "grpcio", "psycopg", "sqlalchemy")
    durable = {
        "in memory (reference)": "no",
        "journal file": "fsync per batch",
        "PostgreSQL, Optuna RDB": "every commit",
        "gRPC proxy -> PostgreSQL": "every commit",
        "Redis, Optuna's JournalRedisBackend": "AOF, fsync every second",
        "Redis, stagefit bulk backend": "AOF, fsync every second",
        "Redis, stagefit bulk backend, appendfsync always": "AOF, fsync every write",
    }
    lines += [
        "## One runner: per-trial cost of the storage",
        "",
        "| engine | durable | wall s | CPU s | overhead over in memory, wall ms/trial | overhead, CPU ms/trial "
        "| server CPU ms/trial | round trips/trial | load |",
        "| --- | --- | ---: | ---: | ---: | ---: | ---: | ---: | ---: |",
    ]
    for name, runs in single.items():
        if not runs:
            continue
        lines.append(
            f"| {name} | {durable[name]} | {spread([r['wall'] for r in runs])} | {spread([r['cpu'] for r in runs])} | "
            f"{spread(over[name]) if name in over and over[name] else 'n/a'} | "
            f"{spread(over_cpu[name]) if over_cpu.get(name) else 'n/a'} | "
            f"{1000 * med([r['server'] for r in runs]) / trials:.2f} | {med([r['trips'] for r in runs]) / trials:.2f} | "
            f"{med([r['load'] for r in runs]):.1f} |"
        )
    lines += [
        "",
        "## Workers (`stagefit worker --once` processes on one search)",
        "",
        "Trial phase: from the first trial asked to the last told (the stored trials' times); ranking the "
        "finished search (one worker, the shortlist's full assessment) is the last column, apart. CPU per "
        "trial: each worker's CPU time in its batches over the trials it told (its log); cores busy: the "
        "workers' CPU time in their batches over the trial phase. Workers sample different designs (their "
        "seeds differ), and on the heavy search a design's cost depends on its stage: 'speed-up at equal "
        "work' is the speed-up in CPU work done per second (cores busy over the one worker's), the part of "
        "the speed-up that cheaper trials do not explain.",
        "",
        "| engine | search | workers | trial phase s | trials/s | speed-up | speed-up at equal work "
        "| trials per worker | CPU ms/trial per worker | cores busy | ranking s | wall to done s | load start..end "
        "| finished | tracebacks |",
        "| --- | --- | ---: | ---: | ---: | ---: | ---: | --- | --- | ---: | ---: | ---: | --- | ---: | --- |",
    ]
    for (name, workload), rows in scaling.items():
        one = rows[0][1]
        for count, r in rows:
            lines.append(
                f"| {name} | {workload} | {count} | {r['phase']:.2f} | {worker_trials[workload] / r['phase']:.0f} | "
                f"{one['phase'] / r['phase']:.2f}x | {_busy(r) / _busy(one):.2f}x | "
                f"{', '.join(str(e['trials']) for e in r['each'])} | {', '.join(format(e['cpu_ms'], '.2f') for e in r['each'])} | "
                f"{_busy(r):.2f} | "
                f"{max(e['finishing'] for e in r['each']):.1f} | {r['wall']:.1f} | {r['load'][0]:.1f}..{r['load'][1]:.1f} | "
                f"{r['complete']} | {', '.join(r['tracebacks']) or 'none'} |"
            )
    chosen = "Redis, stagefit bulk backend"
    met = lambda ok: "met" if ok else "**missed**"  # noqa: E731

    def two_workers(workload: str) -> str:
        """The two-worker row of the targets table for ``workload``'s search: met on wall when
        both the trials/s and the work done per second (cheaper trials taken out) reach it."""
        rows = dict(scaling[chosen, workload])
        speedup, at_equal_work = rows[1]["phase"] / rows[2]["phase"], _busy(rows[2]) / _busy(rows[1])
        one_cpu = med([e["cpu_ms"] for e in rows[1]["each"]])
        # CPU per trial of the pair, over both workers' trials (their designs, so their costs, differ)
        two_cpu = sum(e["cpu_ms"] * e["trials"] for e in rows[2]["each"]) / sum(e["trials"] for e in rows[2]["each"])
        cpu_bound = 2 * one_cpu / two_cpu  # the speed-up with two free cores: CPU per trial is what each worker spends
        return (
            f"| 2 workers >= {TARGETS['two_workers']}x one worker's trials/s, {WORKLOADS[workload].name} "
            f"({workload}{', the target' if workload == 'heavy' else ''}) | wall {speedup:.2f}x "
            f"({at_equal_work:.2f}x at equal work) at load {rows[2]['load'][0]:.1f}..{rows[2]['load'][1]:.1f}; from "
            f"CPU per trial (1 worker {one_cpu:.2f} ms, 2 workers {two_cpu:.2f} ms), with two free cores "
            f"{cpu_bound:.2f}x | {met(min(speedup, at_equal_work) >= TARGETS['two_workers'])} (wall), "
            f"{met(cpu_bound >= TARGETS['two_workers'])} (CPU) |"
        )

    lines += [
        "",
        "## Targets (the chosen engine: Redis journal, stagefit bulk backend)",
        "",
        "| target | measured | met |",
        "| --- | --- | --- |",
        f"| per-trial shared-storage overhead < {TARGETS['overhead_ms']:g} ms | wall {med(over[chosen]):.2f} ms "
        f"(load {med([r['load'] for r in single[chosen]]):.1f}), CPU {med(over_cpu[chosen]):.2f} ms + server "
        f"{1000 * med([r['server'] for r in single[chosen]]) / trials:.2f} ms | "
        f"{met(med(over[chosen]) < TARGETS['overhead_ms'])} |",
        two_workers("heavy"),
        two_workers("light"),
        f"| no traceback in any worker log | "
        f"{sum(len(r['tracebacks']) for rows_ in scaling.values() for _, r in rows_)} logs with one | "
        f"{met(not any(r['tracebacks'] for rows_ in scaling.values() for _, r in rows_))} |",
    ]
    return "\n".join(lines) + "\n"


if __name__ == "__main__":
    raise SystemExit(main())
