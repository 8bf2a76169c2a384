"""The search: a spec and a catalog become an Optuna study over stock values and topologies.

Flow: :class:`SearchSpace` (ordered indices into each resistor's allowed values, the
topology, the device) -> a batch of trials asked from Optuna -> one vectorised evaluation
per (topology, device) group (:func:`evaluate_designs`: capacitors sized after the
resistors, every metric, hard limits and ratings as normalised violations, the
desirability score) -> told back with the spec's objectives and one constraint (the summed
violation, 0 = feasible) -> ranking and Pareto front.

A stored study is the whole record: the spec, status and budget are study user attrs and
every design's metrics, violations and score are the trial's user attr ``record``, so the
CLI, the REST service and remote workers read the same storage. Reproducible with a seed:
the same spec, seed and budget give the same trials in a single process.
"""
from __future__ import annotations

import json
import math
import time
import uuid
from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import Callable

import numpy as np
import optuna
import pandas as pd
from optuna.storages import BaseStorage
from optuna.trial import TrialState

from optimizer import robustness, scoring
from optimizer.catalog import Catalog, load_catalog
from optimizer.devices import AnyDevice, device_from_row
from optimizer.errors import InputError
from optimizer.metrics import LIMIT_METRICS, unit as metric_unit
from optimizer.record import candidate_record, part_label, record_conditions
from optimizer.sampler import NeighbourSampler
from optimizer.scoring import pareto_mask, unique_values_array
from optimizer.sizing import size_capacitors, size_decoupling
from optimizer.spec import Spec, parse_spec, spec_digest, spec_to_dict
from optimizer.storage import (
    SYNC_EVERY,
    TrialHeartbeat,
    TrialTally,
    batched_writes,
    claim_batch,
    open_storage,
    quiet_optuna,
    recover_stale_trials,
    study_id,
    study_storage,
    sync,
    tally,
)
from optimizer.synthesis import hand_requirements, on_split_supply, rounded_designs
from optimizer.topologies import get_topology
from optimizer.topologies.base import SUPPLY_PARTS
from optimizer.units import format_value
from optimizer.validation import validate_spec

STATUSES = ("queued", "running", "done", "failed", "cancelled")
SHORTLIST_SAMPLES = robustness.FINAL_BUILDS  # Monte Carlo builds for each shortlisted design's yield
SHORTLIST_SIZE = 12  # designs given the full assessment (worst case, yield) when a search finishes
SHORTLIST_REACH = 24  # most designs assessed in full while looking for SHORTLIST_SIZE that meet the spec
FRONT_YIELD_POINTS = 8  # front points (evenly spread along it) that carry a yield figure
BAD_OBJECTIVE = 1e12  # stand-in for a metric the model cannot give (e.g. a stage that is not active)
ABSENT_RATING = 1e30  # W: the rating of a part left out (never binds)
SCREEN_WITHIN = 0.5  # designs within this summed violation at nominal get the robustness screen
ABSENT = -1  # index of an optional part left out (feedback_ce without an emitter resistor)

__all__ = ["SearchSpace", "SearchResult", "open_storage", "create_search", "run_search", "finish_search",
           "neighbour_sampler", "SamplerFactory", "load_search",
           "search_status", "list_searches", "cancel_search", "delete_search", "extend_search", "fail_search", "search",
           "evaluate_designs", "evaluate_group", "rank_records", "pareto_mask", "trial_record", "candidates_frame"]


# ----------------------------------------------------------------------------- search space

@dataclass(frozen=True)
class PartTable:
    """Allowed values of one kind of part (sorted, SI) with the catalog row chosen for each."""

    values: np.ndarray
    part_id: np.ndarray  # object array of str
    tolerance: np.ndarray  # fraction
    rating: np.ndarray  # W for resistors, V for capacitors
    unit_price: np.ndarray

    @classmethod
    def from_catalog(cls, catalog: Catalog, kind: str, values: np.ndarray,
                     allow_class2: bool = False) -> "PartTable":
        rows = catalog.parts_for(kind, values, allow_class2=allow_class2)
        rating_key = "power_rating" if kind == "resistor" else "voltage_rating"
        return cls(values=np.asarray(values, dtype=float), part_id=rows["part_id"].to_numpy(dtype=object),
                   tolerance=rows["tolerance"].to_numpy(dtype=float),
                   rating=rows[rating_key].to_numpy(dtype=float),
                   unit_price=rows["unit_price"].to_numpy(dtype=float))

    def index_of(self, values: np.ndarray) -> np.ndarray:
        """Index of the nearest allowed value (by ratio) for each of ``values``."""
        v = np.asarray(values, dtype=float)
        i = np.clip(np.searchsorted(self.values, v), 1, self.values.size - 1)
        lower_closer = np.abs(np.log(v / self.values[i - 1])) <= np.abs(np.log(self.values[i] / v))
        return np.where(lower_closer, i - 1, i) if self.values.size > 1 else np.zeros_like(i)


@dataclass(frozen=True)
class Design:
    """One point of the space: topology, device id and part indices by role (ABSENT = an optional
    part left out). Resistors always; capacitors only when the spec searches them."""

    topology: str
    device: str
    parts: tuple[tuple[str, int], ...]


