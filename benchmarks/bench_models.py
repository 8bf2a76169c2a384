"""Speed and memory of the stage models (one core).

    .venv/bin/python benchmarks/bench_models.py
    .venv/bin/python benchmarks/bench_models.py --per-topology   # the per-topology section alone

Prints candidates per second and peak memory for: the plain-numpy reference kernel of
divider_ce's core equations (benchmarks/reference_kernel.py, the speed bound) with the usable
swing's search and without it; the model's nominal core metrics, the same without the usable swing
(its _usable_swing left out), and the core in small groups of 16 designs per call; the full
metric set with frequency response and noise, the same in small groups (a search's groups,
where per-call overhead counts), the capacitor sizing, and Monte Carlo yield, then issue 16's
targets as target / measured / met, with the full metrics (at once and in groups of 16) also
measured side by side with the code at the start of issue 16 (ISSUE_16_START, exported from git
history), which is what their targets are judged on; writes benchmarks/results/models.md. Every row is measured
in the same run; each row's 'of reference' is over the reference of the same equations (with or
without the swing).

    .venv/bin/python benchmarks/bench_models.py --only core core_noswing reference reference_swing

measures the named rows alone and prints them (the results file is left as it is).

    .venv/bin/python benchmarks/bench_models.py --topologies [NAME ...] [--scale F]

Prints the core and full rates of every registered topology side by side (random designs around
each stage's hand design; a bipolar stage with the bench NPN, a JFET stage with the bench JFET);
writes benchmarks/results/models_topologies.md (NAME: only those topologies; ``--scale`` shrinks
the candidate counts, for a quick look while developing).

One core: BLAS/OpenMP pools are limited to one thread before numpy loads and the process is
pinned to one CPU. The rate is taken on the process's CPU time (best of several runs), so a
shared machine's other load does not count against it; the wall-clock rate is shown beside it.
Peak memory is tracemalloc's peak over one run (numpy reports its buffers to it), with the
solver's cached workspace dropped first so that it is counted.
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_var] = "1"  # one core, as the targets are stated

import dataclasses  # noqa: E402
import io  # noqa: E402
import json  # noqa: E402
import platform  # noqa: E402
import resource  # noqa: E402
import statistics  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import tarfile  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
import tracemalloc  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))  # the benchmarks package, run as a script
from benchmarks import reference_kernel  # noqa: E402
from benchmarks.run_facts import write_keeping_notes  # noqa: E402
from optimizer import physics  # noqa: E402
from optimizer.devices import JFET, Device  # noqa: E402
from optimizer.eseries import series_values  # noqa: E402
from optimizer.sizing import size_capacitors  # noqa: E402
from optimizer.synthesis import HandRequirements  # noqa: E402
from optimizer.tolerance import monte_carlo_yield  # noqa: E402
from optimizer.topologies import TOPOLOGIES, get_topology  # noqa: E402
from optimizer.topologies.base import Conditions, StageModel  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent
DEVICE = Device(
    id="bench-npn",
    polarity="npn",
    hfe_min=100,
    hfe_typ=200,
    hfe_max=300,
    IS=1e-14,
    BF=200,
    NF=1.0,
    VAF=100,
    RB=50,
    CJE=10e-12,
    CJC=4e-12,
    TF=0.4e-9,
    vce_sat=0.2,
    vceo_max=45,
    p_max=0.5,
)
JFET_DEVICE = JFET(
    id="bench-njf",
    polarity="njf",
    idss_min=2e-3,
    idss_max=6e-3,
    vp_min=0.5,
    vp_max=1.5,
    vds_max=30.0,
    p_max=0.3,
    BETA=4.44e-3,
    VTO=-0.9,
    LAMBDA=0.005,
    CGS=10e-12,
    CGD=4e-12,
    IS=5e-13,
    KF=1e-18,
    AF=1.0,
    TCV=0.0022,
    BEX=-1.5,
)
CONDITIONS = Conditions(supply=12.0, source_impedance=600.0, load_impedance=47e3)
REPEATS = 5
SMALL_GROUP = 16  # designs per model call in the small-group row (a search's groups are about this size)
# CPU rates of the rows in the run committed before the usable swing (10 % rule on the static
# transfer, now in the core path) and the supply rejection solve (full path) were added (None: not measured).
BEFORE_ISSUE_11 = {"core": 5_309_945, "full": 341_584, "mc1000": 5_678}
# CPU rates of the rows at the start of issue 16 (kernel speed-ups), measured by this script with the
# reference row in the same run (machine load 3.2): the figures the speed-ups are judged against.
BEFORE_ISSUE_16 = {
    "reference": 5_498_775,
    "core": 393_310,
    "full": 120_266,
    "sizing": 3_665,
    "mc100": 3_987,
    "mc1000": 442,
}
# Issue 16's targets: (what, threshold) on the measured figure of :func:`measured`.
TARGETS = {
    "core": ("0.8 of reference with the swing", 0.8),
    "full": ("2x before issue 16", 2.0),
}
# The reference row each model row is measured against: the same equations (the core with its
# usable swing against the reference kernel with the same swing search; the rest against the
# reference without it, as before).
BOUND = {"core": "reference_swing", "core_noswing": "reference", "core_small": "reference_swing"}


def of_reference(key: str, rows: dict) -> float:
    """A row's rate over its reference's (:data:`BOUND`), both measured in this run."""
    return rows[key]["rate"] / rows[BOUND.get(key, "reference")]["rate"]


def speedup(key: str, rows: dict) -> float:
    """A row's rate over the start of issue 16, both relative to the reference kernel of their own
    run, so a busier or quieter machine does not count for or against it."""
    bound = rows["reference"]["rate"]
    return (rows[key]["rate"] / bound) / (BEFORE_ISSUE_16[key] / BEFORE_ISSUE_16["reference"])


def measured(key: str, rows: dict) -> float:
    """The figure a row's target is judged on: a core row's rate over its reference's (same run,
    :func:`of_reference`); for the others :func:`speedup`."""
    return of_reference(key, rows) if key.startswith("core") else speedup(key, rows)


# The commit before issue 16's first change: the full metrics are measured against its code side
# by side in the same run (SIDE_BY_SIDE_ROUNDS alternating rounds, each tree a fresh process pinned
# to one CPU, the same designs), the honest form of the 'speed-up' column for these rows.
ISSUE_16_START = "baf1a15"
SIDE_BY_SIDE_ROUNDS = 3
SIDE_BY_SIDE_ROWS = {"full": 0, "small": SMALL_GROUP}  # row -> designs per model call (0: all at once)
# Run with PYTHONPATH at one tree: the designs (an .npz), the device's and conditions' fields
# (JSON; fields a tree's Device does not know are left out) and the group size in argv[1]; prints
# the best of REPEATS CPU rates of evaluate(full=True), designs per CPU second.
_CHILD = """
import dataclasses, json, os, sys, time
import numpy as np
from optimizer.devices import Device
from optimizer.topologies import get_topology
from optimizer.topologies.base import Conditions
if hasattr(os, "sched_setaffinity"):
    os.sched_setaffinity(0, {min(os.sched_getaffinity(0))})
