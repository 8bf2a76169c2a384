"""Cost of a search as it grows: storage overhead, time per 1,000 trials, status poll,
reopening, peak memory.

    .venv/bin/python benchmarks/bench_scale.py --full     # 4k, 16k, 20k, 64k, 100k -> results/scale.md (the default)
    .venv/bin/python benchmarks/bench_scale.py --quick    # 4k and 16k, under 5 minutes -> results/scale-quick.md
                                                          # (or BENCH_MODE=quick, as make bench passes it)

Every search runs in a child process of its own (so its peak memory, VmHWM, is its own) on
one spec, ``benchmarks/specs/bs_e96_feedback_line.yaml``, seed 0, the budget given:

- journal against memory: the same 4,000-trial search (create + run, without the
  finishing step) on the default storage (a journal file) and in memory, wall and CPU time;
  target: journal at most 1.3x memory;
- time per 1,000 trials: the search on a journal file at each size, wall and CPU
  (this process's user + system time), over the whole search and over its last quarter;
  target: the last quarter's CPU per 1,000 trials flat within 20 % over the sizes;
- status poll: ``search_status`` of the search, in the process that ran it (the tally is
  kept there, as in the server), median of 20 polls; target under 10 ms at 64k trials;
- reopening: a fresh process opens the journal and reads the search's status
  (``open_storage`` + ``search_status``: the journal's snapshot and the records after it;
  at 20k also Optuna's full replay, the snapshot put aside); target under 1 s at 20k trials;
- memory of the child running the search: resident after the imports, and its peak
  (VmHWM); target under 300 MB at 64k trials.

The machine is shared: wall times move with its load (printed with each run), CPU times
much less; both are recorded.
"""

from __future__ import annotations

import os

if __name__ == "__main__":
    for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
        os.environ[_var] = "1"  # one core, as the targets are stated (before numpy is imported)

import argparse  # noqa: E402
import json  # noqa: E402
import platform  # noqa: E402
import statistics  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

from run_facts import bench_mode, write_keeping_notes  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
SPEC = ROOT / "benchmarks" / "specs" / "bs_e96_feedback_line.yaml"
RESULTS = ROOT / "benchmarks" / "results"
QUICK_SIZES = (4000, 16000)
FULL_SIZES = (4000, 16000, 20000, 64000, 100000)
TARGETS = {
    "journal_ratio": 1.3,
    "flat": 0.20,
    "poll_ms": 10.0,
    "poll_at": 64000,
    "reopen_s": 1.0,
    "reopen_at": 20000,
    "peak_mb": 300.0,
    "peak_at": 64000,
}


def _status_mb(field: str) -> float:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith(field + ":"):
            return int(line.split()[1]) / 1024
    return float("nan")


def _peak_mb() -> float:
    """This process's peak resident memory (VmHWM), MB."""
    return _status_mb("VmHWM")


def _rss_mb() -> float:
    """This process's resident memory now (VmRSS), MB."""
    return _status_mb("VmRSS")


def _cpu() -> float:
    times = os.times()
    return times.user + times.system


def child_search(trials: int, storage: str | None) -> dict:
    """In a child: one search of ``trials`` (create + run, no finishing step), then status polls."""
    from optimizer.search import create_search, run_search, search_status, with_search
    from optimizer.spec import load_spec
    from optimizer.storage import open_storage

    spec = with_search(load_spec(SPEC), trials=trials, seed=0)
    store = open_storage(storage)
    base_mb = _rss_mb()
    marks: list[tuple[int, float, float]] = []  # (trials finished, wall, CPU) once past three quarters

    def progress(finished: int, budget: int) -> None:
        if finished >= 3 * budget // 4 and not marks:
            marks.append((finished, time.perf_counter(), _cpu()))

    wall, cpu = time.perf_counter(), _cpu()
    search_id = create_search(spec, store, search_id="scale")
    run_search(store, search_id, finish=False, progress=progress)
    end_wall, end_cpu = time.perf_counter(), _cpu()
    wall, cpu = end_wall - wall, end_cpu - cpu
    tail = trials - marks[0][0]
    polls = []
    for _ in range(20):
        start = time.perf_counter()
        status = search_status(store, search_id)
        polls.append(time.perf_counter() - start)
    assert status["trials_done"] == trials, status
    return {
        "trials": trials,
        "wall": wall,
        "cpu": cpu,
        "tail_cpu_per_k": 1000 * (end_cpu - marks[0][2]) / tail,
        "tail_wall_per_k": 1000 * (end_wall - marks[0][1]) / tail,
        "poll_ms": 1000 * statistics.median(polls[1:]),
        "first_poll_ms": 1000 * polls[0],
        "peak_mb": _peak_mb(),
        "base_mb": base_mb,
    }


