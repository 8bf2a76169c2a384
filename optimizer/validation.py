"""Checks of a spec against its catalog and the topologies, run before any trial.

:func:`eligibility` says, for a spec and its catalog, which of the spec's topologies can meet
it and why each other cannot, from the topologies' declarations alone:

- the sign of the gain (``inverting``) against ``gain.inverting``;
- the supply arrangement (positive, negative or split rail) against ``supplies``;
- the spec's devices: their polarity (``polarities``) and kind (``device_kind``, "bjt" or
  "jfet"; a catalog row without a kind is a bipolar transistor).

It is the one place these rules live: `stagefit check` prints its verdicts before any search,
the search space holds only the eligible topologies, each paired only with its devices, and
:func:`validate_spec` (used by `stagefit check`, the search, the Python API and the REST
service's spec check, so all refuse the same specs) refuses a spec no topology can meet,
reporting every problem at once, each naming the field, the value and what would be valid.
"""

from __future__ import annotations

from dataclasses import dataclass

from optimizer.catalog import Catalog
from optimizer.errors import InputError, Problem
from optimizer.spec import Spec, check_against_catalog
from optimizer.topologies import Topology, get_topology

TITLE = "spec cannot be searched"


@dataclass(frozen=True)
class Verdict:
    """Whether one topology can meet a spec: the spec's devices it can be built with, and the
    reasons it cannot (empty when it can)."""

    topology: str
    devices: tuple[str, ...]
    reasons: tuple[str, ...]

    @property
    def eligible(self) -> bool:
        """True when nothing rules the topology out."""
        return not self.reasons


def device_traits(catalog: Catalog, device: str) -> tuple[str, str]:
    """(polarity, kind) of a catalog device: polarity "npn", "pnp" (or a JFET's channel), kind
    "bjt" unless the catalog row says otherwise, "jfet" for an n-channel JFET (polarity njf)."""
    row = catalog.transistor(device)
    polarity = str(row["polarity"]).lower()
    if polarity == "njf":  # the JFETs of jfets.csv join the table with their channel as polarity
        return polarity, "jfet"
    kind = row.get("kind")
    return polarity, "bjt" if kind is None or not str(kind).strip() else str(kind).lower()


def builds_with(topology: Topology, traits: tuple[str, str]) -> bool:
    """Whether ``topology`` can be built with a device of these (polarity, kind)."""
    return traits[1] == topology.device_kind and traits[0] in topology.polarities


def _traits_words(polarities: tuple[str, ...], kind: str) -> str:
    """'npn/pnp', or with the kind when it is not a bipolar transistor ('n-channel jfet')."""
    return "/".join(polarities) + ("" if kind == "bjt" else f" {kind}")


def eligibility(spec: Spec, catalog: Catalog) -> list[Verdict]:
    """A verdict for each of the spec's topologies, in the spec's order (devices missing from
    the catalog are left out here; :func:`validate_spec` reports them)."""
    known = set(str(i) for i in catalog.transistors["id"])
    traits = {d: device_traits(catalog, d) for d in spec.devices if d in known}
    verdicts = []
    for name in spec.topologies:
        t = get_topology(name)
        reasons = []
        if spec.gain.inverting is not None and t.inverting != spec.gain.inverting:
            reasons.append("inverting" if t.inverting else "non-inverting")
        if spec.supply_arrangement not in t.supplies:
            reasons.append(f"no {spec.supply_arrangement} supply: runs on {', '.join(t.supplies)}")
        devices = tuple(d for d, tr in traits.items() if builds_with(t, tr))
        if not devices:
            reasons.append(
                f"built with {_traits_words(t.polarities, t.device_kind)} devices; the spec's are "
                + ", ".join(f"{d} ({_traits_words((tr[0],), tr[1])})" for d, tr in traits.items())
            )
        verdicts.append(Verdict(name, devices, tuple(reasons)))
    return verdicts


