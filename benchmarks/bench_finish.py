"""The finishing step of a search: what runs between the last trial and the answer.

    .venv/bin/python benchmarks/bench_finish.py               # -> benchmarks/results/finish.md
    BENCH_MODE=quick .venv/bin/python benchmarks/bench_finish.py   # fewer repeats

A 4,000-trial search of each spec runs once in memory without its finish (run_search
``finish=False``). Then, repeated on the same trials (median, min..max):

- the finish as ``run_search`` does it (``study.summarise`` with the shortlist's size and
  builds: ranking, folding, the full assessment of the shortlist and the front);
- the answer read back (``load_search`` of the finished search: the stored shortlist and the
  ranked tail), what ``optimizer.search()`` and ``stagefit search`` do next.

CPU seconds (this process, user + system) beside wall seconds: with the cores shared, CPU is
the figure that does not grow with the load. Target: the finish under 0.5 s CPU for
bench_stock_preamp (issue 16: a 4k-trial answer end to end in under 5 s).
"""

from __future__ import annotations

import statistics
import sys
import time
from functools import partial
from pathlib import Path
from typing import Callable

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "benchmarks"))

from run_facts import RunFacts, bench_mode  # noqa: E402

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
TARGET_CPU = 0.5  # s, the finish of bench_stock_preamp


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
    met = finish_cpu["bench_stock_preamp"] < TARGET_CPU
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
        f"| bench_stock_preamp finish < {TARGET_CPU} s CPU | {finish_cpu['bench_stock_preamp']:.3f} | "
        f"{'met' if met else '**missed**'} |",
        "",
        "| spec | finish CPU | finish wall | read back CPU | read back wall |",
        "| --- | --- | --- | --- | --- |",
        *rows,
        "",
    ]
    RESULTS.write_text("\n".join(lines), encoding="utf-8")
    print(f"wrote {RESULTS.relative_to(ROOT)}")


if __name__ == "__main__":
    main()