@dataclass
class SearchSpace:
    """What a spec may choose from in a catalog, and how a trial picks from it."""

    spec: Spec
    catalog: Catalog
    resistors: PartTable
    capacitors: PartTable
    devices: dict[str, AnyDevice]
    device_price: dict[str, float]
    topologies: tuple[str, ...]
    # the devices each topology is built with (validation.eligibility: polarity and kind);
    # None: every device with every topology
    pairs: dict[str, tuple[str, ...]] | None = None
    _distributions: dict[str, dict] = field(default_factory=dict, repr=False)

    def devices_of(self, topology: str) -> tuple[str, ...]:
        """The devices ``topology`` is paired with in this space."""
        return tuple(self.devices) if self.pairs is None else self.pairs[topology]

    @property
    def paired(self) -> bool:
        """True when some topology is built with only some of the devices: the device is then a
        parameter of its own per topology ("device:<topology>"), not one shared "device"."""
        return any(set(self.devices_of(t)) != set(self.devices) for t in self.topologies)

    def device_param(self, topology: str) -> str | None:
        """The trial parameter that picks the device of ``topology`` (None: only one device)."""
        if self.paired:
            return f"device:{topology}" if len(self.devices_of(topology)) > 1 else None
        return "device" if len(self.devices) > 1 else None

    @classmethod
    def build(cls, spec: Spec, catalog: Catalog | None = None) -> "SearchSpace":
        """The space of ``spec`` in its catalog (``spec.parts.catalog`` by default); InputError
        if it is empty."""
        catalog = catalog if catalog is not None else load_catalog(spec.parts.catalog)
        verdicts = [v for v in validate_spec(spec, catalog) if v.eligible]  # only topologies that can meet it
        p = spec.parts
        r_values = catalog.resistor_values(p.resistor_series, *p.resistor_range, in_stock_only=p.in_stock_only)
        c_values = catalog.capacitor_values(p.capacitor_series, *p.capacitor_range, in_stock_only=p.in_stock_only,
                                            allow_class2=p.allow_class2_coupling)
        stock_note = " in stock" if p.in_stock_only else ""
        if r_values.size < 2:
            raise InputError.single("parts.resistor_range", list(p.resistor_range),
                                    f"a range holding at least two {p.resistor_series} resistors{stock_note} "
                                    f"in catalog {catalog.name!r}", title="empty search space")
        if c_values.size < 1:
            raise InputError.single("parts.capacitor_range", list(p.capacitor_range),
                                    f"a range holding at least one {p.capacitor_series} capacitor{stock_note} "
                                    f"in catalog {catalog.name!r}", title="empty search space")
        devices = {d: device_from_row(catalog.transistor(d)) for d in spec.devices}
        prices = {d: float(catalog.transistor(d).get("unit_price") or 0.0) for d in spec.devices}
        return cls(spec, catalog, PartTable.from_catalog(catalog, "resistor", r_values),
                   PartTable.from_catalog(catalog, "capacitor", c_values, p.allow_class2_coupling), devices, prices,
                   tuple(v.topology for v in verdicts), {v.topology: v.devices for v in verdicts})

    @property
    def offers_decoupling(self) -> bool:
        """Whether designs may add a supply decoupling RC (r_decouple, c_decouple): when the spec
        sets a least supply rejection (limits.psrr_min_db) and the RC is drawn for every device's
        stage: NPN on a positive rail, PNP on a negative one (the rail that is not ground)."""
        wanted = {"positive": "npn", "negative": "pnp"}.get(self.spec.supply_arrangement)
        return self.spec.limits.psrr_min_db is not None and all(d.polarity == wanted for d in self.devices.values())

    @property
    def sizing_target(self) -> float:
        """Low corner (Hz) capacitors are sized for (scoring.sizing_target)."""
        return scoring.sizing_target(self.spec, self.capacitors.tolerance)

    # ---- trials <-> designs ----------------------------------------------------------
    def suggest(self, trial: optuna.Trial) -> Design:
        """Ask ``trial`` for a design (parameters: topology, device, <topology>.<role> indices)."""
        topology = (trial.suggest_categorical("topology", list(self.topologies)) if len(self.topologies) > 1
                    else self.topologies[0])
        name = self.device_param(topology)
        device = (trial.suggest_categorical(name, list(self.devices_of(topology))) if name
                  else self.devices_of(topology)[0])
        chosen = tuple((name.split(".", 1)[1], trial.suggest_int(name, d.low, d.high))
                       for name, d in self.distributions({"topology": topology}).items() if "." in name)
        return Design(topology, device, chosen)

    def distributions(self, params: dict[str, object]) -> dict[str, optuna.distributions.BaseDistribution]:
        """The parameters (with their distributions) of the topology that ``params`` chose."""
        topology = str(params.get("topology", self.topologies[0]))
        if topology not in self._distributions:
            self._distributions[topology] = self._topology_distributions(topology)
        return self._distributions[topology]

    def _topology_distributions(self, topology: str) -> dict[str, optuna.distributions.BaseDistribution]:
        model = get_topology(topology)
        top = self.resistors.values.size - 1
        out: dict[str, optuna.distributions.BaseDistribution] = {}
        if len(self.topologies) > 1:
            out["topology"] = optuna.distributions.CategoricalDistribution(list(self.topologies))
        name = self.device_param(topology)
        if name:
            out[name] = optuna.distributions.CategoricalDistribution(list(self.devices_of(topology)))
        for role in model.resistors:
            if role == "r_top" and self.spec.supply_arrangement == "split":
                continue  # a split supply's base returns to ground through r_bottom alone
            out[f"{topology}.{role}"] = optuna.distributions.IntDistribution(
                ABSENT if role in model.optional_parts else 0, top)
        if self.offers_decoupling:  # a supply decoupling RC when the spec asks for rejection
            out[f"{topology}.r_decouple"] = optuna.distributions.IntDistribution(ABSENT, top)
        if self.spec.search.capacitors == "searched":
            for role in model.capacitors:
                out[f"{topology}.{role}"] = optuna.distributions.IntDistribution(0, self.capacitors.values.size - 1)
        return out

    def params_of(self, design: Design) -> dict[str, object]:
        """Trial parameters that reproduce ``design`` (for enqueueing seeds)."""
        params: dict[str, object] = {f"{design.topology}.{role}": int(i) for role, i in design.parts}
        if len(self.topologies) > 1:
            params["topology"] = design.topology
        name = self.device_param(design.topology)
        if name:
            params[name] = design.device
        return params

    def seeds(self) -> list[Design]:
        """The hand method's designs for every topology and device, rounded both ways to the
        series (its series neighbours), as search seeds."""
        out: list[Design] = []
        for topology in self.topologies:
            for device_id in self.devices_of(topology):
                device = self.devices[device_id]
                try:
                    req = hand_requirements(self.spec, device)
                    hand = get_topology(topology).hand_design(req)
                except (InputError, ValueError, ZeroDivisionError):
                    continue  # the hand method has no answer for this spec: no seed
                if self.spec.supply_arrangement == "split":
                    below = self.spec.supply_below_ground
                    hand = on_split_supply(hand, req, below if device.polarity == "npn" else 1.0 - below)
                    if hand is None:
                        continue
                roles = [name.split(".", 1)[1] for name in self.distributions({"topology": topology}) if "." in name]
                chosen = {r: v for r, v in hand.items() if r in roles}
                if set(chosen) != set(roles) or not all(np.isfinite(v) and v > 0 for v in chosen.values()):
                    continue
                for rounded in rounded_designs(chosen, self.spec.parts.resistor_series,
                                               self.spec.parts.capacitor_series, limit=16):
                    out.append(Design(topology, device_id, tuple(
                        (r, int((self.capacitors if r.startswith("c_") else self.resistors).index_of(
                            np.array([rounded[r]]))[0])) for r in roles)))
        return list(dict.fromkeys(out))


