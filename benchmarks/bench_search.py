"""Search quality and speed against the exhaustive oracle and three baselines (one core).

    .venv/bin/python benchmarks/bench_search.py            # full run -> benchmarks/results/search.md
    .venv/bin/python benchmarks/bench_search.py --quick    # smoke run: 2 specs, 3 seeds, 500 trials, prints only
    .venv/bin/python benchmarks/bench_search.py --only bs_e3_feedback_pair   # some specs: oracle and our search
    .venv/bin/python benchmarks/bench_search.py --front --only bs_e24_split_guitar   # front quality, screen off and on

The specs are ``benchmarks/specs/*.yaml``: each names one topology and one device, so the
exhaustive oracle (``optimizer.exhaustive``) covers the very space the search covers, and
its ``search.trials`` is the budget every method gets. For each spec:

- the oracle: best score and the true Pareto front (its wall time is reported too);
- our search (``create_search`` + ``run_search``: synthesis seeds, the neighbour sampler,
  batched evaluation) over 10 seeds, in memory and on a journal file; the search itself
  and the finishing step (the shortlist's full assessment with Monte Carlo yield, which
  ``run_search`` runs when the budget is met) are timed apart;
- the hand method: ``Topology.hand_design`` rounded to the nearest series value (and to
  the spec's range), evaluated by ``evaluate_designs``;
- random search: the same batched loop (``run_search``) with Optuna's RandomSampler and no
  enqueued seeds;
- Optuna's default sampler: ``study.optimize`` on ``optuna.create_study(directions=...)``,
  one design per trial through ``evaluate_designs``, the summed violation through
  ``trial.set_constraint``, no seeds and no batching.

Figures: how often the best nominal score (the max of each trial's ``record["score"]``,
not the yield-weighted rank score) is within 1 % of the oracle's; the median wall time;
the hypervolume of the feasible front relative to the oracle's true front
(:func:`hypervolume_2d`, written here; the reference point is the oracle front's nadir
plus 10 % of its span on each axis).

Front quality is measured with the robustness screen off and on (:func:`screened`): off is
the spec at ``robustness: nominal``, on is its own basis (yield where it says nominal). The
oracle of each mode is the exhaustive enumeration of the spec in that mode, so the screen-on
oracle front is the true front over the designs that pass the screen (the search's own
evaluation, the same seeded builds). The full run measures our search in both modes on
every spec; ``--front`` measures only that (the oracle and our search, 10 seeds, both
modes) and replaces the named specs' rows of the front table in results/search.md, so the
specs can be run one per process. Plus the oracle alone on E24 ``divider_ce`` over
10 ohm..1 Mohm, the peak memory of a 20,000-trial search (a child process's own VmHWM),
and a cProfile of one search.
"""

from __future__ import annotations

import os

if __name__ == "__main__":
    for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
        os.environ[_var] = "1"  # one core, as the targets are stated (before numpy is imported)

import argparse  # noqa: E402
import cProfile  # noqa: E402
import io  # noqa: E402
import json  # noqa: E402
import pstats  # noqa: E402
import resource  # noqa: E402
import statistics  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "benchmarks"))

import optuna  # noqa: E402
from optuna.trial import TrialState  # noqa: E402
from run_facts import RunFacts, bench_mode, write_keeping_notes  # noqa: E402

import optimizer.search  # noqa: E402, F401  (the module is read from sys.modules below)

search_module = sys.modules["optimizer.search"]  # the module (optimizer.search is also the API function)
from optimizer.errors import InputError  # noqa: E402
from optimizer.exhaustive import exhaustive  # noqa: E402
from optimizer.scoring import pareto_mask  # noqa: E402
from optimizer.search import (  # noqa: E402
    Design,
    SearchSpace,
    create_search,
    evaluate_designs,
    finish_search,
    open_storage,
    run_search,
    with_search,
)
from optimizer.spec import Spec, load_spec, parse_spec, spec_to_dict  # noqa: E402
from optimizer.synthesis import rounded_designs  # noqa: E402

optuna.logging.set_verbosity(optuna.logging.WARNING)

SPECS = ROOT / "benchmarks" / "specs"
RESULTS = ROOT / "benchmarks" / "results" / "search.md"
SEEDS = 10
JOURNAL_SEEDS = 3  # our search's runs on a journal file (timing only)
WITHIN = 0.01  # "optimum found": best score within 1 % of the oracle's
TARGETS = {"hits": 9, "memory_s": 3.0, "journal_s": 10.0, "hypervolume": 0.98, "oracle_s": 60.0, "peak_mb": 500.0}
QUICK_SPECS = ("bs_e24_divider_sensor", "bs_e96_feedback_hv")
ORACLE_SPEC = "bs_e24_divider_mic"  # its E24 divider_ce space, widened to 10 ohm..1 Mohm
MEMORY_TRIALS = 20_000
QUICK_TRIALS = 500  # --quick: every method's budget capped here (Optuna's default sampler is slow)
SCREEN_MODES = ("off", "on")  # the robustness screen (front quality is measured in both)
FRONT_HEADING = "## Front quality: robustness screen off and on"


# ----------------------------------------------------------------------------- hypervolume


def to_minimise(values: np.ndarray, directions: list[str]) -> np.ndarray:
    """Objective values (points, objectives) with every maximised axis negated."""
    sign = np.array([1.0 if d == "minimise" else -1.0 for d in directions])
    return np.asarray(values, dtype=float).reshape(-1, len(directions)) * sign


