"""Ranking designs, folding near-duplicates, the Pareto front, the binding limit of an infeasible
search and the shortlist's full assessment."""

from __future__ import annotations

import json
from typing import Collection

import numpy as np
import optuna

from optimizer import robustness
from optimizer.catalog import load_catalog
from optimizer.metrics import LIMIT_METRICS, unit as metric_unit
from optimizer.record import candidate_record, part_label, record_conditions
from optimizer.scoring import (
    CAPACITOR_VOLTAGE_DERATING,
    MIDBAND_DEVIATION_MAX,
    binding_limit,
    pareto_mask,
    transistor_derating,
)
from optimizer.search.space import PartTable, SearchSpace
from optimizer.spec import Spec
from optimizer.topologies import get_topology
from optimizer.topologies.base import SUPPLY_PARTS
from optimizer.units import format_value

SHORTLIST_SAMPLES = robustness.FINAL_BUILDS  # Monte Carlo builds for each shortlisted design's yield


SHORTLIST_SIZE = 12  # designs given the full assessment (worst case, yield) when a search finishes


SHORTLIST_REACH = 24  # most designs assessed in full while looking for SHORTLIST_SIZE that meet the spec


FRONT_YIELD_POINTS = 8  # front points (evenly spread along it) that carry a yield figure


def design_key(record: dict) -> tuple:
    """What tells designs apart: topology, device and part values."""
    return (record["topology"], record["device"], tuple(sorted(record["parts"].items())))


def rank_records(records: list[dict]) -> list[dict]:
    """Distinct designs ranked as a designer reads them: feasible by score (high first), then the
    infeasible ones that amplify (active at their bias) by total violation (small first), then
    those that do not; duplicates collapsed. A stage saturated or cut off has no figures to
    compare, so it follows every working near miss however small its own summed violation (its
    gain is judged on the small-signal gain about a bias it does not hold). The search's own
    order (:func:`rank_key`: by summed violation alone, which leads it out of saturation
    gradually) leaves that distinction out."""
    unique = list({design_key(r): r for r in records}.values())
    return sorted(unique, key=designer_order)


def designer_order(record: dict) -> tuple:
    """:func:`rank_records`' sort key of a trial's record or a shortlist candidate (both carry
    ``feasible``, ``score``, ``violations`` and ``total_violation``)."""
    if record["feasible"]:
        return (False, -record["score"])
    return (True, record["violations"].get("active", 0.0) > 0, record["total_violation"])


NEAR_STEPS = 2  # a role whose value differs by fewer series steps is the same choice


DISTINCT_ROLES = 2  # designs differing by NEAR_STEPS or more in this many roles are distinct


FOLD_BLOCK = 64  # designs of a topology and device compared with the kept ones in one step (fold_variants)


def fold_variants(space: SearchSpace, ranked: list[dict], keep: Collection[tuple] = ()) -> list[dict]:
    """``ranked`` with near-identical designs folded into the best of them (which gains a
    ``variants`` count, itself included). Two designs are distinct when their topology or
    device differ, or when at least DISTINCT_ROLES roles differ by NEAR_STEPS or more steps
    of the allowed values; otherwise the later one is a variant of the earlier. A design whose
    :func:`design_key` is in ``keep`` (the front's) is never folded into another.

    In rank order each design joins the first kept design it is near, or is kept. Per topology
    and device, FOLD_BLOCK designs at a time are compared with every design kept before them
    and with each other in one array step each; only the order within a block is walked."""
    groups: dict[tuple[str, str], list[int]] = {}
    for k, r in enumerate(ranked):
        groups.setdefault((r["topology"], r["device"]), []).append(k)
    into = list(range(len(ranked)))  # the design each folds into (itself where kept)
    for members in groups.values():
        steps = _role_steps(space, [ranked[k] for k in members])
        kept_rows = np.empty_like(steps)
        kept: list[int] = []  # positions in members, in rank order
        for start in range(0, len(members), FOLD_BLOCK):
            block = steps[start : start + FOLD_BLOCK]
            prior = _first_near(kept_rows[: len(kept)], block)  # -1: near no design kept before the block
            within = _near(block, block).tolist()
            block_kept: list[int] = []
            for i, first in enumerate(prior.tolist()):
                k = members[start + i]
                if not (keep and design_key(ranked[k]) in keep):
                    if first >= 0:
                        into[k] = members[kept[first]]
                        continue
                    earlier = next((j for j in block_kept if within[j][i]), None)
                    if earlier is not None:
                        into[k] = members[start + earlier]
                        continue
                kept_rows[len(kept)] = block[i]
                kept.append(start + i)
                block_kept.append(i)
    out: list[dict] = []
    at: dict[int, int] = {}  # a kept design's place in out
    for k, r in enumerate(ranked):
        if into[k] == k:
            at[k] = len(out)
            out.append({**r, "variants": 1})
        else:
            out[at[into[k]]]["variants"] += 1
    return out