# ----------------------------------------------------------------------------- evaluation

FULL_ONLY_OPTIMISTIC = {"f_low": 0.0, "f_high": np.inf, "noise_ein_v": 0.0, "noise_figure_db": 0.0}


def evaluate_group(space: SearchSpace, topology_name: str, device_id: str, index: dict[str, np.ndarray],
                   *, full: bool = True, robust: bool | None = None) -> dict:
    """Metrics, violations, score and objective values of designs of one topology and device,
    given as part indices by role (arrays; ABSENT = optional part left out). Capacitors
    not given are sized after the resistors.

    ``full=False`` is the optimistic bound the exhaustive oracle prunes with: no capacitor
    sizing (``c_in`` the smallest allowed value, which maximises the input impedance seen
    through it, the others the largest), the limits that need the full model counted as
    met, the full-model metrics at their ideal, capacitors at the cheapest price adding no
    new value. Every figure it gives is at least as good as the sized design's.

    ``robust`` (default: with ``full``) adds the spec's robustness screen
    (robustness.judge on the core metrics with SCREEN_BUILDS builds, or every corner), the
    bias spread (``ic_spread``) and the screened ``yield``; the screen only adds violations,
    so leaving it out keeps the bound optimistic."""
    robust = full if robust is None else robust
    spec, topology, device = space.spec, get_topology(topology_name), space.devices[device_id]
    rt, ct = space.resistors, space.capacitors
    conditions = scoring.conditions_from_spec(spec)
    given_caps = {c: ct.values[i] for c, i in index.items() if c.startswith("c_")}
    index = {r: i for r, i in index.items() if not r.startswith("c_")}
    present = {r: i != ABSENT for r, i in index.items()}
    resistors = {r: np.where(present[r], rt.values[np.maximum(i, 0)], 0.0) for r, i in index.items()}
    n = next(iter(resistors.values())).size
    decoupled = "r_decouple" in resistors
    if given_caps:
        caps = given_caps
    elif full:
        held = {"c_decouple": np.full(n, ct.values[-1])} if decoupled else {}  # a short while the others are sized
        caps = size_capacitors(topology, {**resistors, **held}, device, conditions, ct.values,
                               f_low_target=space.sizing_target)
    else:
        caps = {c: np.full(n, ct.values[0] if c == "c_in" else ct.values[-1]) for c in topology.capacitors}
    if decoupled and "c_decouple" not in caps:
        caps["c_decouple"] = (size_decoupling(topology, {**resistors, **caps}, device, conditions, ct.values,
                                              scoring.decoupling_target(spec, ct.tolerance)) if full
                              else np.where(resistors["r_decouple"] > 0, ct.values[-1], 0.0))
    cap_present = {c: v > 0 for c, v in caps.items()}
    cap_index = {c: ct.index_of(np.where(cap_present[c], v, ct.values[0])) for c, v in caps.items()}
    parts = {**resistors, **caps}
    result = topology.evaluate(parts, device, conditions, full=full)

    limits = scoring.rating_limits(
        spec, {r: np.where(present[r], rt.rating[np.maximum(i, 0)], ABSENT_RATING) for r, i in index.items()},
        {c: np.where(cap_present[c], ct.rating[i], ABSENT_RATING) if full else ABSENT_RATING
         for c, i in cap_index.items()}, device)
    metrics = {k: np.asarray(v, dtype=float) for k, v in result.metrics.items()}
    if not full:
        metrics.update({k: np.full(n, v) for k, v in FULL_ONLY_OPTIMISTIC.items()})
    op = result.operating_point
    headroom = topology.headroom(op, device.vce_sat)
    nominal = scoring.limit_violations(spec, metrics, result.ratings, limits, op["active"],
                                       core_only=not full, vce_headroom=headroom)
    violations = dict(nominal)
    metrics["yield"], metrics["ic_spread"] = np.full(n, np.nan), np.full(n, np.nan)
    near = np.flatnonzero(np.nan_to_num(scoring.total_violation(nominal), nan=np.inf) <= SCREEN_WITHIN) \
        if robust else np.zeros(0, dtype=int)
    if robust and spec.robustness != "nominal":  # not screened: counted as failing every build
        violations["yield" if spec.robustness == "yield" else "worst_case"] = np.ones(n)
    if near.size:  # designs far outside a limit at nominal are not screened
        tolerances = {**{r: rt.tolerance[np.maximum(i, 0)][near] for r, i in index.items()},
                      **{c: ct.tolerance[i][near] for c, i in cap_index.items()}}
        judged = robustness.judge(spec, topology, {k: v[near] for k, v in parts.items()}, device, conditions,
                                  tolerances, {k: v[near] if np.ndim(v) else v for k, v in limits.items()},
                                  {k: v[near] for k, v in nominal.items()}, full=False,
                                  builds=robustness.SCREEN_BUILDS)
        for k, v in judged.violations.items():
            violations.setdefault(k, np.zeros(n))[near] = v
        metrics["yield"][near] = judged.yield_fraction
        metrics["ic_spread"][near] = judged.spread["ic_spread"]
    total = np.nan_to_num(scoring.total_violation(violations), nan=1e6)

    metrics["gain_error_db"] = scoring.gain_error_db(spec, metrics["gain"])
    cap_prices = [np.where(cap_present[c], ct.unit_price[i], 0.0) for c, i in cap_index.items()] if full else \
        [np.full(n, np.nanmin(ct.unit_price))] * len(caps)
    metrics["cost"] = (sum(np.where(present[r], rt.unit_price[np.maximum(i, 0)], 0.0) for r, i in index.items())
                       + sum(cap_prices) + topology.transistors * space.device_price[device_id])
    metrics["unique_values"] = unique_values_array({**resistors, **(caps if full else {})}).astype(float)
    terms = scoring.desirability_terms(spec, metrics)
    score = scoring.desirability(spec, metrics, total, terms)
    active = np.asarray(result.operating_point["active"], dtype=bool)
    objective_values = []
    for metric, direction in spec.objective_directions:
        v = np.abs(metrics[metric]) if metric == "gain_error_db" else metrics[metric]
        bad = BAD_OBJECTIVE if direction == "minimise" else -BAD_OBJECTIVE
        objective_values.append(np.where(np.isfinite(v) & active, v, bad))
    return {"n": n, "resistors": resistors, "caps": caps, "metrics": metrics, "violations": violations,
            "total": total, "binding": scoring.binding_limit(violations), "score": score,
            "score_terms": {name: d for name, (d, _) in terms.items()}, "active": active,
            "objective_values": objective_values}


