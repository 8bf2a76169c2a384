"""The candidate record: one typed record of a judged design (DESIGN.md's candidate JSON).

:class:`Candidate` is the type; :func:`candidate_record` is the one place a record is made
(checked against the type and turned into the plain JSON-ready dict every output reads).
The full assessment (``candidates.assess``: worst case, yield, ratings, cautions) and the
search's nominal records (``search.candidate_from_record``) both go through it, so every
rank carries the same blocks; the optional ones are left out where a record has no figure
for them. The REST service's OpenAPI schema for a candidate is generated from the type.
"""

from __future__ import annotations

from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field

from optimizer import scoring
from optimizer.spec import Spec
from optimizer.units import format_value


class _Block(BaseModel):
    model_config = ConfigDict(extra="forbid")


class PartEntry(_Block):
    """One part of the design: value (ohm or F), the designer's label and the catalog row."""

    value: float
    label: str
    part_id: str | None = None


class Rating(_Block):
    """A part's stress and its derated limit (W, or V for capacitors and Vce)."""

    value: float
    limit: float


class Basis(_Block):
    """On what basis the design meets the spec (nominal, worst case or yield)."""

    kind: Literal["yield", "worst_case", "nominal"]
    met: bool
    label: str


class RecordConditions(_Block):
    """The spec's operating conditions the design was judged under; SI units."""

    supply: float
    supply_range: list[float] = Field(description="[low, high] V")
    source_impedance: float
    load_impedance: float
    band: list[float] = Field(description="[low, high] Hz")
    temperature: list[float] = Field(description="[low, high] °C")
    load_capacitance: float
    signal_vpp: float
    rails: list[float] | None = Field(
        None,
        description=(
            "[highest, lowest] rail, V, true (ground-referenced) volts: given for a negative rail or a split "
            "supply; absent, the supply is a positive rail [supply, 0]"
        ),
    )


class Candidate(_Block):
    """A self-contained candidate design (DESIGN.md candidate JSON); SI units. Metrics are
    described in optimizer/metrics.py. The full assessment adds the operating point and its
    spread, ratings, worst case and cautions; a ranked record adds rank, score and trial."""

    topology: str
    feasible: bool
    conditions: RecordConditions
    parts: dict[str, PartEntry]
    transistor: dict[str, Any]
    metrics: dict[str, float | None] = Field(
        description=(
            "DESIGN.md metric names, SI units; null where the model has no figure (a transistor not active has no "
            "small-signal figures). swing_vpp: usable swing, the largest sine at the load whose two peaks stay within "
            "10 % of the linear gain times the drive (V p-p); clip_vpp: hard clip level of the AC load line (V p-p); "
            "yield: fraction of Monte Carlo builds meeting every hard limit; ic_spread: max/min collector current "
            "over the corners"
        )
    )
    violations: dict[str, float]
    basis: Basis | None = None
    rank: int | None = None
    score: float | None = None
    binding: str | None = None
    total_violation: float | None = None
    nominal_score: float | None = None
    score_terms: dict[str, float | None] | None = Field(
        None, description="each term of the desirability score, 1 at its ideal"
    )
    operating_point: dict[str, float] | None = None
    operating_point_spread: dict[str, list[float]] | None = None
    ratings: dict[str, Rating] | None = None
    worst_case: dict[str, list[float | None]] | None = None
    cautions: list[str] | None = None
    note: str | None = None
    trial: int | None = None
    variants: int | None = Field(None, description="near-identical designs folded into this one, itself included")
    objectives: list[float] | None = Field(None, description="objective values (front points only)")


def record_conditions(spec: Spec) -> dict:
    """The record's conditions block of ``spec`` (the signal level and load capacitance as
    the models see them)."""
    conditions = scoring.conditions_from_spec(spec)
    out = {
        "supply": spec.supply,
        "supply_range": [spec.supply_min, spec.supply_max],
        "source_impedance": spec.source_impedance,
        "load_impedance": spec.load_impedance,
        "band": list(spec.band),
        "temperature": list(spec.temperature),
        "load_capacitance": conditions.load_capacitance,
        "signal_vpp": conditions.signal_vpp,
    }
    if spec.supply_arrangement != "positive":
        out["rails"] = list(spec.rails)
    return out


def part_label(role: str, value: float) -> str:
    """The designer's label of a part value ("68k", "2.2 µF"): capacitors in F, resistors bare;
    "direct" for c_in left out (0: the source wired to the base, a direct-coupled input)."""
    if role == "c_in" and value == 0:
        return "direct"
    return format_value(value, "F" if role.startswith("c_") else "")


def candidate_record(**fields: Any) -> dict:
    """The one way a candidate record is made: ``fields`` checked against :class:`Candidate`,
    returned as the JSON-ready dict (only the blocks given; a not-active design's
    small-signal metrics withheld, see ``scoring.withhold_small_signal``)."""
    record = Candidate(**fields).model_dump(exclude_unset=True)
    if record.get("operating_point", {}).get("active", 1.0) == 0.0:
        scoring.withhold_small_signal(record)
    return record


def candidate_schema(ref_prefix: str) -> dict[str, dict]:
    """JSON Schema of :class:`Candidate` and its blocks, by name, with references written as
    ``ref_prefix + name`` (for an OpenAPI document's components)."""
    schema = Candidate.model_json_schema(ref_template=ref_prefix + "{model}")
    defs = schema.pop("$defs", {})
    return {"Candidate": schema, **defs}


__all__ = [
    "Candidate",
    "PartEntry",
    "Rating",
    "Basis",
    "RecordConditions",
    "candidate_record",
    "record_conditions",
    "part_label",
    "candidate_schema",
]