def hypervolume_2d(points: np.ndarray, reference: np.ndarray) -> float:
    """Area dominated by ``points`` (n, 2; both axes minimised) and bounded by ``reference``.

    Points beyond the reference on an axis are clipped to it (they add nothing there);
    dominated and repeated points add nothing. A sweep along the first axis: each point
    of the staircase owns the slab from its x to the next point's x (the last one to the
    reference), of height reference_y - y.
    """
    p = np.minimum(np.asarray(points, dtype=float).reshape(-1, 2), reference)
    p = p[np.all(np.isfinite(p), axis=1)]
    if not len(p):
        return 0.0
    p = p[np.lexsort((p[:, 1], p[:, 0]))]
    stairs, best_y = [], np.inf
    for x, y in p:
        if y < best_y:
            stairs.append((x, y))
            best_y = y
    area = 0.0
    for k, (x, y) in enumerate(stairs):
        x_next = stairs[k + 1][0] if k + 1 < len(stairs) else reference[0]
        area += (x_next - x) * (reference[1] - y)
    return float(area)


def reference_point(front: np.ndarray) -> np.ndarray:
    """The oracle front's nadir plus 10 % of its span on each axis (minimise-space);
    a zero span (one point) uses 10 % of the nadir's magnitude (or 1)."""
    nadir, ideal = front.max(axis=0), front.min(axis=0)
    span = nadir - ideal
    span = np.where(span > 0, span, np.where(np.abs(nadir) > 0, np.abs(nadir), 1.0))
    return nadir + 0.1 * span


# ----------------------------------------------------------------------------- runs


def completed_records(storage, search_id: str) -> list[dict]:
    study = optuna.load_study(study_name=search_id, storage=storage)
    return [
        search_module.trial_record(t)
        for t in study.get_trials(deepcopy=False, states=(TrialState.COMPLETE,))
        if "record" in t.user_attrs
    ]


def summarise(records: list[dict], oracle, directions: list[str], ref: np.ndarray | None) -> dict:
    """Best nominal score, hit (within 1 %), feasible front and its hypervolume ratio."""
    best = max((r["score"] for r in records), default=-np.inf)
    target = oracle.best["score"]
    hit = best >= target - WITHIN * abs(target)
    feasible = np.array([r["objectives"] for r in records if r["feasible"]]).reshape(-1, len(directions))
    hv = None
    if ref is not None:
        pts = to_minimise(feasible, directions)
        true = hypervolume_2d(to_minimise(oracle.front, directions), ref)
        hv = hypervolume_2d(pts[pareto_mask(pts, ["minimise"] * len(directions))], ref) / true if true > 0 else None
    return {
        "best": float(best),
        "hit": bool(hit),
        "beats_oracle": bool(best > target + 1e-9),
        "hv": hv,
        "trials": len(records),
    }


def run_ours(spec: Spec, seed: int, storage, finish: bool = True) -> tuple[list[dict], float, float, str]:
    """Our search (create + run, as search() does) -> records, search seconds, finish seconds
    (0 without ``finish``: the front needs no shortlist assessment)."""
    spec = with_search(spec, seed=seed)
    start = time.perf_counter()
    search_id = create_search(spec, storage)
    run_search(storage, search_id, finish=False)
    searched = time.perf_counter()
    if finish:
        finish_search(storage, search_id)  # the shortlist assessment run_search does when the budget is met
    return completed_records(storage, search_id), searched - start, time.perf_counter() - searched, search_id


def screened(spec: Spec, mode: str) -> Spec:
    """``spec`` with the robustness screen off (``robustness: nominal``) or on (its own
    basis; yield where it says nominal)."""
    basis = "nominal" if mode == "off" else (spec.robustness if spec.robustness != "nominal" else "yield")
    if basis == spec.robustness:
        return spec
    data = spec_to_dict(spec)
    data["robustness"] = basis
    return parse_spec(data)


def screen_mode(spec: Spec) -> str:
    """The screen mode a spec runs in as written."""
    return "off" if spec.robustness == "nominal" else "on"


def oracle_of(spec: Spec) -> tuple:
    """The exhaustive oracle of ``spec``, its wall time (s) and the hypervolume reference
    point (None unless the front is 2-D and not empty)."""
    directions = [d for _, d in spec.objective_directions]
    start = time.perf_counter()
    oracle = exhaustive(spec)
    oracle_s = time.perf_counter() - start
    ref = reference_point(to_minimise(oracle.front, directions)) if len(oracle.front) and len(directions) == 2 else None
    return oracle, oracle_s, ref


def front_runs(spec: Spec, seeds: int) -> dict:
    """Front quality in the spec's own screen mode: the oracle and our search over ``seeds``
    seeds (in memory, no finishing step), each run's hit and hypervolume ratio."""
    directions = [d for _, d in spec.objective_directions]
    oracle, oracle_s, ref = oracle_of(spec)
    mode = screen_mode(spec)
    print(
        f"  screen {mode}: oracle {oracle_s:.1f} s, best {oracle.best['score']:.4f}, front {len(oracle.front)} points",
        flush=True,
    )
    runs, times = [], []
    for seed in range(seeds):
        records, t_search, _, _ = run_ours(spec, seed, open_storage(None), finish=False)
        runs.append(summarise(records, oracle, directions, ref))
        times.append(t_search)
        print(f"  screen {mode} seed {seed}: {run_line(runs[-1])} search {t_search:.2f} s", flush=True)
    return {"oracle": oracle, "oracle_s": oracle_s, "runs": runs, "times": times, "load": os.getloadavg()[0]}