def _finite(x: float) -> float | None:
    return float(x) if math.isfinite(x) else None


def evaluate_designs(space: SearchSpace, designs: list[Design]) -> list[dict]:
    """Evaluate ``designs`` in one vectorised call per (topology, device) group.

    Returns one JSON-ready record per design: topology, device, parts (role -> value in ohm
    or F), metrics (DESIGN.md names, SI; None where the model has no figure), violations
    (limit -> normalised excess, only those > 0), total_violation, binding, feasible, score,
    objectives (the spec's objective values, finite)."""
    out: list[dict | None] = [None] * len(designs)
    groups: dict[tuple[str, str], list[int]] = {}
    for k, d in enumerate(designs):
        groups.setdefault((d.topology, d.device), []).append(k)
    for (topology, device_id), members in groups.items():
        roles = [r for r, _ in designs[members[0]].parts]
        index = {r: np.array([dict(designs[k].parts)[r] for k in members]) for r in roles}
        g = evaluate_group(space, topology, device_id, index)
        for j, k in enumerate(members):
            metrics = {m: _finite(v[j]) for m, v in g["metrics"].items()}
            feasible = bool(g["total"][j] == 0)
            record = {
                "topology": topology, "device": device_id,
                "parts": {**{r: float(v[j]) for r, v in g["resistors"].items()},
                          **{c: float(v[j]) for c, v in g["caps"].items()}},
                "metrics": metrics,
                "violations": {name: float(v[j]) for name, v in g["violations"].items() if v[j] > 0},
                "total_violation": float(g["total"][j]), "binding": str(g["binding"][j]),
                "feasible": feasible, "score": float(g["score"][j]),
                "score_terms": {name: round(float(v[j]), 4) for name, v in g["score_terms"].items()},
                "basis": robustness.basis_label(space.spec, feasible, metrics.get("yield"),
                                                robustness.SCREEN_BUILDS),
                "objectives": [float(v[j]) for v in g["objective_values"]]}
            if not g["active"][j]:
                scoring.withhold_small_signal(record)
            out[k] = record
    return out  # type: ignore[return-value]


# ----------------------------------------------------------------------------- ranking

def _design_key(record: dict) -> tuple:
    return (record["topology"], record["device"], tuple(sorted(record["parts"].items())))


def rank_records(records: list[dict]) -> list[dict]:
    """Distinct designs ranked: feasible by score (high first), then infeasible by total
    violation (small first); duplicates collapsed."""
    unique = list({_design_key(r): r for r in records}.values())
    return sorted(unique, key=lambda r: (not r["feasible"], -r["score"] if r["feasible"] else r["total_violation"]))


NEAR_STEPS = 2  # a role whose value differs by fewer series steps is the same choice
DISTINCT_ROLES = 2  # designs differing by NEAR_STEPS or more in this many roles are distinct


def fold_variants(space: SearchSpace, ranked: list[dict]) -> list[dict]:
    """``ranked`` with near-identical designs folded into the best of them (which gains a
    ``variants`` count, itself included). Two designs are distinct when their topology or
    device differ, or when at least DISTINCT_ROLES roles differ by NEAR_STEPS or more steps
    of the allowed values; otherwise the later one is a variant of the earlier."""
    groups: dict[tuple[str, str], list[int]] = {}
    for k, r in enumerate(ranked):
        groups.setdefault((r["topology"], r["device"]), []).append(k)
    steps: dict[int, np.ndarray] = {}
    for members in groups.values():
        roles = sorted(ranked[members[0]]["parts"])
        columns = []
        for role in roles:
            table = space.capacitors if role.startswith("c_") else space.resistors
            v = np.array([ranked[k]["parts"].get(role, 0.0) for k in members])
            columns.append(np.where(v > 0, table.index_of(np.where(v > 0, v, 1.0)), -10 * NEAR_STEPS))
        for k, row in zip(members, np.stack(columns, axis=1) if columns else np.zeros((len(members), 0))):
            steps[k] = row
    kept: list[dict] = []
    kept_steps: dict[tuple[str, str], tuple[list[int], list[np.ndarray]]] = {}
    for k, r in enumerate(ranked):
        key = (r["topology"], r["device"])
        positions, rows = kept_steps.setdefault(key, ([], []))
        if rows:
            far = np.count_nonzero(np.abs(np.asarray(rows) - steps[k]) >= NEAR_STEPS, axis=1)
            near = np.flatnonzero(far < DISTINCT_ROLES)
            if near.size:
                kept[positions[near[0]]]["variants"] += 1
                continue
        positions.append(len(kept))
        rows.append(steps[k])
        kept.append({**r, "variants": 1})
    return kept


def _limit_metric(limit: str) -> tuple[str | None, str]:
    """The metric a limit judges and its unit (for saying what relaxing it would take)."""
    table = {name: metric for name, metric, _ in LIMIT_METRICS}
    table.update({"gain": "gain_db", "band_low": "f_low", "band_high": "f_high", "yield": "yield"})
    metric = table.get(limit)
    return metric, metric_unit(metric or "")


ROBUSTNESS_LIMITS = ("yield", "worst_case")