setup = json.loads(sys.argv[1])
known = {f.name for f in dataclasses.fields(Device)}
device = Device(**{k: v for k, v in setup["device"].items() if k in known})
conditions = Conditions(**setup["conditions"])
parts = dict(np.load(setup["parts"]))
n = len(next(iter(parts.values())))
group = setup["group"] or n
topology = get_topology("divider_ce")
def run():
    for i in range(0, n, group):
        topology.evaluate({k: v[i : i + group] for k, v in parts.items()}, device, conditions, full=True)
run()
best = float("inf")
for _ in range(setup["repeats"]):
    t0 = time.process_time()
    run()
    best = min(best, time.process_time() - t0)
print(n / best)
"""


def side_by_side(commit: str = ISSUE_16_START, rounds: int = SIDE_BY_SIDE_ROUNDS) -> dict | None:
    """Full-metric rates (designs per CPU second) of this tree and of ``commit``'s optimizer package
    (exported by ``git archive``), alternating in ``rounds`` rounds: per row the medians, the
    median ratio and the rounds' ratios; None where the commit cannot be exported (no git history)."""
    export = subprocess.run(["git", "-C", str(ROOT), "archive", commit, "optimizer"], capture_output=True)
    if export.returncode != 0:
        print(f"side by side: commit {commit} not available ({export.stderr.decode().strip()}); skipped")
        return None
    with tempfile.TemporaryDirectory() as tmp:
        before_tree = Path(tmp) / "before"
        with tarfile.open(fileobj=io.BytesIO(export.stdout)) as archive:
            archive.extractall(before_tree, filter="data")
        sizes = {"full": 100_000, "small": 4_096}
        rates: dict[str, dict[str, list[float]]] = {row: {"before": [], "now": []} for row in SIDE_BY_SIDE_ROWS}
        for row, group in SIDE_BY_SIDE_ROWS.items():
            designs = Path(tmp) / f"{row}.npz"
            np.savez(designs, **random_divider_ce(sizes[row]))
            setup = json.dumps(
                {
                    "device": dataclasses.asdict(DEVICE),
                    "conditions": {k: getattr(CONDITIONS, k) for k in ("supply", "source_impedance", "load_impedance")},
                    "parts": str(designs),
                    "group": group,
                    "repeats": REPEATS,
                }
            )
            for _ in range(rounds):
                for label, tree in (("before", before_tree), ("now", ROOT)):
                    env = {**os.environ, "PYTHONPATH": str(tree)}
                    out = subprocess.run(
                        [sys.executable, "-c", _CHILD, setup], cwd=tree, env=env, capture_output=True, text=True
                    )
                    if out.returncode != 0:
                        raise SystemExit(f"side by side ({label}, {row}) failed:\n{out.stderr}")
                    rates[row][label].append(float(out.stdout.strip().splitlines()[-1]))
    return {
        row: {
            "before": statistics.median(r["before"]),
            "now": statistics.median(r["now"]),
            "ratio": statistics.median(r["now"]) / statistics.median(r["before"]),
            "ratios": [a / b for a, b in zip(r["now"], r["before"])],
        }
        for row, r in rates.items()
    }


