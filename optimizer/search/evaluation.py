"""Evaluating designs of the search space: one vectorised call per topology (its devices stacked),
capacitors sized after the resistors, hard limits as violations, the robustness screen."""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from optimizer import robustness, scoring
from optimizer.devices import device_rows, stack_devices, stack_key
from optimizer.scoring import unique_values_array
from optimizer.search.space import ABSENT, ABSENT_RATING, Design, SearchSpace
from optimizer.sizing import size_capacitors, size_decoupling
from optimizer.topologies import get_topology

BAD_OBJECTIVE = 1e12  # stand-in for a metric the model cannot give (e.g. a stage that is not active)


SCREEN_WITHIN = 0.5  # designs within this summed violation at nominal get the robustness screen


FULL_ONLY_OPTIMISTIC = {
    "f_low": 0.0,
    "f_high": np.inf,
    "midband_deviation": 0.0,
    "noise_ein_v": 0.0,
    "noise_figure_db": 0.0,
}


def evaluate_group(
    space: SearchSpace,
    topology_name: str,
    device_id: str | Sequence[str],
    index: dict[str, np.ndarray],
    *,
    full: bool = True,
    robust: bool | None = None,
    swing_above: float | None = None,
) -> dict:
    """Metrics, violations, score and objective values of designs of one topology, given as
    part indices by role (arrays; ABSENT = optional part left out), with one device
    (``device_id``) or each its own (a sequence of ids of one devices.stack_key: the devices
    stacked into one call, devices.stack_devices, with the figures of a call per device).
    Capacitors not given are sized after the resistors.

    ``full=False`` is the optimistic bound the exhaustive oracle prunes with: no capacitor
    sizing (``c_in`` the smallest allowed value, which maximises the input impedance seen
    through it, the others the largest), the limits that need the full model counted as
    met, the full-model metrics at their ideal, capacitors at the cheapest price adding no
    new value. Every figure it gives is at least as good as the sized design's.

    ``robust`` (default: with ``full``) adds the spec's robustness screen
    (robustness.judge on the core metrics with SCREEN_BUILDS builds, or every corner), the
    bias spread (``ic_spread``) and the screened ``yield``; the screen only adds violations,
    so leaving it out keeps the bound optimistic.

    ``swing_above`` (a score) solves the usable swing (the costliest core figure) only for the
    designs whose score could exceed it whatever their swing: the spec bounds the swing from
    below only, so a design whose other violations already sum past -``swing_above`` (or, for
    ``swing_above`` >= 0, miss any limit) scores at most that. Those get no swing figure and a
    total violation of inf: for a caller that keeps only the designs scoring above it (the
    oracle's passes)."""
    robust = full if robust is None else robust
    spec, topology = space.spec, get_topology(topology_name)
    ids = [device_id] if isinstance(device_id, str) else list(dict.fromkeys(device_id))
    which = np.zeros(1, dtype=int) if isinstance(device_id, str) else np.array([ids.index(d) for d in device_id])
    device = space.devices[ids[0]] if len(ids) == 1 else stack_devices([space.devices[d] for d in ids], which)
    rt, ct = space.resistors, space.capacitors
    conditions = scoring.conditions_from_spec(spec)
    given_caps = {c: ct.values[i] for c, i in index.items() if c.startswith("c_")}
    index = {r: i for r, i in index.items() if not r.startswith("c_")}
    present = {r: i != ABSENT for r, i in index.items()}
    resistors = {r: np.where(present[r], rt.values[np.maximum(i, 0)], 0.0) for r, i in index.items()}
    n = next(iter(resistors.values())).size
    decoupled = "r_decouple" in resistors
    direct = {"c_in": np.zeros(n)} if space.direct_input(topology_name) else {}  # the source wired to the base
    if given_caps:
        caps = {**direct, **given_caps}
    elif full:
        held = {"c_decouple": np.full(n, ct.values[-1])} if decoupled else {}  # a short while the others are sized
        caps = {
            **direct,
            **size_capacitors(
                topology,
                {**resistors, **held, **direct},
                device,
                conditions,
                ct.values,
                f_low_target=space.sizing_target,
                output_impedance_max=spec.limits.output_impedance_max,
                capacitor_low_edge=scoring.capacitor_low_edge(ct.tolerance),
            ),
        }
    else:
        caps = {c: np.full(n, ct.values[0] if c == "c_in" else ct.values[-1]) for c in topology.capacitors}
        caps.update(direct)
    if decoupled and "c_decouple" not in caps:
        caps["c_decouple"] = (
            size_decoupling(
                topology,
                {**resistors, **caps},
                device,
                conditions,
                ct.values,
                scoring.decoupling_target(spec, ct.tolerance),
            )
            if full
            else np.where(resistors["r_decouple"] > 0, ct.values[-1], 0.0)
        )
    cap_present = {c: v > 0 for c, v in caps.items()}
    cap_index = {c: ct.index_of(np.where(cap_present[c], v, ct.values[0])) for c, v in caps.items()}
    parts = {**resistors, **caps}
    result = topology.evaluate(parts, device, conditions, full=full, swing=swing_above is None)

    limits = scoring.rating_limits(
        spec,
        {r: np.where(present[r], rt.rating[np.maximum(i, 0)], ABSENT_RATING) for r, i in index.items()},
        {
            c: np.where(cap_present[c], ct.rating[i], ABSENT_RATING) if full else ABSENT_RATING
            for c, i in cap_index.items()
        },
        device,
    )
    metrics = {k: np.asarray(v, dtype=float) for k, v in result.metrics.items()}
    if not full:
        metrics.update({k: np.full(n, v) for k, v in FULL_ONLY_OPTIMISTIC.items()})
    op = result.operating_point
    headroom = topology.headroom(op, device.vce_sat)

    def judge(figures: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
        return scoring.limit_violations(
            spec, figures, result.ratings, limits, op["active"], core_only=not full, vce_headroom=headroom
        )

    unsolved = np.zeros(n, dtype=bool)
    if swing_above is not None:
        others = scoring.total_violation(judge({**metrics, "swing_vpp": np.full(n, np.inf)}))
        unsolved = (others > 0) & (-others <= swing_above)  # NaN: solved
        rows = np.flatnonzero(~unsolved)
        if rows.size:
            metrics["swing_vpp"][rows] = topology.evaluate(
                {k: v[rows] for k, v in parts.items()}, device_rows(device, rows), conditions, full=full
            ).metrics["swing_vpp"]
    nominal = judge(metrics)
    violations = dict(nominal)
    metrics["yield"], metrics["ic_spread"] = np.full(n, np.nan), np.full(n, np.nan)
    near = (
        np.flatnonzero(np.nan_to_num(scoring.total_violation(nominal), nan=np.inf) <= SCREEN_WITHIN)
        if robust
        else np.zeros(0, dtype=int)
    )
    if robust and spec.robustness != "nominal":  # not screened: counted as failing every build
        violations["yield" if spec.robustness == "yield" else "worst_case"] = np.ones(n)
    for position, judged_id in enumerate(ids if near.size else []):  # designs far outside a limit are not screened
        rows = near if len(ids) == 1 else near[which[near] == position]  # one device at a time
        if not rows.size:
            continue
        tolerances = {
            **{r: rt.tolerance[np.maximum(i, 0)][rows] for r, i in index.items()},
            **{c: ct.tolerance[i][rows] for c, i in cap_index.items()},
        }
        judged = robustness.judge(
            spec,
            topology,
            {k: v[rows] for k, v in parts.items()},
            space.devices[judged_id],
            conditions,
            tolerances,
            {k: v[rows] if np.ndim(v) else v for k, v in limits.items()},
            {k: v[rows] for k, v in nominal.items()},
            full=False,
            builds=robustness.SCREEN_BUILDS,
        )
        for k, v in judged.violations.items():
            violations.setdefault(k, np.zeros(n))[rows] = v
        metrics["yield"][rows] = judged.yield_fraction
        metrics["ic_spread"][rows] = judged.spread["ic_spread"]
    total = np.where(unsolved, np.inf, np.nan_to_num(scoring.total_violation(violations), nan=1e6))

    metrics["gain_error_db"] = scoring.gain_error_db(spec, metrics["gain"])
    cap_prices = (
        [np.where(cap_present[c], ct.unit_price[i], 0.0) for c, i in cap_index.items()]
        if full
        else [np.full(n, np.nanmin(ct.unit_price))] * len(caps)
    )
    metrics["cost"] = (
        sum(np.where(present[r], rt.unit_price[np.maximum(i, 0)], 0.0) for r, i in index.items())
        + sum(cap_prices)
        + topology.transistors * np.array([space.device_price[d] for d in ids])[which]
    )
    metrics["unique_values"] = unique_values_array({**resistors, **(caps if full else {})}).astype(float)
    terms = scoring.desirability_terms(spec, metrics)
    score = scoring.desirability(spec, metrics, total, terms)
    active = np.asarray(result.operating_point["active"], dtype=bool)
    objective_values = []
    for metric, direction in spec.objective_directions:
        v = np.abs(metrics[metric]) if metric == "gain_error_db" else metrics[metric]
        bad = BAD_OBJECTIVE if direction == "minimise" else -BAD_OBJECTIVE
        objective_values.append(np.where(np.isfinite(v) & active, v, bad))
    return {
        "n": n,
        "resistors": resistors,
        "caps": caps,
        "metrics": metrics,
        "violations": violations,
        "total": total,
        "binding": scoring.binding_limit(violations),
        "score": score,
        "score_terms": {name: d for name, (d, _) in terms.items()},
        "active": active,
        "objective_values": objective_values,
    }


def _lists(arrays: dict[str, np.ndarray]) -> dict[str, list[float]]:
    """Each array (one value per design) as a list of Python floats."""
    return {name: np.asarray(v, dtype=float).tolist() for name, v in arrays.items()}


def evaluate_designs(space: SearchSpace, designs: list[Design]) -> list[dict]:
    """Evaluate ``designs`` in one vectorised call per topology and :func:`~optimizer.devices.stack_key`
    (its devices stacked: devices.stack_devices; the same figures as a call per device).

    Returns one JSON-ready record per design: topology, device, parts (role -> value in ohm
    or F), metrics (DESIGN.md names, SI; None where the model has no figure), violations
    (limit -> normalised excess, only those > 0), total_violation, binding, feasible, score,
    objectives (the spec's objective values, finite)."""
    out: list[dict | None] = [None] * len(designs)
    groups: dict[tuple[str, tuple], list[int]] = {}
    for k, d in enumerate(designs):
        groups.setdefault((d.topology, stack_key(space.devices[d.device])), []).append(k)
    for (topology, _), members in groups.items():
        roles = [r for r, _ in designs[members[0]].parts]
        given = [dict(designs[k].parts) for k in members]
        index = {r: np.array([p[r] for p in given]) for r in roles}
        g = evaluate_group(space, topology, [designs[k].device for k in members], index)
        # each figure of the group as a list of Python floats (what float() of each element gives),
        # made once per group rather than an array element read per design and figure
        parts = _lists({**g["resistors"], **g["caps"]})
        metrics_of = {m: [x if math.isfinite(x) else None for x in v] for m, v in _lists(g["metrics"]).items()}
        violations, terms = _lists(g["violations"]), _lists(g["score_terms"])
        objectives = [np.asarray(v, dtype=float).tolist() for v in g["objective_values"]]
        total, score = (np.asarray(g[k], dtype=float).tolist() for k in ("total", "score"))
        for j, k in enumerate(members):
            metrics = {m: v[j] for m, v in metrics_of.items()}
            feasible = total[j] == 0
            record = {
                "topology": topology,
                "device": designs[k].device,
                "parts": {r: v[j] for r, v in parts.items()},
                "metrics": metrics,
                "violations": {name: v[j] for name, v in violations.items() if v[j] > 0},
                "total_violation": total[j],
                "binding": str(g["binding"][j]),
                "feasible": feasible,
                "score": score[j],
                "score_terms": {name: round(v[j], 4) for name, v in terms.items()},
                "basis": robustness.basis_label(space.spec, feasible, metrics.get("yield"), robustness.SCREEN_BUILDS),
                "objectives": [v[j] for v in objectives],
            }
            if not g["active"][j]:
                scoring.withhold_small_signal(record)
            out[k] = record
    return out  # type: ignore[return-value]