def child_reopen(storage: str, replay: bool = False) -> dict:
    """In a child: open the stored search and read its status, as a new CLI or server process
    does: from the journal's snapshot and the records after it, or with ``replay`` through
    Optuna's full replay of the journal (the snapshot put aside)."""
    start = time.perf_counter()
    from optimizer.search import search_status
    from optimizer.storage import open_storage, snapshot_path

    imported = time.perf_counter()
    snapshot = snapshot_path(storage)
    if replay:
        snapshot.rename(snapshot.with_name(snapshot.name + ".aside"))
    try:
        wall, cpu = time.perf_counter(), _cpu()
        status = search_status(open_storage(storage), "scale")
        wall, cpu = time.perf_counter() - wall, _cpu() - cpu
    finally:
        if replay:
            snapshot.with_name(snapshot.name + ".aside").rename(snapshot)
    key = "replay" if replay else "reopen"
    return {f"{key}_s": wall, f"{key}_cpu_s": cpu, "import_s": imported - start, "trials": status["trials_done"]}


def child_held(storage: str, trials: int) -> dict:
    """In a child: replay a stored search's journal under tracemalloc and group what the
    replayed state holds by the source file that allocated it, in bytes per trial."""
    import gc
    import tracemalloc

    from optimizer.storage import open_storage

    tracemalloc.start()
    open_storage(storage).get_all_studies()  # the full replay, as a searching process holds it
    gc.collect()
    stats = tracemalloc.take_snapshot().statistics("filename")
    total = sum(s.size for s in stats)
    top = [
        (
            str(s.traceback[0].filename).split("site-packages/")[-1].split("lib/python3.11/")[-1],
            s.size / trials,
            s.count,
        )
        for s in stats[:6]
    ]
    return {"total_per_trial": total / trials, "top": top}


HELD = {  # what the replayed state's allocations are, by the file that made them
    "json/decoder.py": "values parsed from the journal and kept: each trial's record text (about 1.4 kB), its values",
    "optuna/storages/journal/_storage.py": "the replay's trial dicts (params, distributions, user and system attrs), "
    "datetimes, the trial lists",
    "copyreg.py": "the FrozenTrial objects (copied on each update by the replay)",
    "optuna/trial/_frozen.py": "each FrozenTrial's values",
    "copy.py": "FrozenTrial copies' attribute dicts",
}


def held(trials: int, out: Path, command: str) -> None:
    """What a replayed journal holds per trial (tracemalloc), written to ``out``."""
    import optuna

    started = time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime())
    with tempfile.TemporaryDirectory() as tmp:
        path = f"{tmp}/held.journal"
        _child("--child", str(trials), "--storage", path)
        found = _child("--held", path, "--trials", str(trials))
    lines = [
        "# Scale benchmark: what a replayed journal holds",
        "",
        f"Machine: {platform.machine()}, {os.cpu_count()} cores; Python {platform.python_version()}, "
        f"Optuna {optuna.__version__}; started {started}. Command: `{command}`. A {trials:,}-trial search "
        f"(`benchmarks/specs/{SPEC.name}`, seed 0) on a journal file, replayed in a new process under "
        "tracemalloc (the state a searching or serving process keeps of it; the process's imports apart).",
        "",
        f"Held: {found['total_per_trial']:,.0f} bytes per trial. By the source file that allocated it:",
        "",
        "| allocated in | what it is | bytes per trial | objects |",
        "| --- | --- | --- | --- |",
    ]
    lines += [f"| `{name}` | {HELD.get(name, '')} | {size:,.0f} | {count:,} |" for name, size, count in found["top"]]
    text = "\n".join(lines) + "\n"
    write_keeping_notes(out, text)
    print(text + f"\nwritten {out.relative_to(ROOT)}")


