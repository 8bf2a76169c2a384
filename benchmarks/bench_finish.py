"""The finishing step of a search: what runs between the last trial and the answer.

    .venv/bin/python benchmarks/bench_finish.py               # -> benchmarks/results/finish.md
    BENCH_MODE=quick .venv/bin/python benchmarks/bench_finish.py   # fewer repeats

A 4,000-trial search of each spec runs once in memory without its finish (run_search
``finish=False``). Then, repeated on the same trials (median, min..max):

- the finish as ``run_search`` does it (``study.summarise`` with the shortlist's size and
  builds: ranking, folding, the full assessment of the shortlist and the front);
- the answer read back (``load_search`` of the finished search: the stored shortlist and the
  ranked tail), what ``optimizer.search()`` and ``stagefit search`` do next.

Then the command line end to end, as a user runs it (``stagefit search
specs/bench_stock_preamp.yaml --storage <tmp>.journal --trials 4000 --seed S --fresh --quiet``,
seeds 0 and 1, each --format): one child process per run, which marks its CPU when the
finish starts and ends and when the search returns; the report is everything after that
(reading the answer back, formatting, printing, the process's exit), from the child's CPU
as its parent's ``wait4`` gives it.

CPU seconds (this process, user + system) beside wall seconds: with the cores shared, CPU is
the figure that does not grow with the load. Targets (issue 16: a 4k-trial answer end to end
in under 5 s): the finish at most 0.4 s CPU and the report after the search at most 0.15 s
CPU for bench_stock_preamp.
"""

from __future__ import annotations

import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from functools import partial
from pathlib import Path
from typing import Callable

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "benchmarks"))

from run_facts import RunFacts, bench_mode, write_keeping_notes  # noqa: E402

from optimizer.search.ranking import SHORTLIST_SAMPLES, SHORTLIST_SIZE  # noqa: E402
from optimizer.search.results import load_search  # noqa: E402
from optimizer.search.run import with_search  # noqa: E402
from optimizer.search.space import SearchSpace  # noqa: E402
from optimizer.search.study import create_search, finish_search, load_study, run_search, summarise  # noqa: E402
from optimizer.spec import load_spec  # noqa: E402
from optimizer.storage import open_storage  # noqa: E402

RESULTS = ROOT / "benchmarks" / "results" / "finish.md"
TRIALS = 4000
SPECS = ["bench_stock_preamp", "contact_pickup_buffer", "dc_coupled_sensor_split"]
REPEATS = {"quick": 3, "full": 7}
TARGET_CPU = 0.4  # s, the finish of bench_stock_preamp
TARGET_REPORT_CPU = 0.15  # s, the command line's work after the search, to the process's exit
CLI_SPEC = "bench_stock_preamp"
CLI_SEEDS = (0, 1)
CLI_FORMATS = {"quick": ("table",), "full": ("table", "json", "csv")}
CLI_REPEATS = {"quick": 1, "full": 3}


def cli_child(marks_path: str, argv: list[str]) -> None:
    """In the child: run ``stagefit`` on ``argv`` as its entry point does, marking the CPU
    seconds of the finish and the moment the search returns (written at exit, JSON)."""
    from optimizer import cli
    from optimizer.search import study  # noqa: F401 (the module, patched below)

    search_module, study_module = sys.modules["optimizer.search"], sys.modules["optimizer.search.study"]
    marks: dict[str, float] = {}
    run_search, finish = search_module.run_search, study_module._finish

    def marked_run(*args: object, **kwargs: object) -> int:
        try:
            return run_search(*args, **kwargs)
        finally:
            marks["searched"] = time.process_time()

    def marked_finish(*args: object, **kwargs: object) -> None:
        start = time.process_time()
        try:
            finish(*args, **kwargs)
        finally:
            marks["finish"] = time.process_time() - start

    search_module.run_search, study_module._finish = marked_run, marked_finish
    import atexit

    atexit.register(lambda: Path(marks_path).write_text(json.dumps(marks)))
    sys.argv = ["stagefit", *argv]
    sys.exit(cli.main())


def cli_run(argv: list[str]) -> dict[str, float]:
    """One ``stagefit`` run in a child process: its CPU in all, the finish's, the report's
    (after the search returns, the exit included) and its wall seconds."""
    with tempfile.TemporaryDirectory() as tmp:
        marks_path = os.path.join(tmp, "marks.json")
        wall = time.perf_counter()
        child = subprocess.Popen(
            [sys.executable, __file__, "--child", marks_path, *argv], stdout=subprocess.DEVNULL, cwd=ROOT
        )
        _, status, usage = os.wait4(child.pid, 0)
        wall = time.perf_counter() - wall
        if os.waitstatus_to_exitcode(status) not in (0, 3):
            sys.exit(f"stagefit {' '.join(argv)} failed ({os.waitstatus_to_exitcode(status)})")
        marks = json.loads(Path(marks_path).read_text())
    cpu = usage.ru_utime + usage.ru_stime
    return {"cpu": cpu, "wall": wall, "finish": marks["finish"], "report": cpu - marks["searched"]}