def relax_one_limit(spec: Spec, ranked: list[dict]) -> dict:
    """Why a spec has no answer: the limit whose relaxation alone would give one.

    Among the evaluated designs, those that miss exactly one limit name it; the limit missed
    by the smallest normalised amount (that limit's own violation) binds, and the best value such a design reaches (at
    nominal) is what the limit would have to be relaxed to, with a margin for spread. A design
    missing a limit at nominal also misses the robustness limit; that one is named only
    when nothing else is missed. Where no design misses only one limit, the pair
    missed together by the smallest amount binds. Returns {binding: [limits], reached: {limit:
    value (SI) or None}, unit: {limit: unit}, text}."""
    best: dict[tuple[str, ...], tuple[float, dict]] = {}
    for r in ranked:
        missed = tuple(sorted(k for k in r["violations"] if k not in ROBUSTNESS_LIMITS)) \
            or tuple(sorted(r["violations"]))  # spread fails what nominal fails: name the limit
        amount = sum(r["violations"][k] for k in missed)
        if 1 <= len(missed) <= 2 and (missed not in best or amount < best[missed][0]):
            best[missed] = (amount, r)
    for size in (1, 2):
        options = {k: v for k, v in best.items() if len(k) == size}
        if options:
            limits = min(options, key=lambda k: options[k][0])
            record = options[limits][1]
            break
    else:
        record = ranked[0] if ranked else None
        limits = (record["binding"],) if record and record["binding"] else ()
    reached: dict[str, float | None] = {}
    units: dict[str, str] = {}
    for limit in limits:
        metric, units[limit] = _limit_metric(limit)
        reached[limit] = (record["metrics"].get(metric) if record and metric else None)
    def show(value: float | None, limit: str) -> str | None:
        if value is None:
            return None
        if limit in ("yield", "thd_max"):
            return f"{100 * value:.3g} %"
        return f"{value:.3g} dB" if units[limit] == "dB" else format_value(value, units[limit])

    asked = {name: getattr(spec.limits, name) for name, _, _ in LIMIT_METRICS}
    asked.update({"yield": spec.limits.yield_min, "band_low": spec.band[0], "band_high": spec.band[1]})
    parts = []
    for limit in limits:
        if limit == "gain":
            wanted = f"{spec.gain_target_db:.3g} dB +- {spec.gain.tolerance_db:.2g} dB"
        else:
            wanted = show(asked.get(limit), limit)
        facts = [f"the spec asks {wanted}" if wanted else "", f"the nearest design reaches {show(reached[limit], limit)}"
                 if reached[limit] is not None else ""]
        facts = [f for f in facts if f]
        parts.append(f"{limit} ({'; '.join(facts)})" if facts else limit)
    if not limits:
        text = "no design was evaluated"
    elif len(limits) == 1:
        text = (f"no design meets every limit; {parts[0]} binds: relaxing it alone (with a margin for spread) "
                "would give an answer")
    else:
        text = f"no design meets every limit, and no single limit is to blame: {' and '.join(parts)} bind together"
    return {"binding": list(limits), "reached": reached, "unit": units, "text": text}


def candidate_from_record(space: SearchSpace, record: dict) -> dict:
    """The candidate record of a trial record (nominal figures; no spread): the ranked tail
    and the front points that are not assessed in full. A part left out keeps its role at 0."""
    parts = {}
    for role, value in record["parts"].items():
        if value <= 0 and role in SUPPLY_PARTS:
            continue  # no decoupling RC: the stage sits on the rail
        table = space.capacitors if role.startswith("c_") else space.resistors
        part_id = table.part_id[int(table.index_of(np.array([value]))[0])] if value > 0 else None
        parts[role] = {"value": value, "label": part_label(role, value), "part_id": part_id}
    return candidate_record(
        topology=record["topology"], feasible=record["feasible"], score=record["score"], binding=record["binding"],
        conditions=record_conditions(space.spec), parts=parts, transistor=space.devices[record["device"]].record(),
        metrics=dict(record["metrics"]), violations=dict(record["violations"]),
        **{k: record[k] for k in ("basis", "score_terms", "note", "variants") if k in record},
        trial=record.get("trial"))


def _shortlist_candidate(space: SearchSpace, record: dict, samples: int) -> dict:
    """The full assessment (worst case, yield, ratings, cautions) of a ranked design; its score
    is the record's times the yield of its builds (on the yield basis)."""
    from optimizer.candidates import assess  # the single place a design is judged in full

    full = assess(space.spec, space.catalog, record["topology"], dict(record["parts"]), record["device"],
                  samples=samples)
    full["metrics"].update({k: record["metrics"][k] for k in ("cost", "unique_values") if k in record["metrics"]})
    build_yield = full["metrics"].get("yield")
    terms = dict(record.get("score_terms") or {})
    if build_yield is not None:
        terms["yield"] = round(build_yield, 4)
    violations = full["violations"]
    total = float(sum(violations.values()))
    full.update(score=record["score"] * (1.0 if build_yield is None else build_yield) if full["feasible"] else -total,
                total_violation=total, binding=max(violations, key=violations.get) if violations else "",
                nominal_score=record["score"], score_terms=terms, trial=record.get("trial"),
                variants=record.get("variants", 1))
    return candidate_record(**full)


# ----------------------------------------------------------------------------- studies

def _now() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


def trial_record(trial: optuna.trial.FrozenTrial) -> dict | None:
    """The design record a finished trial carries (user attr ``record``, kept as JSON text:
    Optuna deep-copies a trial's attributes on every tell, and text copies for free)."""
    record = trial.user_attrs.get("record")
    return json.loads(record) if isinstance(record, str) else record


def _rank_key(trial: optuna.trial.FrozenTrial) -> tuple[int, float]:
    """Best first: feasible by score, then infeasible by summed violation."""
    record = trial_record(trial)
    if not record:
        return (2, 0.0)
    return (0, -record["score"]) if record["feasible"] else (1, record["total_violation"])


#: makes a search's sampler from its space and a seed offset (each runner of a shared search its own)
SamplerFactory = Callable[[SearchSpace, int], optuna.samplers.BaseSampler]


def neighbour_sampler(space: SearchSpace, seed_offset: int = 0) -> optuna.samplers.BaseSampler:
    """The search's own sampler: neighbour moves along the ordered indices from the best and
    the front designs."""
    return NeighbourSampler(_rank_key, [d for _, d in space.spec.objective_directions], space.distributions,
                            seed=space.spec.search.seed + seed_offset)


def _stored_attrs(study: optuna.Study) -> dict:
    """The study's user attrs as the storage holds them, not copied (read them, do not change
    them): Study.user_attrs deep-copies them, the finished ranking included, on every read."""
    return study_storage(study).get_study_user_attrs(study_id(study))


def _load(storage: BaseStorage, search_id: str) -> tuple[optuna.Study, Spec]:
    try:
        study = optuna.load_study(study_name=search_id, storage=storage, sampler=optuna.samplers.RandomSampler())
    except KeyError:
        raise InputError.single("search", search_id, "the id of an existing search",
                                title="unknown search") from None
    attrs = _stored_attrs(study)
    if not isinstance(attrs.get("spec"), dict) or not isinstance(attrs.get("budget"), int):
        raise InputError.single("search", search_id, "a search whose record was written in full "
                                "(its creation was cut short; delete it)", title="incomplete search")
    return study, parse_spec(attrs["spec"])


