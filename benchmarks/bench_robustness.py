"""Robustness as a limit: its cost and what it buys (one process, one core).

    .venv/bin/python benchmarks/bench_robustness.py          # -> benchmarks/results/robustness.md
    .venv/bin/python benchmarks/bench_robustness.py --quick  # fewer seeds, prints only

1. Every example spec (specs/*.yaml) searched with ``robustness: nominal`` and with
   ``robustness: yield`` (the default), alternating, twice each: the CPU-time ratio of the
   two (target: at most 1.5x) and the rank-1 design's Monte Carlo yield over 2,000 builds
   under each (target: every rank-1 under ``yield`` at or above ``yield_min``).
2. The optimum under robustness against the exhaustive oracle that applies the same screen
   (``exhaustive.exhaustive`` scores through ``search.evaluate_group``, screen included): the
   best nominal score of 10 seeded searches within 1 % of the oracle's (target: 9 of 10).
"""

from __future__ import annotations

import os

if __name__ == "__main__":
    for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
        os.environ[_var] = "1"

import argparse  # noqa: E402
import platform  # noqa: E402
import statistics  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

import numpy as np  # noqa: E402
import optuna  # noqa: E402

from benchmarks.run_facts import write_keeping_notes  # noqa: E402
from optimizer.candidates import assess  # noqa: E402
from optimizer.catalog import load_catalog  # noqa: E402
from optimizer.exhaustive import exhaustive  # noqa: E402
from optimizer.search import search, trial_record, with_search  # noqa: E402
from optimizer.spec import load_spec  # noqa: E402

RESULTS = ROOT / "benchmarks" / "results" / "robustness.md"
ORACLE_SPECS = ("bs_e24_divider_sensor", "bs_e96_feedback_hv")


def _timed_search(spec, basis: str):
    s = spec.model_copy(update={"robustness": basis})
    start = time.process_time()
    result = search(s)
    return time.process_time() - start, result


def _rank_one_yield(spec, result) -> float | None:
    if not result.candidates:
        return None
    best = result.candidates[0]
    parts = {role: p["value"] for role, p in best["parts"].items()}
    record = assess(
        spec.model_copy(update={"robustness": "yield"}),
        load_catalog(spec.parts.catalog),
        best["topology"],
        parts,
        best["transistor"]["id"],
        samples=2000,
    )
    return record["metrics"].get("yield")


def cost_and_yield(repeats: int) -> list[str]:
    rows = [
        "| spec | nominal CPU s (median) | yield CPU s (median) | ratio | rank-1 yield, nominal basis | "
        "rank-1 yield, yield basis | rank-1 meets (yield basis) |",
        "| --- | --- | --- | --- | --- | --- | --- |",
    ]
    for path in sorted((ROOT / "specs").glob("*.yaml")):
        spec = load_spec(path)
        times = {"nominal": [], "yield": []}
        results = {}
        for _ in range(repeats):
            for basis in ("nominal", "yield"):
                dt, results[basis] = _timed_search(spec, basis)
                times[basis].append(dt)
        tn, ty = statistics.median(times["nominal"]), statistics.median(times["yield"])
        yn, yy = _rank_one_yield(spec, results["nominal"]), _rank_one_yield(spec, results["yield"])
        best = results["yield"].candidates[0]
        fmt = lambda y: "—" if y is None else f"{100 * y:.1f} %"  # noqa: E731
        rows.append(
            f"| {path.stem} | {tn:.2f} | {ty:.2f} | {ty / tn:.2f}x | {fmt(yn)} | {fmt(yy)} | "
            f"{best['basis']['label'] if best.get('basis') else '—'} |"
        )
        print(rows[-1], flush=True)
    return rows


def against_oracle(seeds: int) -> list[str]:
    rows = ["| spec | oracle best score (time) | seeds within 1 % | median best score |", "| --- | --- | --- | --- |"]
    for name in ORACLE_SPECS:
        spec = load_spec(ROOT / "benchmarks" / "specs" / f"{name}.yaml")
        start = time.perf_counter()
        oracle = exhaustive(spec)
        oracle_time = time.perf_counter() - start
        best = []
        for seed in range(seeds):
            result = search(with_search(spec, seed=seed))
            scores = [
                trial_record(t)["score"]
                for t in result.study.get_trials(deepcopy=False, states=(optuna.trial.TrialState.COMPLETE,))
                if trial_record(t)
            ]
            best.append(max(scores))
        target = oracle.best["score"]
        hits = sum(abs(b - target) <= 0.01 * abs(target) for b in best)
        rows.append(f"| {name} | {target:.4f} ({oracle_time:.1f} s) | {hits}/{seeds} | {np.median(best):.4f} |")
        print(rows[-1], flush=True)
    return rows


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="1 repeat, 3 seeds, no results file")
    parser.add_argument("--oracle-only", action="store_true", help="only part 2, printed (no results file)")
    args = parser.parse_args()
    if args.oracle_only:
        print("\n".join(against_oracle(3 if args.quick else 10)))
        return
    load = os.getloadavg()[0]
    head = [
        f"Machine: {platform.machine()}, {os.cpu_count()} cores (shared; load average {load:.2f} at the start), "
        f"Python {platform.python_version()}, numpy {np.__version__}, Optuna {optuna.__version__}, one thread. "
        "Produced by `.venv/bin/python benchmarks/bench_robustness.py` in one run.",
        "",
    ]
    cost = cost_and_yield(1 if args.quick else 2)
    oracle = against_oracle(3 if args.quick else 10)
    text = "\n".join(
        [
            "# Robustness benchmark",
            "",
            *head,
            "## Cost of the robustness screen and the rank-1 yield (2,000 builds)",
            "",
            "CPU time of a whole `search()` (search, shortlist assessment, front), median of the runs; "
            "rank-1 yields are from a 2,000-build assessment on the yield basis for both.",
            "",
            *cost,
            "",
            "## Optimum under robustness against the exhaustive oracle (same screen)",
            "",
            *oracle,
            "",
            f"Load average at the end: {os.getloadavg()[0]:.2f}.",
            "",
        ]
    )
    if not args.quick:
        write_keeping_notes(RESULTS, text)
    print(text)


if __name__ == "__main__":
    main()