def pin_one_cpu() -> str:
    """Pin this process to one CPU where the OS allows it; a note for the results file."""
    if hasattr(os, "sched_setaffinity"):
        cpu = min(os.sched_getaffinity(0))
        os.sched_setaffinity(0, {cpu})
        return f"pinned to CPU {cpu}"
    return "not pinned (no sched_setaffinity)"


def random_divider_ce(n: int, seed: int = 1) -> dict[str, np.ndarray]:
    """n random divider_ce designs around workable values (ohm, F)."""
    rng = np.random.default_rng(seed)
    return {
        "r_top": rng.uniform(30e3, 200e3, n),
        "r_bottom": rng.uniform(5e3, 30e3, n),
        "r_collector": rng.uniform(2e3, 20e3, n),
        "r_emitter": rng.uniform(200, 3e3, n),
        "c_in": np.full(n, 10e-6),
        "c_out": np.full(n, 10e-6),
    }


def measure(label: str, work, n: int, repeats: int = REPEATS) -> dict:
    """Best-of-repeats rates (candidates per CPU second and per wall second) and peak traced memory (MB)."""
    work()  # warm up
    cpu = wall = float("inf")
    for _ in range(repeats):
        c0, w0 = time.process_time(), time.perf_counter()
        work()
        cpu, wall = min(cpu, time.process_time() - c0), min(wall, time.perf_counter() - w0)
    physics.clear_workspace()
    tracemalloc.start()
    work()
    peak = tracemalloc.get_traced_memory()[1] / 1e6
    tracemalloc.stop()
    return {"label": label, "n": n, "rate": n / cpu, "wall_rate": n / wall, "peak_mb": peak}