def _child(*args: str) -> dict:
    out = subprocess.run([sys.executable, __file__, *args], capture_output=True, text=True, cwd=ROOT, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def _load() -> float:
    return os.getloadavg()[0]


def run(sizes: tuple[int, ...], out: Path, command: str, ratio: bool = True) -> None:
    rows, started = [], time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime())
    with tempfile.TemporaryDirectory() as tmp:
        load = _load()
        memory = journal_4k = None
        if ratio:
            memory = _child("--child", "4000")
            journal_4k = _child("--child", "4000", "--storage", f"{tmp}/ratio.journal")
            print(
                f"4,000 trials: memory {memory['wall']:.2f} s wall / {memory['cpu']:.2f} s CPU, journal "
                f"{journal_4k['wall']:.2f} s / {journal_4k['cpu']:.2f} s (load {load:.1f})",
                flush=True,
            )
        for n in sizes:
            load = _load()
            path = f"{tmp}/s{n}.journal"
            row = _child("--child", str(n), "--storage", path)
            row.update(_child("--reopen", path), load=load, size_mb=Path(path).stat().st_size / 1e6)
            if n == TARGETS["reopen_at"]:  # the same status through Optuna's full replay, for comparison
                row.update(_child("--reopen", path, "--replay"))
            rows.append(row)
            print(
                f"{n:,} trials: {1000 * row['wall'] / n:.2f} s wall / {1000 * row['cpu'] / n:.2f} s CPU per 1,000, "
                f"poll {row['poll_ms']:.2f} ms, reopen {row['reopen_s']:.2f} s, peak {row['peak_mb']:.0f} MB "
                f"(load {load:.1f})",
                flush=True,
            )
            report(memory, journal_4k, rows, out, command, started, sizes)  # rewritten after each size


