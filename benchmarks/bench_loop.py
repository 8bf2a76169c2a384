"""The search loop's own cost: CPU per trial outside the models (Optuna's ask and tell, the
sampler's proposals, the storage's writes), in memory and on a journal file.

    .venv/bin/python benchmarks/bench_loop.py                 # -> benchmarks/results/loop.md
    BENCH_MODE=quick .venv/bin/python benchmarks/bench_loop.py   # fewer trials, prints only

One process runs ``run_search`` (no finishing step) on bench_stock_preamp, seed 0, once in
memory and once on a fresh journal file, each repeated; the CPU time (``time.process_time``)
of the whole loop and of its model evaluation (``evaluate_designs``, timed by wrapping it)
are taken, and the loop's overhead is the difference. CPU time rather than wall time: the
machine's cores are shared, and the figure measures this process's own work.
"""

from __future__ import annotations

import statistics
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "benchmarks"))

from run_facts import RunFacts, bench_mode  # noqa: E402

from optimizer.search import study as study_module  # noqa: E402
from optimizer.search.run import with_search  # noqa: E402
from optimizer.spec import load_spec  # noqa: E402
from optimizer.storage import open_storage  # noqa: E402

RESULTS = ROOT / "benchmarks" / "results" / "loop.md"
SPEC = ROOT / "specs" / "bench_stock_preamp.yaml"
TARGET_MS = 0.5  # ms of CPU per trial outside the models, on the journal file at 4,000 trials
TRIALS = {"quick": 1000, "full": 4000}
REPEATS = {"quick": 1, "full": 3}


def overhead(trials: int, storage_path: Path | None) -> tuple[float, float]:
    """(CPU s of the whole loop, CPU s of its model evaluation) of one search."""
    evaluating = [0.0]
    evaluate = study_module.evaluate_designs

    def timed(*args, **kwargs):
        start = time.process_time()
        try:
            return evaluate(*args, **kwargs)
        finally:
            evaluating[0] += time.process_time() - start

    study_module.evaluate_designs = timed
    try:
        spec = with_search(load_spec(SPEC), trials=trials, seed=0)
        storage = open_storage(storage_path)
        search_id = study_module.create_search(spec, storage)
        start = time.process_time()
        study_module.run_search(storage, search_id, finish=False)
        return time.process_time() - start, evaluating[0]
    finally:
        study_module.evaluate_designs = evaluate


def main() -> None:
    mode = bench_mode()
    facts = RunFacts.start()
    trials, repeats = TRIALS[mode], REPEATS[mode]
    rows = []
    with tempfile.TemporaryDirectory(prefix="stagefit-loop-") as tmp:
        runs: dict[str, list[tuple[float, float]]] = {"memory": [], "journal file": []}
        for k in range(repeats):  # alternating, so both see the same load
            runs["memory"].append(overhead(trials, None))
            runs["journal file"].append(overhead(trials, Path(tmp) / f"loop-{k}.journal"))
    for where, measured in runs.items():
        per_trial = [1000 * (total - model) / trials for total, model in measured]
        ms = statistics.median(per_trial)
        met = "yes" if ms < TARGET_MS else "no"
        rows.append(
            f"| {where} | {trials} | {statistics.median(t for t, _ in measured):.2f} | "
            f"{statistics.median(m for _, m in measured):.2f} | {ms:.3f} ({min(per_trial):.3f}..{max(per_trial):.3f}) | "
            f"{'< ' + str(TARGET_MS) if where == 'journal file' else '-'} | {met if where == 'journal file' else '-'} |"
        )
    lines = [
        "# The search loop's own cost",
        "",
        f"bench_stock_preamp, seed 0, {trials} trials, no finishing step; median of {repeats} "
        "(min..max), CPU seconds. Overhead: the loop's CPU less its model evaluation's "
        "(Optuna's ask and tell, the sampler, the storage's writes).",
        "",
        "| storage | trials | loop CPU s | models CPU s | overhead ms/trial | target | met |",
        "|---|---|---|---|---|---|---|",
        *rows,
        "",
        *facts.markdown(),
    ]
    text = "\n".join(lines)
    print(text)
    if mode == "full":
        RESULTS.write_text(text)


if __name__ == "__main__":
    main()