def run_line(run: dict) -> str:
    hv = "—" if run["hv"] is None else f"{100 * run['hv']:.2f} %"
    return f"best {run['best']:.4f} hit {run['hit']} hv {hv}"


def run_random(spec: Spec, seed: int) -> tuple[list[dict], float]:
    """The same batched loop (run_search) with Optuna's RandomSampler, no seeds, no finish."""
    spec = with_search(spec, seed=seed)
    storage = open_storage(None)
    start = time.perf_counter()
    search_id = create_search(spec, storage, seeds=False)
    run_search(
        storage, search_id, sampler=lambda space, seed_offset=0: optuna.samplers.RandomSampler(seed=seed), finish=False
    )
    elapsed = time.perf_counter() - start
    return completed_records(storage, search_id), elapsed


def run_default(spec: Spec, seed: int) -> tuple[list[dict], float]:
    """Optuna's default sampler (the one create_study picks for these directions, given the
    seed), one design per trial, constraints by trial.set_constraint."""
    space = SearchSpace.build(spec)
    directions = ["minimize" if d == "minimise" else "maximize" for _, d in spec.objective_directions]
    records: list[dict] = []

    def objective(trial: optuna.Trial) -> list[float]:
        record = evaluate_designs(space, [space.suggest(trial)])[0]
        records.append(record)
        trial.set_constraint("violation", record["total_violation"])
        return record["objectives"]

    start = time.perf_counter()
    study = optuna.create_study(directions=directions)
    study.sampler = type(study.sampler)(seed=seed)  # the default's class, seeded: runs are repeatable
    study.optimize(objective, n_trials=spec.search.trials)
    return records, time.perf_counter() - start


def hand_record(spec: Spec) -> tuple[dict, list[str]]:
    """The hand method rounded to the nearest series value, evaluated; notes where a value
    fell outside the spec's range (taken to the range's nearest end)."""
    space = SearchSpace.build(spec)
    topology, device = spec.topologies[0], spec.devices[0]
    roles = space.resistor_roles(topology)
    raw = space.hand_parts(topology, device)
    if raw is None:
        raise InputError.single("spec", spec.name, "a spec the hand method has an answer for", title="no hand design")
    resistors = {r: raw[r] for r in roles}
    nearest = rounded_designs(resistors, spec.parts.resistor_series, spec.parts.capacitor_series, limit=1)[0]
    low, high = space.resistors.values[0], space.resistors.values[-1]
    notes = [f"{r} {v:.4g} ohm outside the range" for r, v in nearest.items() if not low <= v <= high]
    idx = space.resistors.index_of(np.array([nearest[r] for r in roles]))
    design = Design(topology, device, tuple(zip(roles, (int(i) for i in idx))))
    return evaluate_designs(space, [design])[0], notes


# ----------------------------------------------------------------------------- benchmark


def median(xs: list[float]) -> float:
    return float(statistics.median(xs)) if xs else float("nan")


def bench_spec(
    path: Path,
    seeds: int,
    journal_seeds: int,
    default_seeds: int,
    random_seeds: int,
    tmp: Path,
    budget: int | None = None,
) -> dict:
    spec = load_spec(path)
    if budget is not None:
        spec = with_search(spec, trials=min(budget, spec.search.trials))
    directions = [d for _, d in spec.objective_directions]
    oracle, oracle_s, ref = oracle_of(spec)
    out = {
        "name": spec.name,
        "series": spec.parts.resistor_series,
        "topology": spec.topologies[0],
        "device": spec.devices[0],
        "range": spec.parts.resistor_range,
        "budget": spec.search.trials,
        "batch": spec.search.batch_size,
        "oracle": oracle,
        "oracle_s": oracle_s,
        "methods": {},
    }
    print(
        f"\n{spec.name}: {spec.parts.resistor_series} {spec.topologies[0]} {spec.devices[0]}, "
        f"{oracle.combinations:,} combinations, oracle {oracle_s:.1f} s, best {oracle.best['score']:.4f}, "
        f"front {len(oracle.front)} points; budget {spec.search.trials}",
        flush=True,
    )

    hand, notes = hand_record(spec)
    out["methods"]["hand method"] = {
        "runs": [summarise([hand], oracle, directions, ref)],
        "times": [0.0],
        "notes": notes,
        "feasible": hand["feasible"],
        "binding": hand["binding"],
    }

    ours, mem_search, mem_finish = [], [], []
    for seed in range(seeds):
        records, t_search, t_finish, _ = run_ours(spec, seed, open_storage(None))
        ours.append(summarise(records, oracle, directions, ref))
        mem_search.append(t_search)
        mem_finish.append(t_finish)
        print(f"  ours seed {seed}: {run_line(ours[-1])} search {t_search:.2f} s finish {t_finish:.2f} s", flush=True)
    journal_search, journal_finish = [], []
    for seed in range(journal_seeds):
        storage = open_storage(tmp / f"{spec.name}-{seed}.journal")
        _, t_search, t_finish, _ = run_ours(spec, seed, storage)
        journal_search.append(t_search)
        journal_finish.append(t_finish)
        print(f"  ours journal seed {seed}: search {t_search:.2f} s finish {t_finish:.2f} s", flush=True)
    out["methods"]["our search"] = {"runs": ours, "times": mem_search}
    mode = screen_mode(spec)  # the runs above; the other screen mode measured apart
    out["front"] = {mode: {"oracle": oracle, "oracle_s": oracle_s, "runs": ours, "load": os.getloadavg()[0]}}
    for other in SCREEN_MODES:
        if other != mode:
            out["front"][other] = front_runs(screened(spec, other), seeds)
    out["timing"] = {
        "memory_search": mem_search,
        "memory_finish": mem_finish,
        "journal_search": journal_search,
        "journal_finish": journal_finish,
    }

    runs, times = [], []
    for seed in range(random_seeds):
        records, elapsed = run_random(spec, seed)
        runs.append(summarise(records, oracle, directions, ref))
        times.append(elapsed)
    out["methods"]["random search"] = {"runs": runs, "times": times}
    print(f"  random: hits {sum(r['hit'] for r in runs)}/{len(runs)}, median {median(times):.2f} s", flush=True)

    runs, times = [], []
    for seed in range(default_seeds):
        records, elapsed = run_default(spec, seed)
        runs.append(summarise(records, oracle, directions, ref))
        times.append(elapsed)
    out["methods"]["Optuna default"] = {"runs": runs, "times": times}
    print(f"  default: hits {sum(r['hit'] for r in runs)}/{len(runs)}, median {median(times):.2f} s", flush=True)
    return out