def create_search(spec: Spec, storage: BaseStorage, *, search_id: str | None = None,
                  catalog: Catalog | None = None, seeds: bool = True) -> str:
    """Create the study for ``spec`` (status 'queued'), the hand method's seeds enqueued
    (unless ``seeds`` is False: a baseline without them); returns its id.

    Everything is checked before anything is stored: the space is built (the spec fits its
    catalog) and the spec as it will be stored reads back. The status is written last: it is
    the search record's commit mark, so a creation cut short by a crash leaves a study
    without a status, which :func:`list_searches` shows as failed, :func:`delete_search`
    removes and a new creation under the same id replaces."""
    quiet_optuna()
    space = SearchSpace.build(spec, catalog)
    stored = spec_to_dict(spec)
    parse_spec(stored)  # what is stored must load again (InputError otherwise, nothing written)
    search_id = search_id or f"s-{uuid.uuid4().hex[:12]}"
    directions = ["minimize" if d == "minimise" else "maximize" for _, d in spec.objective_directions]
    with claim_batch(storage, search_id):  # one creator at a time: a record without status is then never in the making
        try:
            if storage.get_study_user_attrs(storage.get_study_id_from_name(search_id)).get("status") is None:
                optuna.delete_study(study_name=search_id, storage=storage)  # a half-made record: replaced
        except KeyError:
            pass
        study = optuna.create_study(study_name=search_id, storage=storage, directions=directions)
        for key, value in (("spec", stored), ("budget", spec.search.trials), ("created", _now()),
                           ("objectives", [list(o) for o in spec.objective_directions])):
            study.set_user_attr(key, value)
        for design in (space.seeds() if seeds else [])[: spec.search.trials]:
            study.enqueue_trial(space.params_of(design), skip_if_exists=True)
        study.set_user_attr("status", "queued")  # the commit mark
    return search_id


def _same_design(a: optuna.trial.FrozenTrial, b: optuna.trial.FrozenTrial) -> bool:
    return a.params == b.params


def _tally(study: optuna.Study, *, best: bool = False) -> TrialTally:
    """Finished (failed ones do not count: they are retried), running and feasible trials,
    and with ``best`` the best so far (by _rank_key), read incrementally (storage.tally)."""
    return tally(study_storage(study), study_id(study), *((_rank_key, _same_design) if best else ()))


def _counts(study: optuna.Study) -> tuple[int, int]:
    """(finished, running) trials."""
    counted = _tally(study)
    return counted.complete, counted.running


def run_search(storage: BaseStorage, search_id: str, *, should_stop: Callable[[], bool] | None = None,
               progress: Callable[[int, int], None] | None = None, max_batches: int | None = None,
               seed_offset: int = 0, catalog: Catalog | None = None,
               sampler: SamplerFactory = neighbour_sampler, finish: bool = True) -> None:
    """Run batches (ask, evaluate in one vectorised call, tell) until the budget is met, the
    search is cancelled or ``should_stop()`` is true; then, with ``finish``, rank and assess
    the shortlist (:func:`finish_search`). ``sampler(space, seed_offset)`` makes the sampler
    (the benchmarks pass their baselines in). Several processes may share a search:
    counting and asking is one claimed step (storage.claim_batch), so together they finish
    exactly the budget; running trials carry heartbeats and a dead runner's trials are failed
    and retried at the next batch of any runner (storage.TrialHeartbeat)."""
    try:
        study, spec = _load(storage, search_id)
        space = SearchSpace.build(spec, catalog)
    except InputError as error:
        if error.title != "unknown search":  # stored, but it cannot run: say so, never leave it queued
            fail_search(storage, search_id, f"cannot run: {error}")
        raise
    quiet_optuna()
    study.sampler = sampler(space, seed_offset)
    budget = int(study.user_attrs["budget"])
    if study.user_attrs.get("status") in ("queued", "failed"):
        study.set_user_attr("status", "running")
        study.set_user_attr("started", time.time())
    batches = 0
    # designs this runner has evaluated (samplers revisit them): (record as stored, violation, objectives)
    known: dict[Design, tuple[str, float, list[float]]] = {}
    open_trials: list[optuna.Trial] = []  # asked and not yet told (failed if the run is interrupted)
    try:
        while True:
            if study.user_attrs.get("status") == "cancelled" or (should_stop and should_stop()):
                return
            recover_stale_trials(storage, study)  # a dead runner's trials (heartbeats): failed, queued again
            with TrialHeartbeat(storage) as heartbeat:
                with claim_batch(storage, search_id):
                    finished, running = _counts(study)
                    if progress:
                        progress(finished, budget)
                    wanted = min(spec.search.batch_size, budget - finished - running)
                    if wanted <= 0 or (max_batches is not None and batches >= max_batches):
                        break
                    open_trials = []
                    with batched_writes(storage):  # a journal file: one append for the batch's new trials
                        for _ in range(wanted):
                            open_trials.append(heartbeat.add(study.ask()))
                trials = list(open_trials)
                with batched_writes(storage):  # ... one for their parameters
                    designs = [space.suggest(t) for t in trials]
                try:
                    fresh = list(dict.fromkeys(d for d in designs if d not in known))
                    known.update((d, (json.dumps(r), r["total_violation"], r["objectives"]))
                                 for d, r in zip(fresh, evaluate_designs(space, fresh)))
                    records = [known[d] for d in designs]
                except Exception as error:
                    _fail_trials(study, open_trials)
                    fail_search(storage, search_id, f"evaluation failed: {type(error).__name__}: {error}")
                    raise
                with batched_writes(storage):  # ... and one for their records and results
                    for t, (record, violation, objectives) in zip(trials, records):
                        t.set_user_attr("record", record)
                        t.set_constraint("violation", violation)
                        study.tell(t, objectives)
                        open_trials.remove(t)
            sync(storage, SYNC_EVERY)  # the batches of the last second are on disk
            batches += 1
    except KeyboardInterrupt:  # Ctrl-C: the batch in hand is failed, the search stays resumable
        _fail_trials(study, open_trials)
        fail_search(storage, search_id, INTERRUPTED)
        raise
    finally:
        sync(storage)  # everything this runner wrote is on disk
    if finish:
        _finish_when_done(study, space, budget)


INTERRUPTED = "interrupted (Ctrl-C); finished trials are kept: run the search again to resume it"


def _fail_trials(study: optuna.Study, trials: list[optuna.Trial]) -> None:
    """Tell ``trials`` (asked, not told) failed: they are asked again when the search resumes."""
    for t in list(trials):
        try:
            study.tell(t, state=TrialState.FAIL)
        except ValueError:  # told already (the interrupt came between its tell and its removal here)
            pass
        trials.remove(t)


def _finish_when_done(study: optuna.Study, space: SearchSpace, budget: int) -> None:
    finished, running = _counts(study)
    if finished >= budget and running == 0 and study.user_attrs.get("status") == "running":
        _finish(study, space)