def report(
    memory: dict | None,
    journal: dict | None,
    rows: list[dict],
    out: Path,
    command: str,
    started: str,
    sizes: tuple[int, ...],
) -> None:
    import numpy
    import optuna

    def met(ok: bool | None) -> str:
        return "n/a" if ok is None else ("met" if ok else "**missed**")

    def at(n: int) -> dict | None:
        return next((r for r in rows if r["trials"] == n), None)

    per_k = {r["trials"]: (1000 * r["wall"] / r["trials"], 1000 * r["cpu"] / r["trials"]) for r in rows}
    tail_cpu = [r["tail_cpu_per_k"] for r in rows]
    spread_cpu = max(tail_cpu) / min(tail_cpu) - 1
    spread_wall = max(r["tail_wall_per_k"] for r in rows) / min(r["tail_wall_per_k"] for r in rows) - 1
    lines = [
        "# Scale benchmark",
        "",
        f"Machine: {platform.machine()}, {os.cpu_count()} cores shared with other developers' runs; "
        f"Python {platform.python_version()}, numpy {numpy.__version__}, Optuna {optuna.__version__}; "
        f"started {started}. Command: `{command}`. Spec `benchmarks/specs/{SPEC.name}`, seed 0, one process, "
        "storage a journal file unless said. Wall times move with the machine's load (given per row); "
        "CPU time (user + system of the searching process) much less.",
        "",
        "## Time per 1,000 trials (journal file, search without its finishing step)",
        "",
        "Per 1,000 trials: over the whole search, and over its last quarter (the marginal cost at that size, "
        "which an average over the search would hide). Status poll: in the searching process (its tally). "
        "Reopen: a new process opens the journal and reads the status, from the snapshot and the records "
        "after it (imports apart). Memory: resident after the imports, and the child's peak (VmHWM).",
        "",
        "| trials | wall (s) | CPU (s) | wall per 1,000 (s) | CPU per 1,000 (s) | last quarter: wall, CPU per 1,000 (s) "
        "| status poll (ms) | first poll (ms) | reopen (s) | memory after imports (MB) | peak memory (MB) "
        "| journal (MB) | load |",
        "| --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- |",
    ]
    for r in rows:
        w, c = per_k[r["trials"]]
        lines.append(
            f"| {r['trials']:,} | {r['wall']:.1f} | {r['cpu']:.1f} | {w:.2f} | {c:.2f} | "
            f"{r['tail_wall_per_k']:.2f}, {r['tail_cpu_per_k']:.2f} | {r['poll_ms']:.2f} | "
            f"{r['first_poll_ms']:.1f} | {r['reopen_s']:.2f} | {r['base_mb']:.0f} | {r['peak_mb']:.0f} | "
            f"{r['size_mb']:.0f} | {r['load']:.1f} |"
        )
    poll, reopen, peak = at(TARGETS["poll_at"]), at(TARGETS["reopen_at"]), at(TARGETS["peak_at"])
    lines += [
        "",
        "## Targets",
        "",
        "| target | measured | met |",
        "| --- | --- | --- |",
        f"| 4,000-trial search on the journal file at most {TARGETS['journal_ratio']}x the in-memory search | "
        + (
            f"CPU {journal['cpu'] / memory['cpu']:.2f}x ({journal['cpu']:.2f} s / {memory['cpu']:.2f} s); wall "
            f"{journal['wall'] / memory['wall']:.2f}x ({journal['wall']:.2f} s / {memory['wall']:.2f} s) | "
            f"{met(journal['cpu'] / memory['cpu'] <= TARGETS['journal_ratio'])} (CPU) |"
            if memory and journal
            else "not run (--sizes) | n/a |"
        ),
        f"| time per 1,000 trials flat within {TARGETS['flat']:.0%}, {rows[0]['trials']:,} to {rows[-1]['trials']:,} "
        f"trials | last quarter's CPU per 1,000 from {min(tail_cpu):.2f} to {max(tail_cpu):.2f} s "
        f"(+{spread_cpu:.0%}); wall +{spread_wall:.0%} | "
        f"{met(spread_cpu <= TARGETS['flat'] if len(rows) > 1 else None)} (CPU) |",
        f"| status poll under {TARGETS['poll_ms']:.0f} ms at {TARGETS['poll_at']:,} trials | "
        + (f"{poll['poll_ms']:.2f} ms | {met(poll['poll_ms'] < TARGETS['poll_ms'])} |" if poll else "not run | n/a |"),
        f"| reopening a stored {TARGETS['reopen_at']:,}-trial search under {TARGETS['reopen_s']:.0f} s | "
        + (
            f"{reopen['reopen_s']:.2f} s (open + status, imports apart: {reopen['import_s']:.2f} s; "
            f"{reopen['reopen_cpu_s']:.2f} s CPU); Optuna's full replay of the same journal "
            f"{reopen['replay_s']:.2f} s ({reopen['replay_cpu_s']:.2f} s CPU) | "
            f"{met(reopen['reopen_s'] < TARGETS['reopen_s'])} |"
            if reopen
            else "not run | n/a |"
        ),
        f"| a {TARGETS['peak_at']:,}-trial search under {TARGETS['peak_mb']:.0f} MB peak | "
        + (
            f"{peak['peak_mb']:.0f} MB ({peak['base_mb']:.0f} MB after the imports) | "
            f"{met(peak['peak_mb'] < TARGETS['peak_mb'])} |"
            if peak
            else "not run | n/a |"
        ),
    ]
    missing = [n for n in sizes if at(n) is None]
    if missing:
        lines += ["", f"Not run (yet): {', '.join(f'{n:,}' for n in missing)} trials."]
    text = "\n".join(lines) + "\n"
    write_keeping_notes(out, text)
    print("\n" + text + f"\nwritten {out.relative_to(ROOT)}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="4k and 16k trials only (under 5 minutes)")
    parser.add_argument("--full", action="store_true", help="every size (the default unless BENCH_MODE=quick)")
    parser.add_argument(
        "--sizes", help="only these sizes, comma-separated (e.g. 4000,20000,64000), without the journal/memory ratio"
    )
    parser.add_argument("--child", type=int, help=argparse.SUPPRESS)
    parser.add_argument("--storage", help=argparse.SUPPRESS)
    parser.add_argument("--reopen", help=argparse.SUPPRESS)
    parser.add_argument("--replay", action="store_true", help=argparse.SUPPRESS)
    parser.add_argument("--held", help=argparse.SUPPRESS)
    parser.add_argument("--trials", type=int, help=argparse.SUPPRESS)
    parser.add_argument(
        "--memory-held", type=int, metavar="TRIALS", help="what a replayed journal of TRIALS holds -> scale-memory.md"
    )
    args = parser.parse_args()
    if args.child:
        print(json.dumps(child_search(args.child, args.storage)))
    elif args.held:
        print(json.dumps(child_held(args.held, args.trials)))
    elif args.memory_held:
        held(
            args.memory_held,
            RESULTS / "scale-memory.md",
            f"python benchmarks/bench_scale.py --memory-held {args.memory_held}",
        )
    elif args.reopen:
        print(json.dumps(child_reopen(args.reopen, args.replay)))
    else:
        args.quick = args.quick or (bench_mode() == "quick" and not args.full)
        sizes = QUICK_SIZES if args.quick else FULL_SIZES
        if args.sizes:
            sizes = tuple(int(n) for n in args.sizes.split(","))
        name = "scale-quick.md" if args.quick else "scale.md"
        command = "python benchmarks/bench_scale.py" + (
            f" --sizes {args.sizes}" if args.sizes else " --quick" if args.quick else " --full"
        )
        run(sizes, RESULTS / name, command, ratio=not args.sizes)


if __name__ == "__main__":
    main()