def oracle_alone() -> dict:
    """The oracle on E24 divider_ce over 10 ohm..1 Mohm (the issue's 60 s target)."""
    spec = load_spec(SPECS / f"{ORACLE_SPEC}.yaml")
    data = spec_to_dict(spec)
    data["parts"] = {**data["parts"], "resistor_range": [10.0, 1e6]}
    spec = parse_spec(data)
    start = time.perf_counter()
    oracle = exhaustive(spec)
    elapsed = time.perf_counter() - start
    print(
        f"\noracle alone, E24 divider_ce 10 ohm..1 Mohm: {elapsed:.1f} s, {oracle.combinations:,} combinations, "
        f"{oracle.fully_evaluated:,} fully evaluated, best {oracle.best['score']:.4f}",
        flush=True,
    )
    return {
        "seconds": elapsed,
        "combinations": oracle.combinations,
        "fully_evaluated": oracle.fully_evaluated,
        "feasible": oracle.feasible,
        "best": oracle.best["score"],
    }


def peak_rss_mb() -> float:
    """This process's own peak resident memory (MB): VmHWM of its address space. (ru_maxrss of
    a child also counts the parent's resident memory at the fork, so it is not used here.)"""
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def memory_child(spec_path: str, trials: int) -> None:
    """Child process: one whole search (create, run, finish, load) of ``trials`` in memory."""
    spec = with_search(load_spec(spec_path), trials=trials)
    start = time.perf_counter()
    search_module.search(spec)
    print(json.dumps({"seconds": time.perf_counter() - start, "peak_mb": peak_rss_mb()}))


def peak_memory(trials: int) -> dict:
    """Peak resident memory (MB) of a ``trials``-trial search, run in a child process."""
    env = {**os.environ, "OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"}
    done = subprocess.run(
        [sys.executable, __file__, "--memory-child", str(SPECS / f"{ORACLE_SPEC}.yaml"), "--trials", str(trials)],
        capture_output=True,
        text=True,
        env=env,
        cwd=ROOT,
        check=True,
    )
    child = json.loads(done.stdout.strip().splitlines()[-1])
    peak = child["peak_mb"]
    print(f"\npeak memory of a {trials:,}-trial search: {peak:.0f} MB ({child['seconds']:.1f} s)", flush=True)
    return {"trials": trials, "peak_mb": peak, "seconds": child["seconds"]}


def profile_search(spec_path: Path, budget: int | None = None, top: int = 14) -> dict:
    """cProfile of one in-memory search (seed 0): where the time goes."""
    spec = with_search(load_spec(spec_path), seed=0)
    if budget is not None:
        spec = with_search(spec, trials=min(budget, spec.search.trials))
    profiler = cProfile.Profile()
    storage = open_storage(None)
    profiler.enable()
    start = time.perf_counter()
    search_id = create_search(spec, storage)
    run_search(storage, search_id, finish=False)
    searched = time.perf_counter()
    finish_search(storage, search_id)  # the shortlist assessment, timed apart as in run_ours
    total = time.perf_counter() - start
    profiler.disable()
    spent = [total - (searched - start)]
    stream = io.StringIO()
    stats = pstats.Stats(profiler, stream=stream)
    stats.sort_stats("cumulative").print_stats(top)
    rows = []
    for (filename, line, name), (_, nc, tt, ct, _) in stats.stats.items():
        rows.append((ct, tt, nc, f"{Path(filename).name}:{line}({name})"))
    rows.sort(reverse=True)
    by_tottime = sorted(rows, key=lambda r: -r[1])[:top]
    print(f"\nprofile of {spec.name} (seed 0, profiled {total:.2f} s, finish {sum(spent):.2f} s):")
    for ct, tt, nc, where in by_tottime:
        print(f"  {tt:7.2f} s own  {ct:7.2f} s cum  {nc:>8} calls  {where}")
    return {"spec": spec.name, "total": total, "finish": sum(spent), "cumulative": rows[:40], "own": by_tottime}


# ----------------------------------------------------------------------------- report


def fmt(x: float | None, spec: str = ".4f") -> str:
    return "—" if x is None or (isinstance(x, float) and np.isnan(x)) else format(x, spec)


WALL_KEYS = ("memory_search", "memory_finish", "journal_search", "journal_finish")