def main(only: list[str] | None = None) -> None:
    """Measure every row (or the rows named in ``only``, printed alone) and write the results file."""
    pinned = pin_one_cpu()
    topology = get_topology("divider_ce")
    core_n, full_n, size_n, mc_n, small_n = 1_000_000, 100_000, 2_000, 1_000, 4_096
    core_parts, full_parts, mc_parts, small_parts = (random_divider_ce(k) for k in (core_n, full_n, mc_n, small_n))
    size_parts = {k: v for k, v in random_divider_ce(size_n).items() if not k.startswith("c_")}
    e12_caps = series_values("E12", 1e-9, 1e-3)
    tolerances = {role: 0.05 for role in core_parts}

    def yield_of(samples: int):
        return lambda: monte_carlo_yield(
            topology,
            mc_parts,
            DEVICE,
            CONDITIONS,
            tolerances,
            (0.0, 50.0),
            lambda m, rows: np.abs(m["gain"]) > 1.0,
            samples=samples,
            supply_range=(11.0, 13.0),
        )

    def in_groups(full: bool):
        return lambda: [
            topology.evaluate(
                {k: v[i : i + SMALL_GROUP] for k, v in small_parts.items()}, DEVICE, CONDITIONS, full=full
            )
            for i in range(0, small_n, SMALL_GROUP)
        ]

    def without_swing():
        """The core with the model's usable swing left out (StageModel._usable_swing replaced by zeros
        for this call alone): the model's cost of the reference's equations without the swing."""
        swing = StageModel._usable_swing
        StageModel._usable_swing = lambda self, p, *args: np.zeros(next(iter(p.values())).size)
        try:
            topology.evaluate(core_parts, DEVICE, CONDITIONS, full=False)
        finally:
            StageModel._usable_swing = swing

    plans = {
        "reference": (
            "reference kernel: plain numpy, core equations without the usable swing",
            lambda: reference_kernel.core_metrics(core_parts, DEVICE, CONDITIONS),
            core_n,
        ),
        "reference_swing": (
            "reference kernel: plain numpy, core equations with the usable swing (the same search)",
            lambda: reference_kernel.core_metrics(core_parts, DEVICE, CONDITIONS, swing=True),
            core_n,
        ),
        "core": (
            "core metrics (bias, gain, impedances, usable swing and clip level, current)",
            lambda: topology.evaluate(core_parts, DEVICE, CONDITIONS, full=False),
            core_n,
        ),
        "core_noswing": ("core metrics without the usable swing", without_swing, core_n),
        "core_small": (f"core metrics in small groups ({SMALL_GROUP} designs per call)", in_groups(False), small_n),
        "full": (
            "full metrics (plus response, noise, supply rejection, thd, ratings)",
            lambda: topology.evaluate(full_parts, DEVICE, CONDITIONS, full=True),
            full_n,
        ),
        "small": (
            f"full metrics in small groups ({SMALL_GROUP} designs per call, as a search's groups)",
            in_groups(True),
            small_n,
        ),
        "sizing": (
            "capacitor sizing (E12 c_in, c_out for the low corner)",
            lambda: size_capacitors(topology, size_parts, DEVICE, CONDITIONS, e12_caps),
            size_n,
        ),
        "mc100": (
            "Monte Carlo yield, 100 builds each (as every search trial; 3 temperatures x 3 supplies)",
            yield_of(100),
            mc_n,
        ),
        "mc1000": ("Monte Carlo yield, 1,000 builds each", yield_of(1000), mc_n),
    }
    if only:
        unknown = sorted(set(only) - set(plans))
        if unknown:
            raise SystemExit(f"--only: unknown rows {unknown}; valid: {', '.join(plans)}")
        load = os.getloadavg()[0]
        rows = {key: measure(*plans[key]) for key in only}
        for key, row in rows.items():
            bound = BOUND.get(key, "reference")
            ratio = f", {of_reference(key, rows):.3f} of {bound}" if bound in rows and key != bound else ""
            print(f"{key}: {row['rate']:,.0f} /s CPU, {row['wall_rate']:,.0f} /s wall, {row['peak_mb']:.0f} MB{ratio}")
        print(f"load average {load:.1f} at the start, {os.getloadavg()[0]:.1f} at the end")
        return
    rows = {key: measure(*plan) for key, plan in plans.items()}
    compared = side_by_side()
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    max_rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1e3
    lines = [
        "# Stage model speed (divider_ce, one core)",
        "",
        f"Machine: {platform.machine()}, {os.cpu_count()} cores (process {pinned}), "
        f"Python {platform.python_version()}, numpy {np.__version__}; load average {load:.1f} "
        f"during the run. Produced by `benchmarks/bench_models.py`, every row in the same run.",
        "",
        "Rates are candidates per CPU second of this process (best of "
        f"{REPEATS}), so other load on a shared machine does not count against them; the",
        "wall-clock rate of the same runs is beside it. Peak memory is tracemalloc's peak over one run. "
        "'of reference' is the row's rate over the reference kernel of the same equations, measured in this "
        "run: the core (with its usable swing) and the core in small groups over the reference with the same "
        "swing search, every other row over the reference without the swing (bias, "
        "closed-form mid-band gain and impedances, coupling reactances, clip level, current); 'speed-up' is "
        "the rate over the start of issue 16, both taken relative to their own run's reference kernel without "
        "the swing.",
        "",
        "| what | candidates | candidates/s (CPU) | of reference | before issue 16 (CPU /s) | speed-up "
        "| before issue 11 (CPU /s) | wall-clock /s | peak memory (MB) |",
        "| --- | --- | --- | --- | --- | --- | --- | --- | --- |",
    ]
    for key, row in rows.items():
        before, earlier = BEFORE_ISSUE_16.get(key), BEFORE_ISSUE_11.get(key)
        gain = "-" if before is None or key == "reference" else f"{speedup(key, rows):.2f}x"
        lines.append(
            f"| {row['label']} | {row['n']:,} | {row['rate']:,.0f} | {of_reference(key, rows):.3f} | "
            f"{'-' if before is None else f'{before:,}'} | {gain} | "
            f"{'-' if earlier is None else f'{earlier:,}'} | {row['wall_rate']:,.0f} | {row['peak_mb']:.0f} |"
        )
    if compared:
        lines += [
            "",
            f"Side by side with the code at the start of issue 16 (commit {ISSUE_16_START}, its optimizer "
            f"package exported by `git archive`), in this run: {SIDE_BY_SIDE_ROUNDS} alternating rounds, each "
            f"tree a fresh process pinned to one CPU, the same designs, best of {REPEATS} CPU rates per round; "
            "the medians, and the ratio's range over the rounds.",
            "",
            f"| what | {ISSUE_16_START} (CPU /s) | now (CPU /s) | ratio (rounds) |",
            "| --- | --- | --- | --- |",
        ]
        for key, c in compared.items():
            lines.append(
                f"| {rows[key]['label']} | {c['before']:,.0f} | {c['now']:,.0f} | {c['ratio']:.2f}x "
                f"({min(c['ratios']):.2f}..{max(c['ratios']):.2f}) |"
            )
    lines += ["", "| target (issue 16) | target | measured | met |", "| --- | --- | --- | --- |"]
    for key, (what, threshold) in TARGETS.items():
        if compared and key in compared:  # judged side by side where that was measured
            value = compared[key]["ratio"]
            shown = f"{value:.2f}x side by side"
        else:
            value = measured(key, rows)
            bound = "the reference with the swing" if BOUND.get(key) == "reference_swing" else "the reference"
            shown = f"{value:.3f} of {bound}" if key in BOUND else f"{value:.2f}x (relative to the reference kernel)"
        lines.append(
            f"| {rows[key]['label'].split(' (')[0]} | {what} | {shown} | {'yes' if value >= threshold else 'no'} |"
        )
    # A small group's rate is per-call overhead, not array work: the vectorised reference does not
    # scale it, so it is judged side by side with the code before.
    small = f"{compared['small']['ratio']:.2f}x side by side" if compared else "not measured side by side"
    lines.append(
        f"| {rows['small']['label'].split(' (')[0]} at {SMALL_GROUP} designs per call | higher than before "
        f"(issue 16: improve small groups too) | {small} | "
        f"{'yes' if compared and compared['small']['ratio'] > 1.0 else 'no'} |"
    )
    lines += ["", f"Process peak resident memory over the whole benchmark: {max_rss:.0f} MB."]
    text = "\n".join(lines) + "\n"
    write_keeping_notes(ROOT / "benchmarks" / "results" / "models.md", text)
    print(text)