def eligibility_text(spec: Spec, verdicts: list[Verdict]) -> str:
    """One line: the gain's sign and the supply, the topologies that can meet the spec and why
    each other cannot (e.g. "gain -10 is inverting, positive supply: divider_ce, ... can;
    feedback_pair cannot (non-inverting)")."""
    g = spec.gain
    sign = {True: "inverting", False: "non-inverting", None: "either sign"}[g.inverting]
    shown = f"{-g.target:g}" if g.inverting else f"+{g.target:g}" if g.inverting is False else f"{g.target:g}"
    can = [v.topology for v in verdicts if v.eligible]
    cannot = [f"{v.topology} cannot ({'; '.join(v.reasons)})" for v in verdicts if not v.eligible]
    return (
        f"gain {shown} is {sign}, {spec.supply_arrangement} supply: "
        + (f"{', '.join(can)} can" if can else "no topology can")
        + ("; " if cannot else "")
        + "; ".join(cannot)
    )


def input_coupling_text(spec: Spec, verdicts: list[Verdict]) -> str | None:
    """One line on a source that passes DC (``input_coupling: direct``): which eligible
    topologies take it without c_in and why each other keeps its capacitor; None when the spec
    keeps the default coupling capacitor."""
    if spec.input_coupling != "direct":
        return None
    eligible = [get_topology(v.topology) for v in verdicts if v.eligible]
    direct = [t.name for t in eligible if t.couples_directly(spec.supply_arrangement, spec.input_coupling)]
    if spec.supply_arrangement != "split":
        return (
            f"direct: every topology keeps c_in: on a {spec.supply_arrangement} supply the input sits at "
            "the bias divider's DC, not at 0 V (a split supply lets a ground-referenced base take the source "
            "directly)"
        )
    kept = [f"{t.name} keeps c_in ({t.direct_input_note})" for t in eligible if t.name not in direct]
    return "direct: " + "; ".join(
        (
            [
                f"{', '.join(direct)} take the source without c_in (the base sits at 0 V; the source's DC "
                "resistance joins the bias path and carries the base current)"
            ]
            if direct
            else []
        )
        + kept
    )


def eligible_topologies(spec: Spec, catalog: Catalog) -> tuple[str, ...]:
    """The spec's topologies that can meet it, in the spec's order."""
    return tuple(v.topology for v in eligibility(spec, catalog) if v.eligible)


def _problems(spec: Spec, verdicts: list[Verdict]) -> list[Problem]:
    """Why no topology can meet the spec, by field: the gain's sign when that alone rules every
    topology out, else the whole verdict on ``topologies``."""
    if any(v.eligible for v in verdicts):
        return []
    if all(v.reasons == ("inverting" if get_topology(v.topology).inverting else "non-inverting",) for v in verdicts):
        wanted = spec.gain.inverting
        sign = "an inverting" if wanted else "a non-inverting"
        shown = -spec.gain.target if wanted else spec.gain.target
        other = (
            "write a negative target (e.g. -10) or set gain.inverting: null to accept either sign"
            if not wanted
            else "set gain.inverting: null to accept either sign"
        )
        return [
            Problem(
                "gain.target",
                f"{shown:g}",
                f"a gain sign some topology of the spec gives: no topology in the spec "
                f"({', '.join(spec.topologies)}) gives {sign} gain; {other}",
            )
        ]
    return [
        Problem(
            "topologies",
            list(spec.topologies),
            f"at least one topology that can meet the spec: {eligibility_text(spec, verdicts)}",
        )
    ]


def validate_spec(spec: Spec, catalog: Catalog) -> list[Verdict]:
    """Raise InputError (every problem at once) unless ``spec`` can be searched in ``catalog``;
    the topologies' verdicts (:func:`eligibility`) when it can."""
    problems: list[Problem] = []
    try:
        check_against_catalog(spec, catalog)
    except InputError as error:
        problems += error.problems
    verdicts = eligibility(spec, catalog)
    problems += _problems(spec, verdicts)
    used = {d for v in verdicts if v.eligible for d in v.devices}
    if used:  # a device none of the eligible topologies is built with
        known = set(str(i) for i in catalog.transistors["id"])
        problems += [
            Problem(
                f"devices[{i}]",
                d,
                f"a device some eligible topology is built with: {d} is "
                f"{_traits_words((device_traits(catalog, d)[0],), device_traits(catalog, d)[1])}, and "
                + ", ".join(
                    f"{v.topology} is built with "
                    + _traits_words(get_topology(v.topology).polarities, get_topology(v.topology).device_kind)
                    for v in verdicts
                    if v.eligible
                ),
            )
            for i, d in enumerate(spec.devices)
            if d in known and d not in used
        ]
    if problems:
        raise InputError(problems, title=TITLE)
    return verdicts