def wall_medians(timing: dict[str, list[float]]) -> tuple[float, float, float, float, float, float]:
    """Medians (s) of one spec's runs: in memory search, finish, search + finish (per run), and
    the same on the journal file."""
    ms, mf, js, jf = (median(timing[k]) for k in WALL_KEYS)
    total = lambda a, b: median([x + y for x, y in zip(timing[a], timing[b])])  # noqa: E731
    return ms, mf, total("memory_search", "memory_finish"), js, jf, total("journal_search", "journal_finish")


def wall_row(name: str, budget: int, timing: dict[str, list[float]]) -> str:
    """One spec's row of the wall-time table."""
    ms, mf, mt, js, jf, jt = wall_medians(timing)
    return (
        f"| {name} | {budget:,} | {ms:.2f} | {mf:.2f} | {mt:.2f} | "
        f"{fmt(js, '.2f')} | {fmt(jf, '.2f')} | {fmt(jt, '.2f')} |"
    )


def wall_target_rows(medians: list[tuple[float, ...]]) -> list[str]:
    """The wall-time rows of the targets table, from every spec's :func:`wall_medians`."""
    yes = lambda ok: "met" if ok else "**missed**"  # noqa: E731
    mem, mem_total, jour_total = (max(m[k] for m in medians) for k in (0, 2, 5))
    return [
        f"| median wall time < 3 s in memory (search itself) | worst {mem:.2f} s | {yes(mem < TARGETS['memory_s'])} |",
        f"| median wall time < 3 s in memory (search + finishing step) | worst {mem_total:.2f} s | "
        f"{yes(mem_total < TARGETS['memory_s'])} |",
        f"| median wall time < 10 s on the journal file (search + finishing step) | "
        f"worst {fmt(jour_total, '.2f')} s | {yes(jour_total < TARGETS['journal_s'])} |",
    ]


def wall(names: list[str], facts: RunFacts) -> None:
    """Our search alone on the named specs (SEEDS seeds in memory, JOURNAL_SEEDS on a journal
    file, as the full run times it): their rows replace theirs in the wall-time table of
    results/search.md, the wall-time targets are judged again over every row, and a note
    with the run's facts is added (the other tables, and the notes, are kept)."""
    text = RESULTS.read_text()
    head, rest = text.split("## Our search: wall time (s, median)\n", 1)
    table, after = rest.split("\n## Targets\n", 1)
    rows = {line.split(" | ")[0][2:]: line for line in table.strip().splitlines()[2:]}
    measured = {}
    with tempfile.TemporaryDirectory(prefix="bench-search-") as tmp:
        for name in names:
            spec = load_spec(SPECS / f"{name}.yaml")
            timing: dict[str, list[float]] = {k: [] for k in WALL_KEYS}
            for seed in range(SEEDS + JOURNAL_SEEDS):
                journal = seed >= SEEDS
                place = "journal" if journal else "memory"
                storage = open_storage(Path(tmp) / f"{name}-{seed}.journal" if journal else None)
                _, t_search, t_finish, _ = run_ours(spec, seed - SEEDS if journal else seed, storage)
                timing[f"{place}_search"].append(t_search)
                timing[f"{place}_finish"].append(t_finish)
                print(
                    f"  {name} {place} seed {seed % SEEDS}: search {t_search:.2f} s finish {t_finish:.2f} s", flush=True
                )
            rows[name] = wall_row(name, spec.search.trials, timing)
            measured[name] = wall_medians(timing)
            print(rows[name], flush=True)
    stored = [tuple(float(x) for x in row.strip(" |").split(" | ")[2:]) for row in rows.values()]
    targets = wall_target_rows(stored)
    lines = after.split("\n")
    for new in targets:
        key = new.split(" | ")[0]
        lines = [new if line.split(" | ")[0] == key else line for line in lines]
    header = "\n".join(table.strip().splitlines()[:2])
    note = [
        f"## Notes to a wall-time run ({facts.started}: {', '.join(names)})",
        "",
        f"The rows of {', '.join(names)} in the wall-time table and the wall-time targets are from this run; "
        "every other figure is from the run the file was written by. " + " ".join(facts.markdown()).strip(),
        "",
    ]
    first_note = next((k for k, line in enumerate(lines) if line.startswith("## Notes")), len(lines))
    lines[first_note:first_note] = note
    RESULTS.write_text(
        head
        + "## Our search: wall time (s, median)\n\n"
        + header
        + "\n"
        + "\n".join(rows[k] for k in rows)
        + "\n\n## Targets\n"
        + "\n".join(lines).rstrip("\n")
        + "\n"
    )
    print("\n".join(targets))


