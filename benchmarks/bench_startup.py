"""Start-up and end-to-end wall time as a user meets them: process start to last byte.

    .venv/bin/python benchmarks/bench_startup.py               # -> benchmarks/results/startup.md
    BENCH_MODE=quick .venv/bin/python benchmarks/bench_startup.py   # fewer repeats, one spec

Every figure is a fresh process timed from outside (``subprocess``, monotonic clock):

- ``stagefit --help``, against a bare ``python -c pass`` on the same interpreter;
- ``stagefit search`` start-up: process start to its first stderr line ("no stored search
  of this spec ...: running one"), which it prints after reading and validating the spec
  and catalog and opening the storage, just before the first trial; for every spec on a new
  journal file, and on a journal that already holds a finished search of another spec
  (listed from its snapshot) -- these start-up-only runs are stopped at that line;
- ``stagefit search`` end to end on the default storage (a journal file; ``--fresh``),
  process start to exit with all of stdout read;
- the library call ``optimizer.search(spec)`` (in memory) end to end in a fresh process,
  and the time of the call alone as the child measures it;
- full mode: ``stagefit search`` end to end on a journal kept for several searches, as the
  default ``runs/stagefit.journal`` is (three other specs' 4,000-trial searches on it, then the
  worst spec's seed-0 search run again with ``--fresh`` each time), and every bundled example's
  own default search (its trial budget and seed, a new journal), one run each.

Each is repeated (median, min..max); the search runs use seeds 0, 1, 2, ... Also the
largest top-level imports of ``stagefit search`` (``python -X importtime``).

The project's bytecode is compiled first (``compileall``), as ``pip install`` does: where
PYTHONDONTWRITEBYTECODE is set, an editable checkout would otherwise compile every module of
the project from source in every process (about 0.2-0.3 s CPU of start-up).
"""

from __future__ import annotations

import json
import os
import resource
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "benchmarks"))
sys.path.insert(0, str(ROOT))

from run_facts import RunFacts, bench_mode, write_keeping_notes  # noqa: E402

from optimizer.bundled import example_names, example_path  # noqa: E402
from optimizer.spec import load_spec  # noqa: E402

RESULTS = ROOT / "benchmarks" / "results" / "startup.md"
PYTHON = sys.executable
STAGEFIT = [PYTHON, "-m", "optimizer.cli"]
TARGETS = {"help": 0.3, "search_startup": 0.8, "end_to_end_4k": 5.0}
TRIALS = 4000
KEPT_BESIDE = ["specs/contact_pickup_buffer.yaml", "specs/geophone_jfet_buffer.yaml", "specs/piezo_bridge_buffer.yaml"]
SPECS = {
    "quick": ["specs/contact_pickup_buffer.yaml"],
    "full": ["specs/contact_pickup_buffer.yaml", "specs/bench_stock_preamp.yaml"],
}
REPEATS = {"quick": 3, "full": 5}


def _children_cpu() -> float:
    """CPU seconds (user + system) of the child processes waited for so far."""
    usage = resource.getrusage(resource.RUSAGE_CHILDREN)
    return usage.ru_utime + usage.ru_stime


CPU: dict[tuple[str, ...], float] = {}  # CPU seconds (user + system) of the last run of each command