def cli_rows(mode: str) -> tuple[list[str], float, float]:
    """Table rows of the command line's runs, and the median finish and report CPU over them."""
    rows, finishes, reports = [], [], []
    with tempfile.TemporaryDirectory() as tmp:
        for seed in CLI_SEEDS:
            for fmt in CLI_FORMATS[mode]:
                argv = [
                    "search",
                    f"specs/{CLI_SPEC}.yaml",
                    "--storage",
                    os.path.join(tmp, f"s{seed}.journal"),
                    "--trials",
                    str(TRIALS),
                    "--seed",
                    str(seed),
                    "--fresh",
                    "--quiet",
                    "--format",
                    fmt,
                ]
                runs = [cli_run(argv) for _ in range(CLI_REPEATS[mode])]
                finishes += [r["finish"] for r in runs]
                reports += [r["report"] for r in runs]
                rows.append(
                    f"| {seed} | {fmt} | "
                    + " | ".join(shown([r[k] for r in runs]) for k in ("finish", "report", "cpu", "wall"))
                    + " |"
                )
                print(rows[-1], flush=True)
    return rows, statistics.median(finishes), statistics.median(reports)


def timed(call: Callable[[], object], repeats: int) -> tuple[list[float], list[float]]:
    """(CPU seconds, wall seconds) of each of ``repeats`` calls, after one untimed call."""
    call()
    cpu, wall = [], []
    for _ in range(repeats):
        c, w = time.process_time(), time.perf_counter()
        call()
        cpu.append(time.process_time() - c)
        wall.append(time.perf_counter() - w)
    return cpu, wall


def shown(values: list[float]) -> str:
    return f"{statistics.median(values):.3f} ({min(values):.3f}..{max(values):.3f}, n={len(values)})"


def main() -> None:
    mode = bench_mode()
    facts = RunFacts.start()
    rows = []
    finish_cpu = {}
    for name in SPECS:
        spec = load_spec(ROOT / "specs" / f"{name}.yaml")
        storage = open_storage(None)
        search_id = create_search(with_search(spec, trials=TRIALS, seed=0), storage)
        run_search(storage, search_id, finish=False)
        study, stored = load_study(storage, search_id)
        space = SearchSpace.build(stored)
        finish = timed(partial(summarise, space, study, SHORTLIST_SIZE, SHORTLIST_SAMPLES, tail=False), REPEATS[mode])
        finish_search(storage, search_id)
        read = timed(partial(load_search, storage, search_id), REPEATS[mode])
        finish_cpu[name] = statistics.median(finish[0])
        rows.append(f"| {name} | {shown(finish[0])} | {shown(finish[1])} | {shown(read[0])} | {shown(read[1])} |")
        print(rows[-1], flush=True)
    cli, cli_finish, cli_report = cli_rows(mode)
    met = finish_cpu["bench_stock_preamp"] <= TARGET_CPU
    lines = [
        "# The finishing step",
        "",
        f"`benchmarks/bench_finish.py`, BENCH_MODE={mode}. {TRIALS:,}-trial searches (seed 0, in memory); the "
        "finish (`summarise` as `run_search` runs it: ranking, folding, the full assessment of the shortlist and "
        "the front) and the answer read back (`load_search`), repeated on the same trials. Seconds, median "
        "(min..max, n runs).",
        "",
        facts.markdown()[0],
        "",
        "| target | measured CPU (s) | met |",
        "| --- | --- | --- |",
        f"| bench_stock_preamp finish <= {TARGET_CPU} s CPU | {finish_cpu['bench_stock_preamp']:.3f} | "
        f"{'met' if met else '**missed**'} |",
        f"| `stagefit search` finish <= {TARGET_CPU} s CPU (median, seeds {CLI_SEEDS}) | {cli_finish:.3f} | "
        f"{'met' if cli_finish <= TARGET_CPU else '**missed**'} |",
        f"| `stagefit search` report after the search <= {TARGET_REPORT_CPU} s CPU (median) | {cli_report:.3f} | "
        f"{'met' if cli_report <= TARGET_REPORT_CPU else '**missed**'} |",
        "",
        "| spec | finish CPU | finish wall | read back CPU | read back wall |",
        "| --- | --- | --- | --- | --- |",
        *rows,
        "",
        f"The command line, {CLI_SPEC}, {TRIALS:,} trials, `--fresh --quiet --format F` (CPU seconds of the "
        "child process; the report: from the search's return to the process's exit):",
        "",
        "| seed | format | finish CPU | report CPU | process CPU | process wall |",
        "| --- | --- | --- | --- | --- | --- |",
        *cli,
        "",
    ]
    write_keeping_notes(RESULTS, "\n".join(lines))
    print(f"wrote {RESULTS.relative_to(ROOT)}")


if __name__ == "__main__":
    if sys.argv[1:2] == ["--child"]:
        cli_child(sys.argv[2], sys.argv[3:])
    else:
        main()