def report(
    results: list[dict], oracle_big: dict | None, memory: dict | None, profile: dict | None, seeds: int, facts: RunFacts
) -> str:
    lines = [
        "# Search benchmark",
        "",
        *facts.markdown(),
        "Single-thread BLAS. Produced by `benchmarks/bench_search.py` in one run; figures are medians "
        "with (min..max) over the runs. Every baseline runs at least 3 seeds.",
        "",
        "Each spec (`benchmarks/specs/`) names one topology and one device, so the exhaustive oracle "
        'covers exactly the space searched. "Hits" counts runs whose best nominal score (max over '
        "trials of the trial record's `score`) is within 1 % of the oracle's best. Hypervolume (HV) is "
        "the feasible front's 2-D hypervolume over the oracle front's (minimise-space, reference = "
        "oracle nadir + 10 % of its span per axis). Every method gets the spec's budget of trials "
        "(ours: synthesis seeds count toward it). Time for our search is the search itself "
        "(create + run) without the finishing shortlist assessment, which is timed apart below.",
        "",
        "## Quality",
        "",
        "| spec | space | oracle best (time) | budget | method | runs | hits | median best score (min..max) | "
        "median HV (min..max) | median time, s (min..max) |",
        "| --- | --- | --- | --- | --- | --- | --- | --- | --- | --- |",
    ]
    for r in results:
        o = r["oracle"]
        head = (
            f"{r['name']} | {r['series']} {r['topology']} {r['device']}, "
            f"{r['range'][0]:g}..{r['range'][1]:g} ohm, {o.combinations:,} | "
            f"{o.best['score']:.4f} ({r['oracle_s']:.1f} s) | {r['budget']:,}"
        )
        for k, (method, m) in enumerate(r["methods"].items()):
            runs = m["runs"]
            hvs = [x["hv"] for x in runs if x["hv"] is not None]
            best = median([x["best"] for x in runs])
            extra = ""
            if method == "hand method":
                extra = " (feasible)" if m["feasible"] else f" (infeasible: {m['binding']})"
                if m["notes"]:
                    extra += "; " + ", ".join(m["notes"])
            bests = [x["best"] for x in runs]
            spread_best = f" ({min(bests):.4f}..{max(bests):.4f})" if len(runs) > 1 else ""
            spread_hv = f" ({100 * min(hvs):.1f}..{100 * max(hvs):.1f})" if len(hvs) > 1 else ""
            spread_t = f" ({min(m['times']):.2f}..{max(m['times']):.2f})" if len(m["times"]) > 1 else ""
            cells = [
                head if k == 0 else " | | |",
                method,
                str(len(runs)),
                f"{sum(x['hit'] for x in runs)}/{len(runs)}",
                fmt(best) + spread_best + extra,
                f"{100 * median(hvs):.1f} %{spread_hv}" if hvs else "—",
                "—" if method == "hand method" else f"{median(m['times']):.2f}{spread_t}",
            ]
            lines.append("| " + " | ".join(cells) + " |")
    beaten = [r["name"] for r in results for m in r["methods"].values() for x in m["runs"] if x["beats_oracle"]]
    if beaten:
        lines += ["", f"**Oracle beaten** (a run scored above the oracle's best, an oracle bug): {sorted(set(beaten))}"]

    lines += [
        "",
        "## Our search: wall time (s, median)",
        "",
        "| spec | budget | in memory: search | finish | total | journal file: search | finish | total |",
        "| --- | --- | --- | --- | --- | --- | --- | --- |",
    ]
    lines += [wall_row(r["name"], r["budget"], r["timing"]) for r in results]

    lines += ["", "## Targets", ""]
    hits = [sum(x["hit"] for x in r["methods"]["our search"]["runs"]) for r in results]
    hv_worst = {
        mode: min(
            median([x["hv"] for x in r["front"][mode]["runs"] if x["hv"] is not None])
            for r in results
            if any(x["hv"] is not None for x in r["front"][mode]["runs"])
        )
        for mode in SCREEN_MODES
    }
    yes = lambda ok: "met" if ok else "**missed**"  # noqa: E731
    hit_text = ", ".join(f"{r['name']} {h}/{seeds}" for r, h in zip(results, hits))
    lines += [
        "| target | measured | met |",
        "| --- | --- | --- |",
        f"| optimum within 1 % in >= 9 of {seeds} seeds, every spec | "
        f"{hit_text} | "
        f"{yes(all(h >= TARGETS['hits'] * seeds / 10 for h in hits))} |",
        *wall_target_rows([wall_medians(r["timing"]) for r in results]),
        *(
            f"| hypervolume >= 98 % of the oracle front's (median per spec), screen {mode} | "
            f"worst {100 * hv:.1f} % | {yes(hv >= TARGETS['hypervolume'])} |"
            for mode, hv in hv_worst.items()
        ),
    ]
    if oracle_big:
        lines.append(
            f"| oracle alone < 60 s, E24 divider_ce 10 ohm..1 Mohm | {oracle_big['seconds']:.1f} s "
            f"({oracle_big['combinations']:,} combinations, {oracle_big['fully_evaluated']:,} fully "
            f"evaluated, {oracle_big['feasible']:,} meeting the core limits) | "
            f"{yes(oracle_big['seconds'] < TARGETS['oracle_s'])} |"
        )
    if memory:
        lines.append(
            f"| peak memory of a {memory['trials']:,}-trial search < 500 MB | {memory['peak_mb']:.0f} MB "
            f"(child's VmHWM; {memory['seconds']:.1f} s) | {yes(memory['peak_mb'] < TARGETS['peak_mb'])} |"
        )
    if profile:
        lines += [
            "",
            f"## Where the time goes (cProfile, {profile['spec']}, seed 0, in memory)",
            "",
            f"Profiled run {profile['total']:.2f} s, of which the finishing step {profile['finish']:.2f} s "
            "(profiling slows Python-heavy code more than numpy).",
            "",
            "| own time (s) | cumulative (s) | calls | function |",
            "| --- | --- | --- | --- |",
        ]
        lines += [f"| {tt:.2f} | {ct:.2f} | {nc:,} | `{where}` |" for ct, tt, nc, where in profile["own"]]
        lines += ["", "Largest cumulative:", "", "| cumulative (s) | calls | function |", "| --- | --- | --- |"]
        lines += [f"| {ct:.2f} | {nc:,} | `{where}` |" for ct, tt, nc, where in profile["cumulative"][:18]]
    rows = {k: v for r in results for k, v in front_rows(r["name"], r["front"]).items()}
    lines += ["", front_section(rows)]
    return "\n".join(lines) + "\n"


