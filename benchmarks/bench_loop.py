"""The search loop's own cost: CPU outside the models (Optuna's ask and tell, the sampler's
proposals, the storage's writes, the records' JSON), in memory and on a journal file.

    .venv/bin/python benchmarks/bench_loop.py                     # -> benchmarks/results/loop.md
    .venv/bin/python benchmarks/bench_loop.py --against ../main   # the same runs of another checkout beside
    .venv/bin/python benchmarks/bench_loop.py --spec specs/contact_pickup_buffer.yaml  # another spec, printed only
    BENCH_MODE=quick .venv/bin/python benchmarks/bench_loop.py    # fewer trials, prints only

Each measurement runs ``run_search`` (no finishing step) on bench_stock_preamp (or ``--spec``) in a process of
its own, once in memory and once on a fresh journal file, for seeds 0 and 1, each repeated;
the CPU time (``time.process_time``) of the whole loop and of its model evaluation
(``evaluate_designs``, timed by wrapping it) are taken, and the loop's overhead is the
difference. CPU time rather than wall time: the machine's cores are shared, and the figure
measures the process's own work. With ``--against DIR`` every measurement is also made with
DIR's code (PYTHONPATH=DIR, the same spec), alternating with this tree's, so both see the
same load; the table then shows both.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "benchmarks"))

from run_facts import RunFacts, bench_mode, write_keeping_notes  # noqa: E402

RESULTS = ROOT / "benchmarks" / "results" / "loop.md"
SPEC = ROOT / "specs" / "bench_stock_preamp.yaml"
TARGET_S = 0.8  # s of CPU outside the models, on the journal file at 4,000 trials, each seed: our share of the 5 s end to end
TRIALS = {"quick": 1000, "full": 4000}
REPEATS = {"quick": 1, "full": 3}
SEEDS = (0, 1)
WHERE = ("journal file", "memory")


def overhead(spec_path: Path, trials: int, seed: int, storage_path: Path | None) -> tuple[float, float]:
    """(CPU s of the whole loop, CPU s of its model evaluation) of one search, in this process."""
    from optimizer.search import study as study_module
    from optimizer.search.run import with_search
    from optimizer.spec import load_spec
    from optimizer.storage import open_storage

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
        spec = with_search(load_spec(spec_path), trials=trials, seed=seed)
        storage = open_storage(storage_path)
        search_id = study_module.create_search(spec, storage)
        start = time.process_time()
        study_module.run_search(storage, search_id, finish=False)
        return time.process_time() - start, evaluating[0]
    finally:
        study_module.evaluate_designs = evaluate


def measured(code: Path | None, spec_path: Path, trials: int, seed: int, where: str) -> tuple[float, float]:
    """One measurement in a process of its own, with the code of ``code`` (None: this tree's)."""
    env = dict(os.environ)
    if code is not None:
        env["PYTHONPATH"] = str(code)
    out = subprocess.run(
        [sys.executable, __file__, "--spec", str(spec_path), "--measure", str(trials), str(seed), where],
        env=env,
        capture_output=True,
        text=True,
        check=True,
    )
    loop, models = json.loads(out.stdout.splitlines()[-1])
    return loop, models


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--against", type=Path, help="another checkout measured beside this one (e.g. main's)")
    parser.add_argument("--spec", type=Path, default=SPEC, help="the spec searched (results file: the default only)")
    parser.add_argument("--measure", nargs=3, metavar=("TRIALS", "SEED", "WHERE"), help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.measure:  # a child: one measurement, printed as JSON
        trials, seed, where = int(args.measure[0]), int(args.measure[1]), args.measure[2]
        with tempfile.TemporaryDirectory(prefix="stagefit-loop-") as tmp:
            journal = Path(tmp) / "loop.journal" if where == "journal file" else None
            print(json.dumps(overhead(args.spec.resolve(), trials, seed, journal)))
        return
    mode = bench_mode()
    facts = RunFacts.start()
    trials, repeats = TRIALS[mode], REPEATS[mode]
    codes: dict[str, Path | None] = {"this tree": None}
    if args.against:
        codes["against"] = args.against.resolve()
    runs: dict[tuple[str, str, int], list[tuple[float, float]]] = {}
    for _ in range(repeats):  # alternating, so every configuration sees the same load
        for where in WHERE:
            for seed in SEEDS:
                for name, code in codes.items():
                    runs.setdefault((name, where, seed), []).append(
                        measured(code, args.spec.resolve(), trials, seed, where)
                    )

    def cell(name: str, where: str, seed: int) -> tuple[str, float]:
        got = runs[name, where, seed]
        over = [total - model for total, model in got]
        text = (
            f"{statistics.median(t for t, _ in got):.2f} | {statistics.median(m for _, m in got):.2f} | "
            f"{statistics.median(over):.2f} ({min(over):.2f}..{max(over):.2f}) | {1000 * statistics.median(over) / trials:.3f}"
        )
        return text, statistics.median(over)

    header = "| storage | seed | trials | loop CPU s | models CPU s | overhead CPU s | ms/trial |"
    rule = "|---|---|---|---|---|---|---|"
    if args.against:
        header += f" {args.against} overhead CPU s | ratio |"
        rule += "---|---|"
    header += " target | met |"
    rule += "---|---|"
    rows = []
    for where in WHERE:
        for seed in SEEDS:
            text, ours = cell("this tree", where, seed)
            row = f"| {where} | {seed} | {trials} | {text} |"
            if args.against:
                _, theirs = cell("against", where, seed)
                row += f" {theirs:.2f} | {ours / theirs:.2f} |"
            journal = where == "journal file" and trials == 4000
            row += f" {'<= ' + str(TARGET_S) + ' s' if journal else '-'} | {('yes' if ours <= TARGET_S else 'no') if journal else '-'} |"
            rows.append(row)
    lines = [
        "# The search loop's own cost",
        "",
        f"{args.spec.stem}, {trials} trials, no finishing step; median of {repeats} (min..max), CPU seconds, "
        "each run a process of its own. Overhead: the loop's CPU less its model evaluation's (Optuna's ask and "
        "tell, the sampler, the storage's writes, the records' JSON)"
        + (f"; beside it the same runs of {args.against}, alternating." if args.against else "."),
        "",
        header,
        rule,
        *rows,
        "",
        *facts.markdown(),
    ]
    text = "\n".join(lines)
    print(text)
    if mode == "full" and args.spec.resolve() == SPEC:
        write_keeping_notes(RESULTS, text + "\n")


if __name__ == "__main__":
    main()