def random_around_hand(topology_name: str, n: int, seed: int = 1) -> tuple[dict[str, np.ndarray], Device | JFET]:
    """n random designs of a topology, each part log-uniform within x0.5..x2 of its hand design
    (12 V, |gain| 5, 1 mA, 600 ohm into 47k), and the device it is benchmarked with."""
    topology = get_topology(topology_name)
    device = JFET_DEVICE if topology.device_kind == "jfet" else DEVICE
    jfet = {"idss": device.idss_typ, "vp": -device.VTO, "vce_sat": 0.0} if topology.device_kind == "jfet" else {}
    hand = topology.hand_design(
        HandRequirements(
            supply=12.0,
            gain=5.0,
            load_impedance=47e3,
            source_impedance=600.0,
            f_low=20.0,
            collector_current=1e-3,
            **jfet,
        )
    )
    rng = np.random.default_rng(seed)
    parts = {
        role: hand.get(role, 0.0) * np.exp(rng.uniform(np.log(0.5), np.log(2.0), n))
        for role in topology.resistors + topology.capacitors
    }
    return parts, device


def topology_table(names: list[str], scale: float = 1.0) -> None:
    """Core and full rates (candidates per CPU second, one core) of the named registered topologies."""
    pinned = pin_one_cpu()
    core_n, full_n = max(1000, int(100_000 * scale)), max(100, int(20_000 * scale))
    lines = [
        "# Stage model speed per topology (one core)",
        "",
        f"Machine: {platform.machine()}, {os.cpu_count()} cores (process {pinned}), Python "
        f"{platform.python_version()}, numpy {np.__version__}; load average "
        f"{os.getloadavg()[0]:.1f} at the start. Produced by `benchmarks/bench_models.py --topologies`.",
        "",
        "Designs: each part log-uniform within x0.5..x2 of the stage's hand design (12 V, |gain| 5, "
        "1 mA, 600 ohm into 47k). Rates are candidates per CPU second, best of "
        f"{REPEATS}; core = bias, gain, impedances, usable swing, clip, current; full adds the "
        "response corners, noise, supply rejection and ratings.",
        "",
        "| topology | device | core candidates/s (CPU) | full candidates/s (CPU) | core peak memory (MB) |",
        "| --- | --- | --- | --- | --- |",
    ]
    for name in names:
        topology = get_topology(name)
        core_parts, device = random_around_hand(name, core_n)
        full_parts = {k: v[:full_n] for k, v in core_parts.items()}
        core = measure(
            "core", lambda t=topology, p=core_parts, d=device: t.evaluate(p, d, CONDITIONS, full=False), core_n
        )
        full = measure(
            "full", lambda t=topology, p=full_parts, d=device: t.evaluate(p, d, CONDITIONS, full=True), full_n
        )
        lines.append(f"| {name} | {device.id} | {core['rate']:,.0f} | {full['rate']:,.0f} | {core['peak_mb']:.0f} |")
    text = "\n".join(lines) + "\n"
    write_keeping_notes(ROOT / "benchmarks" / "results" / "models_topologies.md", text)
    print(text)


if __name__ == "__main__":
    if "--topologies" in sys.argv[1:]:
        args = sys.argv[sys.argv.index("--topologies") + 1 :]
        topology_table(
            [a for a in args if a in TOPOLOGIES] or list(TOPOLOGIES),
            float(args[args.index("--scale") + 1]) if "--scale" in args else 1.0,
        )
    elif "--only" in sys.argv[1:]:
        main(sys.argv[sys.argv.index("--only") + 1 :])
    else:
        main()