def front_rows(name: str, front: dict) -> dict[tuple[str, str], str]:
    """One table row per screen mode: the oracle front, hits, the hypervolume ratio against
    the 98 % target (median over the seeds), and the load average when the mode finished."""
    rows = {}
    for mode in SCREEN_MODES:
        if mode not in front:
            continue
        f = front[mode]
        runs, o = f["runs"], f["oracle"]
        hvs = [x["hv"] for x in runs if x["hv"] is not None]
        hv = median(hvs) if hvs else None
        spread = f" ({100 * min(hvs):.1f}..{100 * max(hvs):.1f})" if len(hvs) > 1 else ""
        cells = [
            name,
            mode,
            f"{len(o.front)} points, best {o.best['score']:.4f} ({f['oracle_s']:.1f} s)",
            f"{sum(x['hit'] for x in runs)}/{len(runs)}",
            "—" if hv is None else f"{100 * hv:.1f} %{spread}",
            "—" if hv is None else ("met" if hv >= TARGETS["hypervolume"] else "**missed**"),
            f"{f['load']:.1f}",
        ]
        rows[(name, mode)] = "| " + " | ".join(cells) + " |"
    return rows


def front_section(rows: dict[tuple[str, str], str]) -> str:
    """The front-quality section of results/search.md from its rows (spec, then screen mode)."""
    order = {m: k for k, m in enumerate(SCREEN_MODES)}
    return "\n".join(
        [
            FRONT_HEADING,
            "",
            f"Target: median hypervolume >= {TARGETS['hypervolume']:.0%} of the oracle front's, every spec, "
            "with the robustness screen off (`robustness: nominal`) and on (the spec's basis: Monte Carlo "
            "yield on the search's seeded screening builds). Each mode has its own oracle: the exhaustive "
            "enumeration of the spec in that mode, so the screen-on front is the true front of the designs "
            "that pass the screen. Our search, 10 seeds each, the spec's budget, in memory; hits as above "
            "(best nominal score within 1 % of that mode's oracle). The load average is the 1-minute figure "
            "when the row was measured (2 cores, shared).",
            "",
            "| spec | screen | oracle front | hits | median HV (min..max) | HV >= 98 % | load |",
            "| --- | --- | --- | --- | --- | --- | --- |",
            *(rows[k] for k in sorted(rows, key=lambda k: (k[0], order.get(k[1], 9)))),
        ]
    )


def stored_front_rows(text: str) -> dict[tuple[str, str], str]:
    """The rows of the front-quality section of a results file's text (none if absent)."""
    if FRONT_HEADING not in text:
        return {}
    body = text.split(FRONT_HEADING, 1)[1].split("\n## ", 1)[0]
    rows = {}
    for line in body.splitlines():
        cells = [c.strip() for c in line.strip().strip("|").split("|")]
        if line.startswith("| ") and len(cells) > 2 and cells[1] in SCREEN_MODES:
            rows[(cells[0], cells[1])] = line
    return rows


def with_front_section(text: str, rows: dict[tuple[str, str], str]) -> str:
    """``text`` with its front-quality section replaced by one of ``rows`` (appended if absent)."""
    section = front_section(rows)
    if FRONT_HEADING not in text:
        return text.rstrip("\n") + "\n\n" + section + "\n"
    head, rest = text.split(FRONT_HEADING, 1)
    tail = rest.split("\n## ", 1)
    return head + section + ("\n\n## " + tail[1] if len(tail) > 1 else "\n")


def front(names: list[str]) -> None:
    """Front quality of the named specs, screen off and on (the oracle and our search, SEEDS
    seeds each); their rows replace theirs in the front table of results/search.md."""
    rows = stored_front_rows(RESULTS.read_text()) if RESULTS.exists() else {}
    for name in names:
        spec = load_spec(SPECS / f"{name}.yaml")
        print(f"\n{name}: budget {spec.search.trials}", flush=True)
        measured = {mode: front_runs(screened(spec, mode), SEEDS) for mode in SCREEN_MODES}
        rows.update(front_rows(name, measured))
    text = with_front_section(RESULTS.read_text() if RESULTS.exists() else "# Search benchmark\n", rows)
    RESULTS.write_text(text)
    print("\n" + front_section(rows))


def write_results(path: Path, text: str) -> None:
    """Write a full run's ``text`` to ``path``, keeping the old file's front-quality table
    (``--front`` writes it) and its notes (everything from its first ``## Notes`` heading)."""
    rows = stored_front_rows(path.read_text()) if path.exists() else {}
    write_keeping_notes(path, with_front_section(text, rows) if rows else text)


TOPOLOGY_RESULTS = ROOT / "benchmarks" / "results" / "search_topologies.md"


