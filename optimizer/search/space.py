"""The search space: ordered indices into each role's allowed values, the topology and the device."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import optuna

from optimizer import scoring
from optimizer.catalog import Catalog, load_catalog
from optimizer.devices import AnyDevice, device_from_row
from optimizer.errors import InputError
from optimizer.sampler import asked_in_order
from optimizer.spec import Spec
from optimizer.synthesis import hand_requirements, rounded_designs
from optimizer.topologies import get_topology
from optimizer.validation import validate_spec

ABSENT_RATING = 1e30  # W: the rating of a part left out (never binds)


ABSENT = -1  # index of an optional part left out (feedback_ce without an emitter resistor)


@dataclass(frozen=True)
class PartTable:
    """Allowed values of one kind of part (sorted, SI) with the catalog row chosen for each."""

    values: np.ndarray
    part_id: np.ndarray  # object array of str
    tolerance: np.ndarray  # fraction
    rating: np.ndarray  # W for resistors, V for capacitors
    unit_price: np.ndarray

    @classmethod
    def from_catalog(
        cls, catalog: Catalog, kind: str, values: np.ndarray, allow_class2: bool = False, voltage_min: float = 0.0
    ) -> "PartTable":
        """The catalog's pick (Catalog.parts_for) for each of ``values`` (ohm or F)."""
        rows = catalog.parts_for(kind, values, allow_class2=allow_class2, voltage_min=voltage_min)
        rating_key = "power_rating" if kind == "resistor" else "voltage_rating"
        return cls(
            values=np.asarray(values, dtype=float),
            part_id=rows["part_id"],
            tolerance=rows["tolerance"],
            rating=rows[rating_key],
            unit_price=rows["unit_price"],
        )

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
        c_values = catalog.capacitor_values(
            p.capacitor_series, *p.capacitor_range, in_stock_only=p.in_stock_only, allow_class2=p.allow_class2_coupling
        )
        stock_note = " in stock" if p.in_stock_only else ""
        if r_values.size < 2:
            raise InputError.single(
                "parts.resistor_range",
                list(p.resistor_range),
                f"a range holding at least two {p.resistor_series} resistors{stock_note} in catalog {catalog.name!r}",
                title="empty search space",
            )
        if c_values.size < 1:
            raise InputError.single(
                "parts.capacitor_range",
                list(p.capacitor_range),
                f"a range holding at least one {p.capacitor_series} capacitor{stock_note} in catalog {catalog.name!r}",
                title="empty search space",
            )
        devices = {d: device_from_row(catalog.transistor(d)) for d in spec.devices}
        prices = {d: float(catalog.transistor(d).get("unit_price") or 0.0) for d in spec.devices}
        return cls(
            spec,
            catalog,
            PartTable.from_catalog(catalog, "resistor", r_values),
            PartTable.from_catalog(
                catalog, "capacitor", c_values, p.allow_class2_coupling, scoring.capacitor_rating_wanted(spec)
            ),
            devices,
            prices,
            tuple(v.topology for v in verdicts),
            {v.topology: v.devices for v in verdicts},
        )

    @property
    def offers_decoupling(self) -> bool:
        """Whether designs may add a supply decoupling RC (r_decouple, c_decouple): when the spec
        sets a least supply rejection (limits.psrr_min_db) and the RC is drawn for every device's
        stage: NPN on a positive rail, PNP on a negative one (the rail that is not ground)."""
        wanted = {"positive": "npn", "negative": "pnp"}.get(self.spec.supply_arrangement)
        return self.spec.limits.psrr_min_db is not None and all(d.polarity == wanted for d in self.devices.values())

    def direct_input(self, topology: str) -> bool:
        """Whether ``topology``'s designs take the source without c_in (c_in 0, not searched or
        sized): the spec's source passes DC and the stage's base sits at ground on its split
        supply (Topology.couples_directly)."""
        return get_topology(topology).couples_directly(self.spec.supply_arrangement, self.spec.input_coupling)

    @property
    def sizing_target(self) -> float:
        """Low corner (Hz) capacitors are sized for (scoring.sizing_target)."""
        return scoring.sizing_target(self.spec, self.capacitors.tolerance)

    # ---- trials <-> designs ----------------------------------------------------------
    def suggest(self, trial: optuna.Trial) -> Design:
        """Ask ``trial`` for a design (parameters: topology, device, <topology>.<role> indices,
        each asked in the order of :meth:`distributions`, the topology first: the search's one
        order, :func:`~optimizer.sampler.asked_in_order`)."""
        params: dict[str, Any] = {}
        for name, d in asked_in_order(self.distributions, params):
            params[name] = (
                trial.suggest_categorical(name, d.choices)
                if isinstance(d, optuna.distributions.CategoricalDistribution)
                else trial.suggest_int(name, d.low, d.high)
            )
        return self.design_of(params)

    def design_of(self, params: dict[str, Any]) -> Design:
        """The design that trial parameters ``params`` (all of its topology's) choose."""
        topology = str(params.get("topology", self.topologies[0]))
        name = self.device_param(topology)
        device = str(params[name]) if name else self.devices_of(topology)[0]
        return Design(
            topology,
            device,
            tuple((n.split(".", 1)[1], int(params[n])) for n in self.distributions(params) if "." in n),
        )

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
        for role in self.resistor_roles(topology):
            out[f"{topology}.{role}"] = optuna.distributions.IntDistribution(
                ABSENT if role in model.optional_parts else 0, top
            )
        if self.offers_decoupling:  # a supply decoupling RC when the spec asks for rejection
            out[f"{topology}.r_decouple"] = optuna.distributions.IntDistribution(ABSENT, top)
        if self.spec.search.capacitors == "searched":
            for role in model.capacitors:
                if role == "c_in" and self.direct_input(topology):
                    continue  # the source is wired to the base
                out[f"{topology}.{role}"] = optuna.distributions.IntDistribution(0, self.capacitors.values.size - 1)
        return out

    def resistor_roles(self, topology: str) -> tuple[str, ...]:
        """The resistor roles of ``topology`` a design chooses on the spec's supply (a split
        supply leaves out the topology's :meth:`~Topology.split_omitted`, e.g. r_top)."""
        model = get_topology(topology)
        omitted = model.split_omitted() if self.spec.supply_arrangement == "split" else ()
        return tuple(r for r in model.resistors if r not in omitted)

    def hand_parts(self, topology: str, device_id: str) -> dict[str, float] | None:
        """The hand method's unrounded design (role -> ohm or F) of ``topology`` with the
        device ``device_id`` on the spec's supply (the topology's split rule on a split
        supply); None when the hand method has no answer."""
        device = self.devices[device_id]
        below = self.spec.supply_below_ground
        try:
            req = hand_requirements(self.spec, device)
            model = get_topology(topology)
            if self.spec.supply_arrangement == "split":
                return model.split_hand_design(req, below if device.polarity == "npn" else 1.0 - below)
            return model.hand_design(req)
        except (InputError, ValueError, ZeroDivisionError):
            return None  # the hand method has no answer for this spec

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
                hand = self.hand_parts(topology, device_id)
                if hand is None:
                    continue  # no seed
                roles = [name.split(".", 1)[1] for name in self.distributions({"topology": topology}) if "." in name]
                chosen = {r: v for r, v in hand.items() if r in roles}
                if set(chosen) != set(roles) or not all(np.isfinite(v) and v > 0 for v in chosen.values()):
                    continue
                for rounded in rounded_designs(
                    chosen, self.spec.parts.resistor_series, self.spec.parts.capacitor_series, limit=16
                ):
                    out.append(
                        Design(
                            topology,
                            device_id,
                            tuple(
                                (
                                    r,
                                    int(
                                        (self.capacitors if r.startswith("c_") else self.resistors).index_of(
                                            np.array([rounded[r]])
                                        )[0]
                                    ),
                                )
                                for r in roles
                            ),
                        )
                    )
        return list(dict.fromkeys(out))