def _role_steps(space: SearchSpace, records: list[dict]) -> np.ndarray:
    """The index of each record's part values in its series (one row per record, a column per
    role; an absent part far from any value)."""
    roles = sorted(records[0]["parts"])
    columns = []
    for role in roles:
        table = space.capacitors if role.startswith("c_") else space.resistors
        v = np.array([r["parts"].get(role, 0.0) for r in records])
        columns.append(np.where(v > 0, table.index_of(np.where(v > 0, v, 1.0)), -10 * NEAR_STEPS))
    return np.stack(columns, axis=1).astype(np.int32) if columns else np.zeros((len(records), 0), dtype=np.int32)


def _near(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """(len(a), len(b)) bool: rows of ``a`` and ``b`` that are not distinct (fewer than
    DISTINCT_ROLES roles NEAR_STEPS or more apart)."""
    far = np.zeros((len(a), len(b)), dtype=np.int8)
    for role in range(a.shape[1]):  # a pass per role over 2-D arrays (a reduction along roles costs more)
        far += np.abs(a[:, None, role] - b[None, :, role]) >= NEAR_STEPS
    return far < DISTINCT_ROLES


def _first_near(kept: np.ndarray, block: np.ndarray, rows: int = 4096) -> np.ndarray:
    """For each row of ``block``, the first row of ``kept`` near it (-1 where none), compared
    ``rows`` kept rows at a time (a bounded working set)."""
    first = np.full(len(block), -1)
    for start in range(0, len(kept), rows):
        near = _near(kept[start : start + rows], block)
        found = (first < 0) & near.any(axis=0)
        first[found] = start + near.argmax(axis=0)[found]
    return first


def _limit_metric(limit: str) -> tuple[str | None, str]:
    """The metric a limit judges and its unit (for saying what relaxing it would take)."""
    table = {name: metric for name, metric, _ in LIMIT_METRICS}
    table.update(
        {
            "gain": "gain_db",
            "band_low": "f_low",
            "band_high": "f_high",
            "midband": "midband_deviation",
            "yield": "yield",
        }
    )
    metric = table.get(limit)
    return metric, metric_unit(metric or "")


ROBUSTNESS_LIMITS = ("yield", "worst_case")


JFET_FOLLOWER = "jfet_follower"  # the JFET input stage a bipolar follower's input-impedance limit points to
JFET_COMMON_SOURCE = "jfet_common_source"  # the inverting one a gain lost to a high source impedance points to


def jfet_hint(spec: Spec, limits: tuple[str, ...], record: dict | None) -> str:
    """A suggestion when a bipolar stage cannot take the source and the spec lists no JFET: a
    follower's input impedance limit binds, or the gain binds where the source's impedance is
    above the nearest design's input impedance (the divider they make costs more than half the
    gain). It names the catalog's JFETs that would let a JFET stage compete (its gate draws no
    base current, so its input is the gate resistor's megohms): jfet_follower for a
    non-inverting spec, jfet_common_source for an inverting one; "" otherwise."""
    if record is None:
        return ""
    stage = get_topology(record["topology"])
    if stage.device_kind != "bjt":
        return ""
    z_in = (record.get("metrics") or {}).get("input_impedance")
    follower = "input_impedance_min" in limits and not stage.inverting and stage.transistors == 1
    loaded = "gain" in limits and z_in is not None and spec.source_impedance > z_in
    if not (follower or loaded):
        return ""
    rows = load_catalog(spec.parts.catalog).transistors
    jfets = [str(i) for i, p in zip(rows["id"], rows["polarity"]) if str(p).lower() == "njf"]
    if not jfets or set(jfets) & set(spec.devices):
        return ""
    name = JFET_COMMON_SOURCE if spec.gain.inverting else JFET_FOLLOWER
    jfet_stage = get_topology(name)
    needs = [] if name in spec.topologies else [f"{name} in topologies"]
    if spec.supply_arrangement not in jfet_stage.supplies:
        needs.append(f"a {' or '.join(jfet_stage.supplies)} supply ({name} runs on no other)")
    why = (
        "a bipolar follower's input impedance binds"
        if follower
        else f"the {format_value(spec.source_impedance, 'ohm')} source against the nearest design's "
        f"{format_value(z_in, 'ohm')} input impedance costs most of the gain"
    )
    return f"; {why} and the spec lists no JFET: list {' or '.join(jfets)} in devices to let {name} compete" + (
        f" (it also needs {' and '.join(needs)})" if needs else ""
    )


def capacitor_rating_hint(limits: tuple[str, ...], record: dict | None, capacitors: PartTable | None) -> str:
    """What a capacitor's voltage rating binding asks of the catalog: the part its value takes
    is rated too low for the voltage across it, and a rating is no limit a spec relaxes ("" when
    no capacitor's rating binds alone)."""
    if record is None or capacitors is None or len(limits) != 1 or not limits[0].startswith("rating:v_c_"):
        return ""
    role = limits[0].removeprefix("rating:v_")
    value = record["parts"].get(role, 0.0)
    if value <= 0:
        return ""
    k = int(capacitors.index_of(np.array([value]))[0])
    rated = capacitors.rating[k]
    if not np.isfinite(rated) or rated <= 0:
        return ""
    derated = CAPACITOR_VOLTAGE_DERATING * float(rated)
    seen = derated * (1.0 + record["violations"][limits[0]])  # the violation is (seen - derated) / derated
    label = format_value(value, "F")
    return (
        f"; {role} ({label}) sees {seen:.3g} V and its part {capacitors.part_id[k]} is rated {float(rated):.3g} V, "
        f"{derated:.3g} V at the {100 * CAPACITOR_VOLTAGE_DERATING:.0f} % derating: a {label} part rated "
        f"{seen / CAPACITOR_VOLTAGE_DERATING:.3g} V or more in the catalog would give an answer"
    )


def dissipation_hint(spec: Spec, limits: tuple[str, ...]) -> str:
    """What the transistor's dissipation binding alone asks of the spec where its highest ambient
    leaves the junction no dissipation at all (the rating derated to 0 W): no part has one; ""
    otherwise."""
    if limits != ("rating:q_power",) or transistor_derating(spec.temperature[1]) > 0.0:
        return ""
    return (
        f"; at the spec's highest ambient, {spec.temperature[1]:g} °C, a transistor may dissipate nothing "
        "(its junction's limit): a lower top of the temperature range would give an answer"
    )


def resistor_range_hint(spec: Spec, limits: tuple[str, ...], resistors: PartTable | None) -> str:
    """A suggestion when the input impedance limit binds above the largest resistor the search
    may choose (the top of parts.resistor_range, or of the catalog's values in it): a stage's
    input impedance is mostly its bias resistors' (the divider's, the gate resistor's), so no
    choice of parts reaches it; "" otherwise."""
    asked = spec.limits.input_impedance_min
    if "input_impedance_min" not in limits or asked is None:
        return ""
    top = float(np.max(resistors.values)) if resistors is not None else spec.parts.resistor_range[1]
    if asked <= top:
        return ""
    return (
        f"; the input impedance asked ({format_value(asked, 'ohm')}) is above the largest resistor the search may "
        f"choose ({format_value(top, 'ohm')}): a stage's input impedance is mostly its bias resistors' (a "
        "bootstrapped follower's excepted), so a wider parts.resistor_range, or a catalog with larger values, "
        "may give an answer"
    )


def relax_one_limit(
    spec: Spec, ranked: list[dict], capacitors: PartTable | None = None, resistors: PartTable | None = None
) -> dict:
    """Why a spec has no answer: the limit whose relaxation alone would give one.

    Among the evaluated designs, those that miss exactly one limit name it; the limit missed
    by the smallest normalised amount (that limit's own violation) binds, and the best value such a design reaches (at
    nominal) is what the limit would have to be relaxed to, with a margin for spread. A design
    missing a limit at nominal also misses the robustness limit; that one is named only
    when nothing else is missed. Where no design misses only one limit, the pair
    missed together by the smallest amount binds. Where a bipolar follower's input impedance binds
    and the spec lists no JFET, the text names the catalog's JFETs (:func:`jfet_hint`); where a
    capacitor's voltage rating binds alone, the rating its value's part would need
    (:func:`capacitor_rating_hint`, given the search space's ``capacitors``); where the input
    impedance binds above the largest resistor, that (:func:`resistor_range_hint`, given its
    ``resistors``). Where every design misses three limits or more, no relaxation of one or two
    is claimed: the nearest design's missed limits are named, the largest miss first. A value
    reached is shown with the digits that tell it from the value asked. Returns {binding:
    [limits], reached: {limit: value (SI) or None}, unit: {limit: unit}, text}."""

    def missed_by(r: dict) -> tuple[str, ...]:  # spread fails what nominal fails: name the limit
        return tuple(sorted(k for k in r["violations"] if k not in ROBUSTNESS_LIMITS)) or tuple(sorted(r["violations"]))

    best: dict[tuple[str, ...], tuple[float, dict]] = {}
    for r in ranked:
        missed = missed_by(r)
        amount = sum(r["violations"][k] for k in missed)
        if 1 <= len(missed) <= 2 and (missed not in best or amount < best[missed][0]):
            best[missed] = (amount, r)
    for size in (1, 2):
        options = {k: v for k, v in best.items() if len(k) == size}
        if options:
            limits = min(options, key=lambda k: options[k][0])
            record = options[limits][1]
            break
    else:  # every design misses three limits or more: the nearest one's, the largest miss first
        record = ranked[0] if ranked else None
        limits = tuple(sorted(missed_by(record), key=lambda k: -record["violations"][k])) if record else ()
    reached: dict[str, float | None] = {}
    units: dict[str, str] = {}
    for limit in limits:
        metric, units[limit] = _limit_metric(limit)
        reached[limit] = record["metrics"].get(metric) if record and metric else None

    def show(value: float | None, limit: str, digits: int = 3) -> str | None:
        if value is None:
            return None
        if limit in ("yield", "thd_max", "midband"):
            return f"{100 * value:.{digits}g} %"
        return f"{value:.{digits}g} dB" if units[limit] == "dB" else format_value(value, units[limit], digits=digits)

    def show_reached(value: float, limit: str, asked: str | None) -> str | None:
        """``value`` with the digits (3 to 6) that tell it from the value asked."""
        digits = 3
        while digits < 6 and show(value, limit, digits) == asked:
            digits += 1
        return show(value, limit, digits)

    asked = {name: getattr(spec.limits, name) for name, _, _ in LIMIT_METRICS}
    asked.update(
        {
            "yield": spec.limits.yield_min,
            "band_low": spec.band[0],
            "band_high": spec.band[1],
            "midband": MIDBAND_DEVIATION_MAX,
        }
    )
    parts = []
    for limit in limits:
        if limit == "gain":
            wanted = f"{spec.gain_target_db:.3g} dB +- {spec.gain.tolerance_db:.2g} dB"
        else:
            wanted = show(asked.get(limit), limit)
        facts = [
            f"the spec asks {wanted}" if wanted else "",
            f"the nearest design reaches {show_reached(reached[limit], limit, wanted)}"
            if reached[limit] is not None
            else "",
        ]
        facts = [f for f in facts if f]
        parts.append(f"{limit} ({'; '.join(facts)})" if facts else limit)
    rating = capacitor_rating_hint(tuple(limits), record, capacitors) or dissipation_hint(spec, tuple(limits))
    if not limits:
        text = "no design was evaluated"
    elif rating:  # a part's rating, not a limit of the spec's to relax
        text = f"no design meets every limit; {parts[0]} binds"
    elif len(limits) == 1:
        text = (
            f"no design meets every limit; {parts[0]} binds: relaxing it alone (with a margin for spread) "
            "would give an answer"
        )
    elif len(limits) == 2:
        text = f"no design meets every limit, and no single limit is to blame: {' and '.join(parts)} bind together"
    else:
        text = (
            "no design meets every limit, and every design evaluated misses three or more at once: the nearest "
            f"misses {', '.join(parts[:-1])} and {parts[-1]}"
        )
    text += jfet_hint(spec, tuple(limits), record) + resistor_range_hint(spec, tuple(limits), resistors) + rating
    return {"binding": list(limits), "reached": reached, "unit": units, "text": text}


def candidate_from_record(space: SearchSpace, record: dict) -> dict:
    """The candidate record of a trial record (nominal figures; no spread): the ranked tail
    and the front points that are not assessed in full. A part left out keeps its role at 0."""
    return candidates_from_records(space, [record])[0]


def candidates_from_records(space: SearchSpace, records: list[dict]) -> list[dict]:
    """:func:`candidate_from_record` of each of ``records``, in order; each kind of part's
    catalog ids looked up for every record at once."""
    tables = {"c": space.capacitors, "r": space.resistors}
    wanted: dict[str, list[float]] = {"c": [], "r": []}
    for record in records:
        for role, value in record["parts"].items():
            if value > 0:
                wanted["c" if role.startswith("c_") else "r"].append(value)
    part_ids = {
        kind: iter(tables[kind].part_id[tables[kind].index_of(np.array(values))]) if values else iter(())
        for kind, values in wanted.items()
    }
    conditions = record_conditions(space.spec)
    out = []
    for record in records:
        parts = {}
        for role, value in record["parts"].items():
            if value <= 0 and role in SUPPLY_PARTS:
                continue  # no decoupling RC: the stage sits on the rail
            part_id = next(part_ids["c" if role.startswith("c_") else "r"]) if value > 0 else None
            parts[role] = {"value": value, "label": part_label(role, value), "part_id": part_id}
        out.append(
            candidate_record(
                topology=record["topology"],
                feasible=record["feasible"],
                score=record["score"],
                binding=record["binding"],
                conditions=conditions,
                parts=parts,
                transistor=space.devices[record["device"]].record(),
                metrics=dict(record["metrics"]),
                violations=dict(record["violations"]),
                **{k: record[k] for k in ("basis", "score_terms", "note", "variants") if k in record},
                trial=record.get("trial"),
            )
        )
    return out


def shortlist_candidates(space: SearchSpace, records: list[dict], samples: int) -> list[dict]:
    """The full assessment (worst case, yield, ratings, cautions) of ranked designs, judged
    together (candidates.assess_many); each score is the record's times the yield of its
    builds (on the yield basis)."""
    full = FullAssessments(space, samples)
    full.assess(records)
    return [full.candidate(r) for r in records]


class FullAssessments:
    """Full assessments (candidates.assess_many, ``samples`` builds) of designs by
    :func:`design_key`: the designs asked for in one :meth:`assess` are judged together, each
    design once however often it is asked for; :meth:`candidate` makes a record's shortlist
    candidate from its design's assessment (the same as :func:`shortlist_candidates` of it)."""

    def __init__(self, space: SearchSpace, samples: int) -> None:
        self.space, self.samples = space, samples
        self.done: dict[tuple, dict] = {}  # design_key -> assess_many's record (never changed here)

    def assess(self, records: list[dict]) -> None:
        """Assess the designs of ``records`` not assessed yet, in one assess_many call."""
        from optimizer.candidates import assess_many  # the single place a design is judged in full

        new = list({design_key(r): r for r in records if design_key(r) not in self.done}.items())
        if new:
            assessed = assess_many(
                self.space.spec,
                self.space.catalog,
                [(r["topology"], dict(r["parts"]), r["device"]) for _, r in new],
                samples=self.samples,
            )
            self.done.update((key, full) for (key, _), full in zip(new, assessed))

    def candidate(self, record: dict) -> dict:
        """The shortlist candidate of ``record``, whose design has been assessed."""
        full = self.done[design_key(record)]
        return _shortlisted(record, {**full, "metrics": dict(full["metrics"])})


def _shortlisted(record: dict, full: dict) -> dict:
    full["metrics"].update({k: record["metrics"][k] for k in ("cost", "unique_values") if k in record["metrics"]})
    build_yield = full["metrics"].get("yield")
    terms = dict(record.get("score_terms") or {})
    if build_yield is not None:
        terms["yield"] = round(build_yield, 4)
    violations = full["violations"]
    total = float(sum(violations.values()))
    full.update(
        score=record["score"] * (1.0 if build_yield is None else build_yield) if full["feasible"] else -total,
        total_violation=total,
        binding=str(binding_limit(violations)) if violations else "",
        nominal_score=record["score"],
        score_terms=terms,
        trial=record.get("trial"),
        variants=record.get("variants", 1),
    )
    return candidate_record(**full)


def trial_record(trial: optuna.trial.FrozenTrial) -> dict | None:
    """The design record a finished trial carries (user attr ``record``, kept as JSON text:
    Optuna deep-copies a trial's attributes on every tell, and text copies for free)."""
    record = trial.user_attrs.get("record")
    return json.loads(record) if isinstance(record, str) else record


def rank_key(trial: optuna.trial.FrozenTrial) -> tuple[int, float]:
    """Best first: feasible by score, then infeasible by summed violation."""
    record = trial_record(trial)
    if not record:
        return (2, 0.0)
    return (0, -record["score"]) if record["feasible"] else (1, record["total_violation"])


def front_records(space: SearchSpace, ranked: list[dict]) -> list[dict]:
    feasible = [r for r in ranked if r["feasible"]]
    if not feasible:
        return []
    directions = [d for _, d in space.spec.objective_directions]
    mask = pareto_mask(np.array([r["objectives"] for r in feasible]), directions)
    points = [r for r, keep in zip(feasible, mask) if keep]
    return sorted(points, key=lambda r: r["objectives"][0])