def only(names: list[str]) -> None:
    """The oracle and our search (SEEDS seeds, in memory) on the named benchmark specs; each
    spec's figures replace its section of results/search_topologies.md (the notes written below
    a section's table, and above the first section, are kept)."""
    sections, notes, preamble = {}, {}, ""
    if TOPOLOGY_RESULTS.exists():
        head, *blocks = TOPOLOGY_RESULTS.read_text().split("\n## ")
        preamble = head.split("\n\n", 2)[2].strip() + "\n\n" if head.count("\n\n") >= 2 else ""
        for block in blocks:
            lines = block.rstrip("\n").split("\n")
            sections[lines[0]] = "## " + "\n".join(lines)
            last_row = max(k for k, line in enumerate(lines) if line.startswith("|") or k == 0)
            notes[lines[0]] = "\n".join(lines[last_row + 1 :]).strip()
    with tempfile.TemporaryDirectory(prefix="bench-search-") as tmp:
        for name in names:
            r = bench_spec(SPECS / f"{name}.yaml", SEEDS, 0, 0, 0, Path(tmp))
            runs, times = r["methods"]["our search"]["runs"], r["methods"]["our search"]["times"]
            hits = sum(x["hit"] for x in runs)
            sections[name] = "\n".join(
                [
                    f"## {name}",
                    "",
                    f"{r['topology']}, {r['device']}, {r['series']} {r['range'][0]:g}..{r['range'][1]:g} ohm: "
                    f"{r['oracle'].combinations:,} combinations, oracle {r['oracle_s']:.1f} s, best score "
                    f"{r['oracle'].best['score']:.4f}. Our search, budget {r['budget']} trials: optimum (best nominal "
                    f"score within {WITHIN:.0%} of the oracle's) found in {hits} of {len(runs)} seeds (target "
                    f"{TARGETS['hits']}), median search {median(times):.2f} s; load average {os.getloadavg()[0]:.1f}.",
                    "",
                    "| seed | best score | hit |",
                    "| --- | --- | --- |",
                    *(f"| {i} | {x['best']:.4f} | {'yes' if x['hit'] else 'no'} |" for i, x in enumerate(runs)),
                    *(["", notes[name]] if notes.get(name) else []),
                ]
            )
    text = (
        "# Search against the oracle, one small space per topology added later\n\n"
        "Produced by `benchmarks/bench_search.py --only SPEC ...` (one section per spec).\n\n"
        + preamble
        + "\n\n".join(sections[k] for k in sorted(sections))
        + "\n"
    )
    TOPOLOGY_RESULTS.write_text(text)
    print(text)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument(
        "--quick", action="store_true", help=f"smoke run: 2 specs, 3 seeds, {QUICK_TRIALS} trials, prints only"
    )
    parser.add_argument("--memory-child", metavar="SPEC", help=argparse.SUPPRESS)
    parser.add_argument("--trials", type=int, default=MEMORY_TRIALS, help=argparse.SUPPRESS)
    parser.add_argument(
        "--out",
        type=Path,
        default=None,
        help="results file (default: results/search.md; --quick writes none unless given)",
    )
    parser.add_argument(
        "--front",
        action="store_true",
        help="front quality only, robustness screen off and on: the oracle and our search over 10 seeds "
        "per mode; replaces the specs' rows of the front table in results/search.md (every spec, or --only's)",
    )
    parser.add_argument(
        "--only",
        nargs="+",
        metavar="SPEC",
        help="only these benchmark specs: the oracle and our search over 10 seeds, no baselines; "
        "appends a section to results/search_topologies.md",
    )
    parser.add_argument(
        "--wall",
        nargs="+",
        metavar="SPEC",
        help="our search's wall time only (10 seeds in memory, 3 on a journal file) on these benchmark "
        "specs: their rows of the wall-time table in results/search.md replaced, its targets judged again",
    )
    parser.add_argument(
        "--table",
        nargs="+",
        metavar="SPEC",
        help="the full run (baselines, timings, profile, memory) over these benchmark specs only; "
        "written to --out if given, else printed only (results/search.md keeps its other sections)",
    )
    args = parser.parse_args()
    if args.memory_child:
        memory_child(args.memory_child, args.trials)
        return
    if args.front:
        front(args.only or sorted(p.stem for p in SPECS.glob("*.yaml")))
        return
    if args.only:
        only(args.only)
        return
    facts = RunFacts.start()
    if args.wall:
        wall(args.wall, facts)
        return
    paths = sorted(SPECS.glob("*.yaml"))
    if args.table:  # these specs, in either mode (--quick otherwise runs QUICK_SPECS)
        unknown = sorted(set(args.table) - {p.stem for p in paths})
        if unknown:
            parser.error(f"--table: no benchmark spec {', '.join(unknown)} in {SPECS}")
        paths = [p for p in paths if p.stem in args.table]
    args.quick = args.quick or bench_mode() == "quick"
    if args.quick:
        paths = paths if args.table else [p for p in paths if p.stem in QUICK_SPECS]
        seeds, journal_seeds, default_seeds, random_seeds, budget = 3, 1, 3, 3, QUICK_TRIALS
    else:
        seeds, journal_seeds, default_seeds, random_seeds, budget = SEEDS, JOURNAL_SEEDS, 3, 5, None
    results = []
    with tempfile.TemporaryDirectory(prefix="bench-search-") as tmp:
        for path in paths:
            results.append(bench_spec(path, seeds, journal_seeds, default_seeds, random_seeds, Path(tmp), budget))
    slowest = max(results, key=lambda r: median(r["timing"]["memory_search"]))
    profile = profile_search(SPECS / f"{slowest['name']}.yaml", budget)
    memory = peak_memory(2_000 if args.quick else MEMORY_TRIALS)  # before the big oracle
    oracle_big = None if args.quick else oracle_alone()
    text = report(results, oracle_big, memory, profile, seeds, facts)
    print("\n" + text)
    out = args.out or (None if args.quick or args.table else RESULTS)
    if out:
        out.parent.mkdir(parents=True, exist_ok=True)
        write_results(out, text)
        print(f"wrote {out}")


if __name__ == "__main__":
    main()