def finish_search(storage: BaseStorage, search_id: str, *, catalog: Catalog | None = None) -> None:
    """Rank a search whose budget is spent and assess its shortlist (status 'done'); nothing
    while trials are still to run. What :func:`run_search` does at its end unless told not to."""
    study, spec = _load(storage, search_id)
    _finish_when_done(study, SearchSpace.build(spec, catalog), int(study.user_attrs["budget"]))


def _records(study: optuna.Study) -> list[dict]:
    out = []
    for t in study.get_trials(deepcopy=False, states=(TrialState.COMPLETE,)):
        record = trial_record(t)
        if record:
            out.append({**record, "trial": t.number})
    return out


def _front(space: SearchSpace, ranked: list[dict]) -> list[dict]:
    feasible = [r for r in ranked if r["feasible"]]
    if not feasible:
        return []
    directions = [d for _, d in space.spec.objective_directions]
    mask = pareto_mask(np.array([r["objectives"] for r in feasible]), directions)
    points = [r for r, keep in zip(feasible, mask) if keep]
    return sorted(points, key=lambda r: r["objectives"][0])


def _summarise(space: SearchSpace, study: optuna.Study, top: int, samples: int, *, tail: bool = True) -> dict:
    """The shortlist and the front; with ``tail`` every other ranked design follows the
    shortlist as a nominal candidate.

    Ranked designs are assessed in full (worst case, FINAL_BUILDS builds) in rank order until
    ``top`` of them meet the spec on its basis, or SHORTLIST_REACH designs have been assessed:
    a design that passed the search's screen but misses on the full assessment drops below
    every one that meets it."""
    every = rank_records(_records(study))
    ranked = fold_variants(space, every)
    shortlist: list[dict] = []
    for r in ranked[:max(top, SHORTLIST_REACH)]:
        shortlist.append(_shortlist_candidate(space, r, samples))
        if len(shortlist) >= top and sum(c["feasible"] for c in shortlist) >= top:
            break
    shortlist.sort(key=lambda c: (not c["feasible"], -c["score"] if c["feasible"] else c["total_violation"]))
    candidates = shortlist + [candidate_from_record(space, r) for r in ranked[len(shortlist):] if tail]
    for rank, c in enumerate(candidates, 1):
        c["rank"] = rank
    points = _front(space, ranked)
    with_yield = set(np.linspace(0, len(points) - 1, min(len(points), FRONT_YIELD_POINTS)).round().astype(int))
    front = []
    for k, r in enumerate(points):
        c = _shortlist_candidate(space, r, samples) if k in with_yield else candidate_from_record(space, r)
        c["objectives"] = r["objectives"]
        front.append(c)
    summary = {"candidates": candidates, "front": front, "evaluated": len(ranked)}
    if not any(c["feasible"] for c in shortlist):
        summary["infeasible"] = relax_one_limit(space.spec, every)
    return summary


def _finish(study: optuna.Study, space: SearchSpace) -> None:
    summary = _summarise(space, study, SHORTLIST_SIZE, SHORTLIST_SAMPLES, tail=False)
    study.set_user_attr("ranking", {k: summary[k] for k in ("candidates", "front", "infeasible") if k in summary})
    study.set_user_attr("finished", _now())
    study.set_user_attr("elapsed", time.time() - float(study.user_attrs.get("started", time.time())))
    study.set_user_attr("status", "done")


# ----------------------------------------------------------------------------- results

@dataclass
class SearchResult:
    """A search's ranked candidates (rank 1 first), Pareto front, status and the study."""

    id: str
    spec: Spec
    study: optuna.Study
    candidates: list[dict]
    front: list[dict]
    status: dict = field(default_factory=dict)
    infeasible: dict | None = None  # when no design meets the spec: the limit that binds (relax_one_limit)

    def candidate(self, rank: int) -> dict:
        """The candidate at ``rank`` (1 = best); InputError if there is none."""
        if not isinstance(rank, int) or not 1 <= rank <= len(self.candidates):
            raise InputError.single("rank", rank, f"a rank from 1 to {len(self.candidates)}",
                                    title="no such candidate")
        return self.candidates[rank - 1]

    def dataframe(self) -> pd.DataFrame:
        """One row per ranked candidate: rank, topology, device, part values (SI), metrics."""
        return candidates_frame(self.candidates)


def candidates_frame(candidates: list[dict], *, labels: bool = False) -> pd.DataFrame:
    """Ranked candidate records as a flat table, one row each: rank, feasible, score,
    binding, topology, device, then each part (SI value, or its label such as "68k" with
    ``labels``) and each metric (SI). The CLI's and the REST service's CSV."""
    rows = []
    for c in candidates:
        row = {"rank": c.get("rank"), "feasible": c.get("feasible"), "score": c.get("score"),
               "binding": c.get("binding", ""), "topology": c.get("topology"),
               "device": (c.get("transistor") or {}).get("id")}
        row.update({role: p["label" if labels else "value"] for role, p in c.get("parts", {}).items()})
        row.update(c.get("metrics", {}))
        rows.append(row)
    return pd.DataFrame(rows)


def search_status(storage: BaseStorage, search_id: str) -> dict:
    """Status, progress and best so far of a search (JSON-ready). A stored search that can
    no longer be read (its creation cut short, or a spec this version rejects) is reported
    as failed with its reason rather than raising, so it can still be seen and deleted."""
    try:
        study, spec = _load(storage, search_id)
    except InputError as error:
        if error.title == "unknown search":
            raise
        return _unreadable_status(storage, search_id, str(error))
    ranking = _stored_attrs(study).get("ranking")
    if ranking:
        best = ranking["candidates"][0] if ranking["candidates"] else None
    else:  # the best so far, kept incrementally: the first of rank_records over every finished trial
        counted = _tally(study, best=True)
        top = counted.best
        if top is not None and counted.memo.get("best", (None,))[0] != top.number:  # a new best: its record
            record = trial_record(top)
            counted.memo["best"] = (top.number, {**candidate_from_record(SearchSpace.build(spec), {
                **record, "trial": top.number}), "rank": 1} if record else None)
        best = counted.memo["best"][1] if top is not None else None
    return _status(study, spec, best)


