"""Speed and memory of the stage models (one core).

    .venv/bin/python benchmarks/bench_models.py

Prints candidates per second and peak memory for: nominal core metrics of divider_ce
(target >= 2,000,000/s), the full metric set with frequency response and noise (target >=
200,000/s), and Monte Carlo yield with 1,000 samples (target >= 2,000 candidates/s); writes
benchmarks/results/models.md.

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

import platform  # noqa: E402
import resource  # noqa: E402
import time  # noqa: E402
import tracemalloc  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

from optimizer import physics  # noqa: E402
from optimizer.devices import Device  # noqa: E402
from optimizer.tolerance import monte_carlo_yield  # noqa: E402
from optimizer.topologies import get_topology  # noqa: E402
from optimizer.topologies.base import Conditions  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent
DEVICE = Device(id="bench-npn", polarity="npn", hfe_min=100, hfe_typ=200, hfe_max=300,
                IS=1e-14, BF=200, NF=1.0, VAF=100, RB=50, CJE=10e-12, CJC=4e-12, TF=0.4e-9,
                vce_sat=0.2, vceo_max=45, p_max=0.5)
CONDITIONS = Conditions(supply=12.0, source_impedance=600.0, load_impedance=47e3)
REPEATS = 5
# CPU rates of the same three rows in the run committed before the usable swing (10 % rule on the
# static transfer, now in the core path) and the supply rejection solve (full path) were added.
BEFORE_ISSUE_11 = (5_309_945, 341_584, 5_678)
SLOWDOWN_CAUSE = (
    "Cause of the slowdown against the earlier run: the core path now solves the usable swing on the "
    "static nonlinear transfer (3 drive amplitudes of the scan plus 3 false-position steps, two peaks "
    "each: 12 base-loop Newton solves of 6 iterations per candidate, against one 8-iteration bias solve "
    "before); the full path adds the same plus one two-frequency supply-rejection solve of the network "
    "with the rail as a node. The Monte Carlo yield runs the core path per sample, so it slows like the core.")


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
    return {"r_top": rng.uniform(30e3, 200e3, n), "r_bottom": rng.uniform(5e3, 30e3, n),
            "r_collector": rng.uniform(2e3, 20e3, n), "r_emitter": rng.uniform(200, 3e3, n),
            "c_in": np.full(n, 10e-6), "c_out": np.full(n, 10e-6)}


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


def main() -> None:
    pinned = pin_one_cpu()
    topology = get_topology("divider_ce")
    core_n, full_n, mc_n = 1_000_000, 100_000, 1_000
    core_parts, full_parts, mc_parts = (random_divider_ce(k) for k in (core_n, full_n, mc_n))
    tolerances = {role: 0.05 for role in core_parts}
    rows = [
        measure("core metrics (bias, gain, impedances, usable swing and clip level, current)",
                lambda: topology.evaluate(core_parts, DEVICE, CONDITIONS, full=False), core_n),
        measure("full metrics (plus response, noise, supply rejection, thd, ratings)",
                lambda: topology.evaluate(full_parts, DEVICE, CONDITIONS, full=True), full_n),
        measure("Monte Carlo yield, 1,000 samples each (core metrics and ratings)",
                lambda: monte_carlo_yield(topology, mc_parts, DEVICE, CONDITIONS, tolerances, (0.0, 50.0),
                                          lambda m: np.abs(m["gain"]) > 1.0, samples=1000), mc_n),
    ]
    targets = [2_000_000, 200_000, 2_000]
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    max_rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1e3
    lines = ["# Stage model speed (divider_ce, one core)", "",
             f"Machine: {platform.machine()}, {os.cpu_count()} cores (process {pinned}), "
             f"Python {platform.python_version()}, numpy {np.__version__}; load average {load:.1f} "
             f"during the run. Produced by `benchmarks/bench_models.py`.", "",
             "Rates are candidates per CPU second of this process (best of "
             f"{REPEATS}), so other load on a shared machine does not count against them; the",
             "wall-clock rate of the same runs is beside it. Peak memory is tracemalloc's peak over one run.", "",
             "| what | candidates | candidates/s (CPU) | before issue 11 (CPU /s) | wall-clock /s | target | met "
             "| peak memory (MB) |",
             "| --- | --- | --- | --- | --- | --- | --- | --- |"]
    for row, target, before in zip(rows, targets, BEFORE_ISSUE_11):
        lines.append(f"| {row['label']} | {row['n']:,} | {row['rate']:,.0f} | {before:,} | {row['wall_rate']:,.0f} | "
                     f"{target:,} | {'yes' if row['rate'] >= target else 'no'} | {row['peak_mb']:.0f} |")
    lines += ["", f"Process peak resident memory over the whole benchmark: {max_rss:.0f} MB.", "", SLOWDOWN_CAUSE]
    text = "\n".join(lines) + "\n"
    (ROOT / "benchmarks" / "results" / "models.md").write_text(text, encoding="utf-8")
    print(text)


if __name__ == "__main__":
    main()