def timed(cmd: list[str]) -> tuple[float, float | None, str]:
    """(seconds to exit with stdout read, seconds to the first stderr line or None, stdout);
    the process's CPU time (user + system) goes to CPU[tuple(cmd)]."""
    cpu = _children_cpu()
    start = time.monotonic()
    proc = subprocess.Popen(cmd, cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    first = None
    err = []
    for line in proc.stderr:  # stdout is small for these commands: the pipe does not fill
        if first is None:
            first = time.monotonic() - start
        err.append(line)
    out = proc.stdout.read()
    code = proc.wait()
    total = time.monotonic() - start
    CPU[tuple(cmd)] = _children_cpu() - cpu
    if code not in (0, 3):  # 3: answered, nothing meets every limit
        raise RuntimeError(f"{' '.join(cmd)} exited {code}: {''.join(err)[-2000:]}")
    if "Traceback" in "".join(err):
        raise RuntimeError(f"traceback from {' '.join(cmd)}: {''.join(err)[-2000:]}")
    return total, first, out


def first_line(cmd: list[str]) -> tuple[float, float]:
    """(seconds to the first stderr line, CPU seconds of the process): the process is stopped
    there (start-up only)."""
    cpu = _children_cpu()
    start = time.monotonic()
    proc = subprocess.Popen(cmd, cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    line = proc.stderr.readline()
    seconds = time.monotonic() - start
    proc.kill()  # this benchmark's own child, by its handle
    proc.wait()
    proc.stderr.close()
    if "running one" not in line:
        raise RuntimeError(f"{' '.join(cmd)}: unexpected first line {line!r}")
    return seconds, _children_cpu() - cpu


CALIBRATION = (
    "import time\nfrom optimizer import load_spec, search\nfrom optimizer.search import with_search\n"
    "spec = with_search(load_spec('specs/bench_stock_preamp.yaml'), trials=1000, seed=0)\n"
    "start = time.process_time()\nsearch(spec)\nprint(time.process_time() - start)"
)


def host_speed() -> float:
    """CPU seconds of a fixed piece of work (a 1,000-trial in-memory search, seeded) in a fresh
    process: run at the start and the end of the benchmark, it shows how quick the host's cores
    were then (on a shared virtual machine the same code's CPU time moves 30 % or more between
    spells), so runs on different days can be compared."""
    done = subprocess.run([PYTHON, "-c", CALIBRATION], cwd=ROOT, capture_output=True, text=True, check=True)
    return float(done.stdout.strip().splitlines()[-1])


def search_command(spec: str, storage: Path, seed: int) -> list[str]:
    return [
        *STAGEFIT,
        "search",
        spec,
        "--storage",
        str(storage),
        "--trials",
        str(TRIALS),
        "--seed",
        str(seed),
        "--fresh",
    ]


def spread(xs: list[float]) -> str:
    return f"{statistics.median(xs):.2f} ({min(xs):.2f}..{max(xs):.2f}, n={len(xs)})"


def library_child(spec: str, trials: int, seed: int) -> list[str]:
    code = (
        "import time, json\nstart = time.monotonic()\n"
        "from optimizer import load_spec, search\nfrom optimizer.search import with_search\n"
        "imported = time.monotonic()\n"
        f"result = search(with_search(load_spec({spec!r}), trials={trials}, seed={seed}))\n"
        "print(json.dumps({'imports': imported - start, 'call': time.monotonic() - imported, "
        "'best': result.candidates[0]['score']}))"
    )
    return [PYTHON, "-c", code]


def top_imports(spec: str, storage: Path, count: int = 8) -> list[tuple[float, str]]:
    """The largest top-level imports (cumulative seconds) of one `stagefit search` run."""
    done = subprocess.run(
        [
            PYTHON,
            "-X",
            "importtime",
            "-m",
            "optimizer.cli",
            "search",
            spec,
            "--storage",
            str(storage),
            "--trials",
            "64",
            "--fresh",
            "--quiet",
        ],
        cwd=ROOT,
        capture_output=True,
        text=True,
    )
    rows = []
    for line in done.stderr.splitlines():
        if not line.startswith("import time:") or "|" not in line:
            continue
        _, cumulative, name = line.split("|")
        if name.startswith(" ") and not name.startswith("  "):  # depth 1: imported by the program itself
            try:
                rows.append((int(cumulative) / 1e6, name.strip()))
            except ValueError:
                continue
    return sorted(rows, reverse=True)[:count]


IMPORT_STAGES = ("optimizer.cli", "numpy", "pydantic", "optuna", "optimizer.spec", "optimizer.search")


def import_cpu() -> list[tuple[str, float]]:
    """CPU seconds (user + system) each stage of `stagefit search`'s imports adds, in a fresh
    process (each stage counts what it imports beyond the stages before it), with the
    command's import guard (cli.defer_unused_imports) in place: steadier under load than
    the wall times of -X importtime."""
    code = (
        "import json, time\nout = []\n"
        f"for name in {IMPORT_STAGES!r}:\n"
        "    start = time.process_time(); __import__(name); out.append((name, time.process_time() - start))\n"
        "    if name == 'optimizer.cli': __import__('optimizer.cli').cli.defer_unused_imports()\n"
        "print(json.dumps(out))"
    )
    done = subprocess.run([PYTHON, "-c", code], cwd=ROOT, capture_output=True, text=True, check=True)
    return [tuple(row) for row in json.loads(done.stdout)]


def main() -> int:
    mode = bench_mode()
    facts = RunFacts.start()
    repeats = REPEATS[mode]
    tmp = Path(tempfile.mkdtemp(prefix="bench-startup-"))
    subprocess.run([PYTHON, "-m", "compileall", "-q", "optimizer", "api"], cwd=ROOT, check=True, capture_output=True)
    speed_start = host_speed()
    bare = [timed([PYTHON, "-c", "pass"])[0] for _ in range(repeats + 2)]
    helps = [timed([*STAGEFIT, "--help"])[0] for _ in range(repeats + 2)]
    print(f"python -c pass {spread(bare)} s; stagefit --help {spread(helps)} s", flush=True)
    rows = []
    for spec in SPECS[mode]:
        startups, totals, lib_totals, lib_calls, lib_imports, cli_cpu, lib_cpu = [], [], [], [], [], [], []
        for seed in range(repeats):
            command = search_command(spec, tmp / f"{Path(spec).stem}-s{seed}.journal", seed)
            total, first, _ = timed(command)
            startups.append(first)
            totals.append(total)
            cli_cpu.append(CPU[tuple(command)])
            lib_total, _, out = timed(library_child(spec, TRIALS, seed))
            lib_cpu.append(CPU[tuple(library_child(spec, TRIALS, seed))])
            child = json.loads(out.strip().splitlines()[-1])
            lib_totals.append(lib_total)
            lib_calls.append(child["call"])
            lib_imports.append(child["imports"])
            print(
                f"  {spec} seed {seed}: CLI start-up {first:.2f} s, end to end {total:.2f} s "
                f"(CPU {cli_cpu[-1]:.2f} s); library end to end {lib_total:.2f} s (call {child['call']:.2f} s, "
                f"CPU {lib_cpu[-1]:.2f} s)",
                flush=True,
            )
        rows.append((spec, startups, totals, lib_totals, lib_calls, lib_imports, cli_cpu, lib_cpu))
    # start-up alone, every spec (both in quick mode too), on new journals and alternating
    startup_specs = SPECS["full"]
    alone: dict[str, list[tuple[float, float]]] = {spec: [] for spec in startup_specs}
    for seed in range(repeats):
        for spec in startup_specs:
            alone[spec].append(first_line(search_command(spec, tmp / f"alone-{Path(spec).stem}-s{seed}.journal", seed)))
    # ... and on a journal holding a finished 4,000-trial search of another spec (the first's seed-0 run)
    other = SPECS[mode][0]
    crowded_spec = next(s for s in startup_specs if s != other)
    crowded = [
        first_line(search_command(crowded_spec, tmp / f"{Path(other).stem}-s0.journal", 100 + k))
        for k in range(repeats)
    ]
    print(
        "start-up alone: "
        + "; ".join(f"{Path(s).name} {spread([w for w, _ in alone[s]])} s" for s in startup_specs)
        + f"; {Path(crowded_spec).name} on a journal holding {Path(other).name} {spread([w for w, _ in crowded])} s",
        flush=True,
    )
    # end to end on a journal kept for several searches (as the default runs/stagefit.journal is):
    # three other 4,000-trial searches, then the worst spec's seed-0 search run again and again with --fresh
    kept_journal, kept_spec = tmp / "kept.journal", SPECS["full"][-1]
    kept: list[tuple[float, float]] = []
    if mode == "full":
        for spec in KEPT_BESIDE:
            subprocess.run(search_command(spec, kept_journal, 0), cwd=ROOT, check=True, capture_output=True)
        for _ in range(repeats):
            command = search_command(kept_spec, kept_journal, 0)
            kept.append((timed(command)[0], CPU[tuple(command)]))
        print(f"{Path(kept_spec).name} on a journal kept for three other searches: {spread([w for w, _ in kept])} s")
    # every bundled example as a user first runs it: its own trial budget and seed, a new journal
    examples: list[tuple[str, int, float, float]] = []
    if mode == "full":
        for name in example_names():
            budget = load_spec(example_path(name)).search.trials
            command = [*STAGEFIT, "search", name, "--storage", str(tmp / f"example-{name}.journal"), "--fresh"]
            examples.append((name, budget, timed(command)[0], CPU[tuple(command)]))
            print(f"  example {name} ({budget:,} trials): {examples[-1][2]:.2f} s (CPU {examples[-1][3]:.2f} s)")
    imports = top_imports(SPECS[mode][0], tmp / "imports.journal")
    speed_end = host_speed()
    stages = import_cpu()

    met = lambda ok: "met" if ok else "**missed**"  # noqa: E731
    worst_startup = max(statistics.median([w for w, _ in runs]) for runs in alone.values())
    worst_startup_cpu = max(statistics.median([c for _, c in runs]) for runs in alone.values())
    worst_total = max(statistics.median(r[2]) for r in rows)
    worst_cpu = max(statistics.median(r[6]) for r in rows)
    lines = [
        "# Start-up and end-to-end wall time",
        "",
        f"`benchmarks/bench_startup.py`, BENCH_MODE={mode}. Every time is a fresh process measured from "
        "outside, process start to last byte; median (min..max, n runs). Searches: "
        f"{TRIALS:,} trials, seeds 0..{repeats - 1}, the CLI on a new journal file (its default storage "
        "kind) with `--fresh`, the library call `optimizer.search(spec)` in memory. The project's bytecode "
        "is compiled first, as `pip install` does (PYTHONDONTWRITEBYTECODE is "
        f"{'set' if os.environ.get('PYTHONDONTWRITEBYTECODE') else 'not set'} in this environment).",
        "",
    ]
    lines += facts.markdown("pandas", "pydantic", "scipy")
    lines += [
        "## Targets",
        "",
        "| target | measured (s) | met |",
        "| --- | --- | --- |",
        f"| `stagefit --help` < {TARGETS['help']} s | {spread(helps)} | "
        f"{met(statistics.median(helps) < TARGETS['help'])} |",
        f"| `stagefit search` start-up < {TARGETS['search_startup']} s (worst spec's median) | "
        f"{worst_startup:.2f} (CPU {worst_startup_cpu:.2f}) | {met(worst_startup < TARGETS['search_startup'])} |",
        f"| {TRIALS:,}-trial answer end to end < {TARGETS['end_to_end_4k']} s on the default storage "
        f"(`stagefit search`, worst spec's median) | {worst_total:.2f} (CPU {worst_cpu:.2f}) | "
        f"{met(worst_total < TARGETS['end_to_end_4k'])} |",
    ]
    if kept:
        kept_median = statistics.median([w for w, _ in kept])
        lines.append(
            f"| the same on a journal kept for three other {TRIALS:,}-trial searches "
            f"({Path(kept_spec).name}, seed 0 again each time with `--fresh`) | {kept_median:.2f} "
            f"(CPU {statistics.median([c for _, c in kept]):.2f}) | {met(kept_median < TARGETS['end_to_end_4k'])} |"
        )
    lines += [
        "",
        f"For scale: a bare `python -c pass` on this interpreter takes {spread(bare)} s. The host's speed: a "
        f"fixed piece of work (a seeded 1,000-trial in-memory search of bench_stock_preamp) took "
        f"{speed_start:.2f} s CPU at the start of this run and {speed_end:.2f} s at its end (compare runs by it: "
        "the same code's CPU time moves 30 % or more between spells on this shared host).",
        "",
        "## `stagefit search` start-up alone",
        "",
        "Process start to the first stderr line (the process stopped there), wall and CPU seconds, "
        f"seeds 0..{repeats - 1} with the specs alternating; a new journal file each, and a journal that "
        f"already holds a finished {TRIALS:,}-trial search of {Path(other).name} (listed from its snapshot).",
        "",
        "| spec | journal | wall s | CPU s |",
        "| --- | --- | --- | --- |",
    ]
    for spec in startup_specs:
        lines.append(
            f"| {Path(spec).name} | new | {spread([w for w, _ in alone[spec]])} | {spread([c for _, c in alone[spec]])} |"
        )
    lines += [
        f"| {Path(crowded_spec).name} | holding {Path(other).name} | {spread([w for w, _ in crowded])} | "
        f"{spread([c for _, c in crowded])} |",
        "",
        "## Per spec",
        "",
        "Wall seconds, and the CPU seconds (user + system) of the whole process: with the cores shared, "
        "CPU is the figure that does not grow with the load.",
        "",
        "| spec | `stagefit search` start-up | `stagefit search` end to end | `stagefit search` CPU | "
        "library: imports | library: search() call | library: process end to end | library: process CPU |",
        "| --- | --- | --- | --- | --- | --- | --- | --- |",
    ]
    for spec, startups, totals, lib_totals, lib_calls, lib_imports, cli_cpu, lib_cpu in rows:
        lines.append(
            f"| {Path(spec).name} | {spread(startups)} | {spread(totals)} | {spread(cli_cpu)} | "
            f"{spread(lib_imports)} | {spread(lib_calls)} | {spread(lib_totals)} | {spread(lib_cpu)} |"
        )
    if kept:
        lines += [
            "",
            f"On a journal kept for several searches: {', '.join(Path(s).name for s in KEPT_BESIDE)} "
            f"({TRIALS:,} trials, seed 0, the CLI), then {Path(kept_spec).name} seed 0 with `--fresh` "
            f"{repeats} times (each run deletes the last one's search): end to end {spread([w for w, _ in kept])} s, "
            f"CPU {spread([c for _, c in kept])} s.",
        ]
    if examples:
        lines += [
            "",
            "## Every bundled example, its own default search",
            "",
            "`stagefit search NAME --fresh` on a new journal, the spec's own trial budget and seed (not the "
            f"{TRIALS:,} trials above), one run each: what a user gets on first contact. The targets above "
            "are judged on the benchmark specs; this table shows how far the examples are from them.",
            "",
            "| example | trials | end to end (s) | CPU (s) |",
            "| --- | ---: | ---: | ---: |",
        ]
        lines += [f"| {name} | {budget:,} | {wall:.2f} | {cpu:.2f} |" for name, budget, wall, cpu in examples]
    lines += [
        "",
        "## Largest top-level imports of `stagefit search` (`python -X importtime`, one run)",
        "",
        "| cumulative s | module |",
        "| ---: | --- |",
    ]
    lines += [f"| {s:.3f} | {name} |" for s, name in imports]
    lines += [
        "",
        "## CPU of each import stage of `stagefit search` (one fresh process)",
        "",
        "| stage | CPU s (beyond the stages above) |",
        "| --- | ---: |",
    ]
    lines += [f"| {name} | {seconds:.3f} |" for name, seconds in stages]
    lines += [f"| total | {sum(seconds for _, seconds in stages):.3f} |"]
    lines += [
        "",
        "Plotting (matplotlib), the server (Flask, waitress) and SQLAlchemy are imported only by the "
        "commands that use them; `--help` imports none of Optuna, SciPy, pandas or pydantic, and a "
        "whole `stagefit search` none of pandas, matplotlib, Flask or the Redis client "
        "(tests/test_cli.py checks both). A search needs numpy, pydantic (the spec) and Optuna; "
        "the catalog is read with the stdlib csv module.",
    ]
    text = "\n".join(lines) + "\n"
    print(text)
    write_keeping_notes(RESULTS, text)  # the header names the mode
    print(f"wrote {RESULTS}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