def _unreadable_status(storage: BaseStorage, search_id: str, why: str) -> dict:
    attrs = storage.get_study_user_attrs(storage.get_study_id_from_name(search_id))
    name = attrs.get("spec", {}).get("name") if isinstance(attrs.get("spec"), dict) else None
    budget = attrs.get("budget")
    return {"id": search_id, "name": name if isinstance(name, str) else None, "status": "failed",
            "reason": attrs.get("reason") or f"the stored search cannot be read: {why}",
            "trials_done": 0, "trials_running": 0, "trials_feasible": 0,
            "budget": budget if isinstance(budget, int) and not isinstance(budget, bool) else 0,
            "elapsed": 0.0, "created": attrs.get("created"), "best": None}


def _status(study: optuna.Study, spec: Spec, best: dict | None) -> dict:
    attrs = _stored_attrs(study)
    finished, running = _counts(study)
    started = attrs.get("started")
    elapsed = attrs.get("elapsed") if attrs.get("status") == "done" else (time.time() - started if started else 0.0)
    return {"id": study.study_name, "name": spec.name, "status": attrs.get("status") or "failed",
            "reason": attrs.get("reason") if attrs.get("status") else "its creation was cut short",
            "trials_done": finished, "trials_running": running, "trials_feasible": _tally(study).feasible,
            "budget": int(attrs["budget"]),
            "elapsed": float(elapsed or 0.0), "created": attrs.get("created"), "best": best}


def load_search(storage: BaseStorage, search_id: str, *, top: int = SHORTLIST_SIZE,
                samples: int = SHORTLIST_SAMPLES) -> SearchResult:
    """The ranked candidates and front of a stored search (finished or not)."""
    study, spec = _load(storage, search_id)
    space = SearchSpace.build(spec)
    ranking = study.user_attrs.get("ranking")
    if ranking and top <= len(ranking["candidates"]):
        summary = {k: ranking[k] for k in ("front", "infeasible") if k in ranking}
        summary["candidates"] = list(ranking["candidates"])
        shortlisted = {c.get("trial") for c in summary["candidates"]}
        tail = [candidate_from_record(space, r) for r in fold_variants(space, rank_records(_records(study)))
                if r["trial"] not in shortlisted]
        for rank, c in enumerate(tail, len(summary["candidates"]) + 1):
            c["rank"] = rank
        summary["candidates"] += tail
    else:
        summary = _summarise(space, study, top, samples)
    best = summary["candidates"][0] if summary["candidates"] else None
    return SearchResult(search_id, spec, study, summary["candidates"], summary["front"], _status(study, spec, best),
                        summary.get("infeasible"))


def list_searches(storage: BaseStorage) -> list[dict]:
    """Status of every search in ``storage``, newest first (without the best design). A
    search whose creation was cut short (no status yet) is listed as failed."""
    out = []
    for s in storage.get_all_studies():  # study records only, no trials read
        attrs = s.user_attrs
        if "spec" not in attrs:
            continue  # not a stagefit search
        spec = attrs["spec"] if isinstance(attrs["spec"], dict) else {}
        out.append({"id": s.study_name, "name": spec.get("name"), "status": attrs.get("status") or "failed",
                    "budget": attrs.get("budget"), "created": attrs.get("created")})
    return sorted(out, key=lambda s: s.get("created") or "", reverse=True)


def _attrs(storage: BaseStorage, search_id: str) -> tuple[int, dict]:
    """(study id, user attrs) of a stored search, without reading its spec."""
    try:
        study_id = storage.get_study_id_from_name(search_id)
    except KeyError:
        raise InputError.single("search", search_id, "the id of an existing search",
                                title="unknown search") from None
    return study_id, storage.get_study_user_attrs(study_id)


def cancel_search(storage: BaseStorage, search_id: str) -> None:
    """Stop a search at its next batch; finished trials are kept. Works in every state
    (a finished search stays as it is)."""
    study_id, attrs = _attrs(storage, search_id)
    if attrs.get("status") in ("queued", "running", None):
        storage.set_study_user_attr(study_id, "status", "cancelled")


def fail_search(storage: BaseStorage, search_id: str, reason: str = "") -> None:
    """Mark a search 'failed' with its ``reason`` (its runner hit an error, or it cannot run);
    extend_search queues it again."""
    study_id, _ = _attrs(storage, search_id)
    storage.set_study_user_attr(study_id, "reason", reason[:2000] or "stopped by an unexpected error")
    storage.set_study_user_attr(study_id, "status", "failed")


def extend_search(storage: BaseStorage, search_id: str, trials: int) -> None:
    """Raise a search's budget by ``trials`` (0: as it was) and queue it again (resume or extend)."""
    if not isinstance(trials, int) or isinstance(trials, bool) or trials < 0:
        raise InputError.single("trials", trials, "a whole number of extra trials, 0 or more")
    study, _ = _load(storage, search_id)
    study.set_user_attr("budget", int(study.user_attrs["budget"]) + trials)
    study.set_user_attr("reason", None)
    study.set_user_attr("status", "queued")


def delete_search(storage: BaseStorage, search_id: str) -> None:
    """Remove a search and its trials from the storage, whatever its state."""
    _attrs(storage, search_id)
    optuna.delete_study(study_name=search_id, storage=storage)


def spec_search_id(spec: Spec) -> str:
    """A stable id for a spec (its name and a hash of its canonical form): the CLI reuses
    a finished search of the very same spec instead of running it again."""
    digest = spec_digest(spec)
    slug = "".join(ch if ch.isalnum() else "-" for ch in spec.name.lower()).strip("-")[:40] or "spec"
    return f"{slug}-{digest}"


def with_search(spec: Spec, **overrides: object) -> Spec:
    """``spec`` with fields of its search section replaced (None leaves a field as it is)."""
    changed = {k: v for k, v in overrides.items() if v is not None}
    if not changed:
        return spec
    data = spec_to_dict(spec)
    data["search"] = {**data["search"], **changed}
    return parse_spec(data)


def search(spec: Spec, *, storage: BaseStorage | str | None = None, trials: int | None = None,
           seed: int | None = None, progress: Callable[[int, int], None] | None = None,
           top: int = SHORTLIST_SIZE, catalog: Catalog | None = None,
           sampler: SamplerFactory = neighbour_sampler) -> SearchResult:
    """Run a whole search in this process and return its ranked result (the Python API).
    ``storage`` defaults to memory; ``trials`` and ``seed`` override the spec's; ``sampler``
    makes the sampler from the space and a seed offset (default: the neighbour sampler)."""
    spec = with_search(spec, trials=trials, seed=seed)
    store = storage if isinstance(storage, BaseStorage) else open_storage(storage)
    search_id = create_search(spec, store, catalog=catalog)
    run_search(store, search_id, progress=progress, catalog=catalog, sampler=sampler)
    return load_search(store, search_id, top=top)
