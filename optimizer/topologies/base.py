"""The interface every stage topology implements, and the shared evaluation flow.

A topology maps arrays of part values (leading candidate axis, SI units) plus a device
and the operating conditions to an operating point, metrics and ratings.
"""

from __future__ import annotations

import math
from abc import ABC, abstractmethod
from dataclasses import dataclass, field, replace
from typing import Any, Callable, ClassVar

import numpy as np

from optimizer import physics
from optimizer.devices import AnyDevice, device_columns, device_rows, saturation_current, thermal_voltage
from optimizer.errors import MISSING, InputError, Problem
from optimizer.synthesis import HandRequirements, on_split_supply

#: the registry: topology name -> model instance, in listing order (see :func:`register`).
#: Filled by importing the modules of this package (optimizer/topologies/__init__.py).
REGISTRY: dict[str, "Topology"] = {}

Parts = dict[str, np.ndarray]
CHUNK_FAST = 16384  # candidates per block (keeps the working set in cache)
# the full path's nodal solves run over (frequencies, candidates): fewer, longer calls (8192 against 4096:
# 1.03-1.12x the full-metric rate of every topology, the same figures, a third more memory)
CHUNK_FULL = 8192
METRICS = (
    "gain",
    "gain_db",
    "swing_vpp",
    "clip_vpp",
    "input_impedance",
    "output_impedance",
    "supply_current",
    "f_low",
    "f_high",
    "midband_deviation",
    "thd",
    "noise_ein_v",
    "noise_figure_db",
    "q_power",
    "part_count",
    "psrr_db",
    "psrr_ripple_db",
    "psrr_mid_db",
    "emitter_voltage",
    "loop_gain",
    "phase_margin_deg",
)
SUPPLY_PARTS = ("r_decouple", "c_decouple")  # optional supply decoupling RC of every stage (0 = direct rail)
# The supply decoupling RC's netlist elements, the same in every stage: (role, node a, node b).
# With r_decouple > 0 every element of the stage that returns to ``vcc`` moves to ``vloc``.
SUPPLY_ELEMENTS: tuple[tuple[str, str, str], ...] = (("r_decouple", "vcc", "vloc"), ("c_decouple", "vloc", "0"))
KINDS = {"r": "resistor", "c": "capacitor"}  # a role's kind from its prefix (DESIGN.md names: r_..., c_...)


@dataclass(frozen=True)
class Role:
    """One part position of a stage.

    kind "resistor": its value is one of the spec's ``parts.resistor_series`` within
    ``parts.resistor_range`` (ohm), chosen by the search; kind "capacitor": one of
    ``parts.capacitor_series`` within ``parts.capacitor_range`` (F), sized after the
    resistors for the band's low corner (or searched, with ``search.capacitors: searched``).
    ``optional``: the role may be left out (value 0, a short or no part)."""

    name: str
    kind: str
    optional: bool = False

    @property
    def unit(self) -> str:
        """SI unit of the role's value."""
        return "ohm" if self.kind == "resistor" else "F"

    @property
    def series_field(self) -> str:
        """The spec field holding the role's preferred-number series."""
        return f"parts.{self.kind}_series"


@dataclass(frozen=True)
class Conditions:
    """Mid-band operating conditions, SI units (V, ohm, Hz, degrees C, F, V peak-to-peak)."""

    supply: float
    source_impedance: float
    load_impedance: float
    band: tuple[float, float] = (20.0, 20000.0)
    # degC; an array gives each candidate its own (the Monte Carlo builds and corners of all
    # temperatures in one call), as supply may be
    temperature: float | np.ndarray = 27.0
    load_capacitance: float = 0.0
    signal_vpp: float = 1.0  # output level at which thd is given
    supply_max: float | None = None  # V, highest rail (capacitor ratings at power-up); None: supply
    ripple_frequency: float = 100.0  # Hz, where psrr_db is judged besides mid-band
    # fraction of the supply span below the signal ground: 0 a positive rail, 1 a negative rail,
    # between: a split supply (spec.supply_below_ground). The public methods take it in true
    # terms; inside the models it is the stage's frame's (see :func:`frame_conditions`). Like
    # the supply, it may be an array, one per candidate (a split supply's builds and corners),
    # when every element is of one arrangement (:func:`arrangement`)
    below_ground: float = 0.0

    @property
    def band_centre(self) -> float:
        """The band's centre (Hz): the geometric mean of its edges, where the mid-band figures are judged."""
        return math.sqrt(self.band[0] * self.band[1])

    @property
    def rail_max(self) -> float | np.ndarray:
        """Highest supply voltage the parts can see (V; per candidate when supply is an array)."""
        return self.supply if self.supply_max is None else np.maximum(self.supply, self.supply_max)

    @property
    def ground_rail_max(self) -> float | np.ndarray:
        """Highest voltage between signal ground and either rail (V): rail_max on a single rail, the
        larger rail's magnitude on a split supply (what a capacitor returned to ground can see)."""
        return self.rail_max * np.maximum(self.below_ground, 1.0 - self.below_ground)


SUPPLIES = ("positive", "negative", "split")  # supply arrangements (Topology.supplies)
# how a stage is biased on a split supply (Topology.split_bias): "ground_base" leaves r_top out
# and returns the base to ground through r_bottom alone; "span" keeps the stage's own bias
# network across the two rails (it does not see where ground sits: only the source and the
# load return there)
SPLIT_BIASES = ("ground_base", "span")
POLARITIES = ("npn", "pnp", "njf")


def arrangement(below_ground: float | np.ndarray) -> str:
    """The supply arrangement of a below-ground fraction (or of every element of an array of
    them, ValueError where they differ): "positive", "negative" or "split"."""
    if not np.ndim(below_ground):
        return "positive" if below_ground <= 0 else "negative" if below_ground >= 1 else "split"
    g = np.asarray(below_ground)
    low, high = bool(np.any(g <= 0)), bool(np.any(g >= 1))
    split = bool(np.any((g > 0) & (g < 1)))
    if low + high + split != 1:
        kinds = [k for k, present in (("positive", low), ("negative", high), ("split", split)) if present]
        raise ValueError(f"one model call takes one supply arrangement, not {kinds}")
    return "positive" if low else "negative" if high else "split"


def frame_conditions(conditions: Conditions, device: AnyDevice) -> Conditions:
    """The conditions in the frame the stage models compute in: an NPN stage on the span's
    rails with the signal ground ``below_ground`` of the span above the lowest rail. A PNP stage
    is the mirror image (every DC voltage negated), so its frame's ground sits at 1 minus the
    true fraction; a negative rail shifts the frame so the ground is its top rail."""
    if device.polarity == "pnp":
        return replace(conditions, below_ground=1.0 - conditions.below_ground)
    return conditions


def true_volts(v_frame: np.ndarray, device: AnyDevice, frame: Conditions) -> np.ndarray:
    """A DC node voltage of the frame (V above its lowest rail) in true, ground-referenced
    volts: shifted by the ground's place, negated for a PNP stage."""
    shifted = v_frame - frame.below_ground * np.asarray(frame.supply) if np.any(frame.below_ground) else v_frame
    return -shifted if device.polarity == "pnp" else shifted


@dataclass
class StageResult:
    """Metrics (DESIGN.md names), operating point and ratings, each an array over candidates."""

    metrics: dict[str, np.ndarray]
    operating_point: dict[str, np.ndarray]
    ratings: dict[str, np.ndarray] = field(default_factory=dict)


@dataclass
class Bias:
    """A solved operating point: public node voltages/currents and per-transistor small signal."""

    op: dict[str, np.ndarray]
    small_signal: list[dict[str, np.ndarray]]
    beta: np.ndarray | None = None  # hFE used (SPICE BF)


def _rows_of(
    rows: np.ndarray, n: int, p: Parts, c: Conditions, b: Bias, nvt: float | np.ndarray
) -> tuple[Parts, Conditions, Bias, float | np.ndarray]:
    """The parts, conditions (a per-candidate supply and temperature), bias and NF*VT of the
    candidates at ``rows`` of ``n``: every array over the candidates taken at those rows."""

    def take(v: Any) -> Any:
        return v[rows] if np.ndim(v) and np.shape(v)[0] == n else v

    sub = replace(c, supply=take(c.supply), temperature=take(c.temperature), below_ground=take(c.below_ground))
    bias = Bias(
        {k: take(v) for k, v in b.op.items()},
        [{k: take(v) for k, v in ss.items()} for ss in b.small_signal],
        take(b.beta),
    )
    return {k: take(v) for k, v in p.items()}, sub, bias, take(nvt)


def _source_resistance(b: Bias, conditions: Conditions) -> np.ndarray:
    """Source resistance per candidate (ohm), floored so a zero-ohm source stays solvable."""
    return np.maximum(np.full_like(b.op["ic"], conditions.source_impedance), physics.R_FLOOR)


def input_reactance(c_in: np.ndarray, s: complex | np.ndarray) -> np.ndarray:
    """Series impedance of c_in (ohm, complex) at complex frequency s (rad/s); 0 where c_in is
    absent (0): a direct-coupled input (:attr:`Topology.direct_input`)."""
    present = c_in > 0
    return np.where(present, 1.0 / (s * np.where(present, c_in, 1.0)), 0.0)


def couple_input(net: physics.Network, p: Parts, ac: bool) -> None:
    """c_in from the source node 'in' to 'base'; a wire where c_in is absent (0, direct-coupled)."""
    net.capacitor("in", "base", p["c_in"], ac, True)
    if np.any(p["c_in"] == 0):
        net.admittance("in", "base", np.where(p["c_in"] > 0, 0.0, physics.G_SHORT))


def input_hold(p: Parts, c: Conditions, op: dict[str, np.ndarray]) -> np.ndarray:
    """The DC (V, frame) the source's side of the base holds over a period: the base's own
    (c_in holds it), or the signal ground's where the source is direct-coupled (c_in 0)."""
    return np.where(p["c_in"] > 0, op["v_base"], c.below_ground * c.supply)


def register(cls: type["Topology"]) -> type["Topology"]:
    """Add a concrete topology class to :data:`REGISTRY` (called for every subclass that sets
    ``name``; a later class of the same name replaces the earlier) and keep the registry in
    listing order: ``order``, then name. Checks the class's declarations first (TypeError)."""
    cls.check_declarations()
    REGISTRY[cls.name] = cls()
    ordered = sorted(REGISTRY.values(), key=lambda t: (t.order, t.name))
    REGISTRY.clear()
    REGISTRY.update((t.name, t) for t in ordered)
    return cls


def unregister(name: str) -> None:
    """Remove a topology from :data:`REGISTRY` (tests that define their own)."""
    REGISTRY.pop(name, None)


class Topology(ABC):
    """One stage topology: everything the program knows about it, in one class.

    A concrete subclass (one module in optimizer/topologies/, see docs/adding_a_topology.md)
    declares the class attributes below and implements the models; defining it registers it.
    """

    name: ClassVar[str]  # DESIGN.md name, the spec's ``topologies`` entry
    description: ClassVar[str]  # one line for help texts, `stagefit topologies` and the docs
    order: ClassVar[int] = 100  # listing position (spec default order, help, listings): lower first
    resistors: ClassVar[tuple[str, ...]]  # resistor roles, r_...
    capacitors: ClassVar[tuple[str, ...]]  # capacitor roles, c_...
    transistors: ClassVar[int]
    inverting: ClassVar[bool]  # True: the mid-band gain source -> load is negative
    # transistor polarities the stage runs with ("npn", "pnp"): drawn as NPN, a PNP stage is its
    # mirror image (the polarity layer of StageModel)
    polarities: ClassVar[tuple[str, ...]]
    # supply arrangements the stage runs on, from SUPPLIES: drawn on a positive rail, a negative
    # rail shifts it; on "split" the stage is biased as split_bias says
    supplies: ClassVar[tuple[str, ...]] = ("positive", "negative")
    # from SPLIT_BIASES: "ground_base" needs the bias divider (r_top, r_bottom), r_top is left out
    # and r_bottom returns the base to ground; "span" runs the stage across both rails unchanged
    split_bias: ClassVar[str] = "ground_base"
    device_kind: ClassVar[str] = "bjt"  # the kind of device the stage is built with ("bjt", "jfet")
    # True: on a split supply the input (the base) is the bias tap r_bottom alone returns to
    # ground, so it sits at 0 V by design and a ground-referenced source that passes DC may
    # drive it without c_in (spec input_coupling: direct; c_in then 0, a wire)
    direct_input: ClassVar[bool] = False
    # why a stage without direct_input keeps c_in on a split supply (for `stagefit check`)
    direct_input_note: ClassVar[str] = "its input does not sit at ground on a split supply"
    optional_parts: ClassVar[tuple[str, ...]] = ()  # may be 0 (absent)
    supply_parts: ClassVar[tuple[str, ...]] = SUPPLY_PARTS  # optional everywhere: absent or 0 = direct rail
    # SPICE netlist template: every resistor and capacitor as (role, node a, node b) in signal
    # order from input to output (designators R1.., C1.. follow it), nodes named as in the
    # module docstring; ``vcc`` is the rail, ``src`` the source side of c_in, ``out`` the load,
    # ``0`` ground. Transistors as (role, collector, base, emitter), Q1, Q2.. in this order.
    elements: ClassVar[tuple[tuple[str, str, str], ...]]
    transistor_pins: ClassVar[tuple[tuple[str, str, str, str], ...]]
    # operating-point key of the DC voltage of each internal node (others: 0 V, or the rail)
    node_voltages: ClassVar[dict[str, str]]
    # operating-point keys of every transistor's Vce (V): the stage's headroom is the least
    vce_keys: ClassVar[tuple[str, ...]] = ("vce",)
    # resistor roles :meth:`gain_bound` reads (empty: the topology gives no bound)
    gain_bound_roles: ClassVar[tuple[str, ...]] = ()
    # false-position steps refining the -3 dB corners (physics.minus_3db_corners); more where the
    # response may peak near a corner (an overall feedback loop)
    corner_steps: ClassVar[int] = physics.REFINE_STEPS
    # True: the core metrics with c_in at its smallest and the other capacitors at their largest
    # are at least as good as the sized design's (mid-band figures that do not depend on the
    # capacitors), so the exhaustive oracle may prune by them; a stage whose mid-band gain
    # depends on its capacitors (a follower from a high source, a bootstrap) sets False
    core_is_bound: ClassVar[bool] = True

    def __init_subclass__(cls, **kwargs: object) -> None:
        super().__init_subclass__(**kwargs)
        if "name" in cls.__dict__:
            register(cls)

    @classmethod
    def check_declarations(cls) -> None:
        """TypeError unless the netlist template wires exactly the declared roles."""
        roles = set(cls.resistors) | set(cls.capacitors)
        wired = {role for role, _, _ in cls.elements}
        if wired != roles or len(wired) != len(cls.elements):
            raise TypeError(
                f"topology {cls.name}: elements must list each of {sorted(roles)} once, "
                f"got {[r for r, _, _ in cls.elements]}"
            )
        if len(cls.transistor_pins) != cls.transistors:
            raise TypeError(
                f"topology {cls.name}: {cls.transistors} transistors but {len(cls.transistor_pins)} transistor_pins"
            )
        if (
            not set(cls.supplies) <= set(SUPPLIES)
            or not set(cls.polarities) <= set(POLARITIES)
            or cls.split_bias not in SPLIT_BIASES
            or (
                "split" in cls.supplies
                and cls.split_bias == "ground_base"
                and not {"r_top", "r_bottom"} <= set(cls.resistors)
            )
        ):
            raise TypeError(
                f"topology {cls.name}: supplies from {SUPPLIES} ('split' with a split_bias from {SPLIT_BIASES}, "
                f"'ground_base' with r_top and r_bottom) and polarities from {POLARITIES}; got {cls.supplies}, "
                f"{cls.split_bias!r}, {cls.polarities}"
            )
        if cls.direct_input and not ("split" in cls.supplies and "c_in" in cls.capacitors):
            raise TypeError(f"topology {cls.name}: direct_input needs a split supply and c_in")
        bad = [r for r in roles | set(cls.optional_parts) if r[:1] not in KINDS or r[1:2] != "_"]
        if bad or not set(cls.optional_parts) <= roles:
            raise TypeError(
                f"topology {cls.name}: roles are named r_... or c_... and optional_parts "
                f"are among them; check {bad or sorted(set(cls.optional_parts) - roles)}"
            )

    @classmethod
    def split_omitted(cls) -> tuple[str, ...]:
        """The roles a split supply leaves out (absent, value 0): r_top of a ground-referenced base."""
        return ("r_top",) if cls.split_bias == "ground_base" else ()

    def split_hand_design(self, req: HandRequirements, ground: float) -> dict[str, float] | None:
        """The hand design on a split supply of span ``req.supply`` whose ground sits ``ground``
        of the span above the stage's emitter-side rail (ohm, F; the roles of
        :meth:`split_omitted` left out); None when the hand method has no answer there. By
        default the positive-rail design, moved to a ground-referenced base by
        :func:`synthesis.on_split_supply`, or as it is when the stage spans the rails."""
        hand = self.hand_design(req)
        return on_split_supply(hand, req, ground) if self.split_bias == "ground_base" else hand

    @property
    def roles(self) -> tuple[Role, ...]:
        """Every part role of the stage, resistors then capacitors (supply decoupling not included)."""
        return tuple(Role(r, KINDS[r[0]], r in self.optional_parts) for r in self.resistors + self.capacitors)

    def couples_directly(self, supply_arrangement: str, input_coupling: str) -> bool:
        """Whether the stage takes the source without c_in: a split supply, a stage whose base
        sits at ground (:attr:`direct_input`) and a source that passes DC (``input_coupling``
        "direct")."""
        return self.direct_input and supply_arrangement == "split" and input_coupling == "direct"

    def headroom(self, op: dict[str, np.ndarray], vce_sat: float) -> np.ndarray:
        """The least Vce of the stage's transistors above saturation and the active margin (V)."""
        vce = np.min([op[k] for k in self.vce_keys], axis=0)
        return vce - vce_sat - physics.ACTIVE_MARGIN

    def gain_bound(self, resistors: dict[str, np.ndarray], load: float) -> np.ndarray | None:
        """Upper bound of |gain| (V/V) from the resistors of :attr:`gain_bound_roles` and the
        load (ohm), for pruning an exhaustive enumeration; None: no bound known."""
        return None

    def capacitor_floors(
        self, resistors: dict[str, np.ndarray], conditions: Conditions, f_low: float
    ) -> dict[str, np.ndarray]:
        """Least values (F) some capacitors keep whatever the stage's low corner needs (capacitor
        role -> array over candidates), for a capacitor that does other work in band; {}: none."""
        return {}

    def hand_design(self, req: HandRequirements) -> dict[str, float]:
        """The unrounded textbook design (role -> ohm or F) that seeds the search and is the
        benchmarks' baseline; InputError when the hand method has no answer (no seed)."""
        raise InputError.single("topology", self.name, "a topology with a hand method", title="no hand design")

    def describe(self) -> dict:
        """JSON-ready summary: description, roles, polarities, supplies, device kind and gain sign."""
        return {
            "name": self.name,
            "description": self.description,
            "roles": [
                {"name": r.name, "kind": r.kind, "unit": r.unit, "series": r.series_field, "optional": r.optional}
                for r in self.roles
            ],
            "resistors": list(self.resistors),
            "capacitors": list(self.capacitors),
            "optional_parts": list(self.optional_parts),
            "transistors": self.transistors,
            "polarities": list(self.polarities),
            "supplies": list(self.supplies),
            "split_bias": self.split_bias,
            "device_kind": self.device_kind,
            "direct_input": self.direct_input,
            "gain_sign": "inverting" if self.inverting else "non-inverting",
        }

    @abstractmethod
    def operating_point(
        self, parts: Parts, device: AnyDevice, conditions: Conditions, hfe: np.ndarray | float | None = None
    ) -> dict[str, np.ndarray]:
        """DC node voltages (V), currents (A), vce (V), active flag, supply_current (A),
        v_supply_local (V, the stage's supply node after r_decouple) and v_out_q (V, the
        quiescent DC of the output node: the collector, or the follower's emitter)."""

    @abstractmethod
    def evaluate(
        self,
        parts: Parts,
        device: AnyDevice,
        conditions: Conditions,
        hfe: np.ndarray | float | None = None,
        *,
        full: bool = True,
        thd_solve: bool = False,
        noise: bool = True,
        swing_where: Callable[[StageResult], np.ndarray] | None = None,
        swing: bool = True,
        swing_floor: float | None = None,
    ) -> StageResult:
        """Metrics, operating point and ratings.

        full=False: the fast core; f_low, f_high and the noise figures are NaN. full=True adds
        the corners and noise from the nodal network (with noise=False the corners alone: the
        noise and supply-rejection figures stay NaN, for builds judged on a spec that limits
        neither). thd is the small-signal second-harmonic
        estimate unless thd_solve=True, which takes it from the quasi-static solve over one
        period (for the report of a chosen design; about as costly as the rest of full).

        swing_vpp (V peak-to-peak at the load) is the usable swing: the largest sine at the load
        whose two peaks are both within 10 % of the linear mid-band gain times the drive, found
        on the stage's static nonlinear transfer (:func:`physics.usable_swing`), its costliest
        figure: given ``swing_where`` (called once with every other figure of the candidates,
        swing_vpp NaN, returning a bool per candidate; for at most one chunk of candidates), it is
        solved only where that is True and left NaN elsewhere; with ``swing=False`` it is not
        solved at all (for a caller that has it from another call). Given ``swing_floor`` (V
        peak-to-peak: for a caller that judges the swing against that floor alone, as the Monte
        Carlo builds against a spec's swing_min), it is solved only where a few drives about the
        floor's cannot tell its side (a swing near the floor); elsewhere swing_vpp is a lower
        bound at or above the floor where the swing surely reaches it, NaN where it surely falls
        short (:func:`physics.swing_reaches`).
        clip_vpp (V
        peak-to-peak) is the hard clip level of the AC load line, 2*min(cutoff, saturation).
        psrr_ripple_db and psrr_mid_db (dB) are 20*log10(1/|H|) of the small-signal transfer
        from the supply rail to the load at conditions.ripple_frequency and at the band's
        geometric mean, psrr_db the smaller (worse) of the two; NaN in the core path.
        emitter_voltage (V) is the DC across the first stage's emitter resistor(s).
        """


class StageModel(Topology):
    """Shared evaluation flow; a topology supplies its bias, mid-band, swing, network and ratings."""

    # operating-point key of the bias divider's tap (V), where r_top and r_bottom meet: the base,
    # or the node a bootstrapped bias network feeds the base from
    divider_tap: ClassVar[str] = "v_base"

    # ---- hooks -------------------------------------------------------------------------
    @abstractmethod
    def _bias(self, p: Parts, device: AnyDevice, c: Conditions, beta: np.ndarray, nvt: float, i_s: float) -> Bias:
        """Solve the DC operating point (nvt, NF*VT in V, and i_s, IS(T) in A: floats, or arrays
        over the candidates where the temperature is per candidate)."""

    @abstractmethod
    def _midband(self, p: Parts, c: Conditions, b: Bias, r_source: np.ndarray) -> dict[str, np.ndarray]:
        """gain (V/V), input_impedance, output_impedance (ohm) and hd2_terms.

        hd2_terms lists, per transistor, (v_x per volt at the load, suppression, Early u, sign)
        for :func:`physics.thd_small_signal`; the signed second harmonics add.
        """

    @abstractmethod
    def _swing(
        self, p: Parts, device: AnyDevice, c: Conditions, b: Bias, mid: dict[str, np.ndarray]
    ) -> tuple[np.ndarray, np.ndarray]:
        """clip_vpp (V, the hard clip level at the load: 2*min of the AC load line's cutoff and
        saturation limits) and the largest Vce in operation (V)."""

    @abstractmethod
    def _network(
        self,
        p: Parts,
        c: Conditions,
        ss: list[dict[str, np.ndarray]],
        ac: bool,
        r_source: np.ndarray | None,
        load: bool,
        supply: bool = False,
    ) -> physics.Network:
        """Small-signal network with nodes 'in' (after the source impedance) and 'out' (the load).

        ac False: mid-band (coupling and bypass capacitors short, device and load capacitances
        open); r_source None: source removed; load False: load removed. Everything that returns
        to the supply connects to the rail node of :meth:`_new_network` (supply True, or a
        decoupling RC present: the node 'vcc', held by the supply source, and behind r_decouple
        the local node 'vloc'; otherwise AC ground).
        """

    @staticmethod
    def _new_network(
        nodes: tuple[str, ...], p: Parts, c: Conditions, ac: bool, supply: bool
    ) -> tuple[physics.Network, str | None]:
        """A network over ``nodes`` plus the supply nodes, and the node the stage returns to.

        The rail 'vcc' is tied to ground by the supply source's G_SHORT (a current G_SHORT
        into 'vcc' makes it a 1 V AC source, for the supply rejection); r_decouple runs from
        'vcc' to 'vloc', c_decouple from 'vloc' to ground (a bypass: a short at mid-band when
        present). Without a decoupling RC in the batch and without supply, the rail is ground.

        With supply, the signal ground is where the frame puts it (c.below_ground): the lowest
        rail (the reference node), the top rail 'vcc' (a negative rail), or on a split supply a
        node 'gnd' of its own, held by its own G_SHORT, where the source, the load and r_bottom
        return (net.ground, net.bias_ground).
        """
        decoupled = bool(np.any(p["r_decouple"] > 0))
        if not (decoupled or supply):
            return physics.Network(nodes, c.temperature), None
        split = supply and arrangement(c.below_ground) == "split"
        net = physics.Network(
            nodes + (("vloc", "vcc") if decoupled else ("vcc",)) + (("gnd",) if split else ()), c.temperature
        )
        net.admittance("vcc", None, np.full_like(p["r_decouple"], physics.G_SHORT))
        if split:
            net.admittance("gnd", None, np.full_like(p["r_decouple"], physics.G_SHORT))
            net.ground = net.bias_ground = "gnd"
        elif supply and arrangement(c.below_ground) == "negative":
            net.ground = "vcc"
        if not decoupled:
            return net, "vcc"
        net.resistor("vcc", "vloc", p["r_decouple"])
        net.capacitor("vloc", None, p["c_decouple"], ac, True)
        return net, "vloc"

    @abstractmethod
    def _ratings(self, p: Parts, c: Conditions, b: Bias) -> dict[str, np.ndarray]:
        """p_<resistor> (W, I^2 R at the evaluated supply) and v_<capacitor> (V, the largest
        voltage the capacitor can see: at c.rail_max, at power-up, with the output shorted).

        The rule per role: a coupling capacitor (c_in, c_out) can see the whole of the larger
        rail against ground (c.ground_rail_max: at power-up, uncharged, one side at a node that
        may sit at a rail, the other at ground through the source or the load; on a split supply
        that is the larger rail's magnitude, not the span) and c_decouple the full rail; a bypass capacitor (c_emitter) sees its node's DC, and
        the emitter node never rises above the base, whose highest voltage is the bias
        divider's open-circuit voltage at rail_max (the transistor only pulls the base down).
        """

    @abstractmethod
    def _output_q(self, op: dict[str, np.ndarray]) -> np.ndarray:
        """Quiescent DC voltage of the node c_out couples to the load (V)."""

    # ---- shared flow -------------------------------------------------------------------
    def check_parts(self, parts: Parts, conditions: Conditions | None = None) -> Parts:
        """Broadcast parts to float arrays over one candidate axis; InputError if any is missing or bad.

        The supply decoupling parts (r_decouple, c_decouple) may be left out: then 0 (absent).
        On a split supply (``conditions``) r_top is absent (0 or left out): r_bottom alone returns
        the base to ground; a stage with :attr:`direct_input` may leave c_in out (0): the source
        is then wired to the base."""
        split = conditions is not None and arrangement(conditions.below_ground) == "split"
        if split and "split" not in self.supplies:
            raise InputError.single(
                "supply",
                "split",
                f"one of {', '.join(self.supplies)} for {self.name}",
                title=f"{self.name} does not run on a split supply",
            )
        omitted = self.split_omitted() if split else ()
        for r in omitted:
            parts = {r: np.zeros(1), **parts}
            if np.any(np.asarray(parts[r], dtype=float) != 0):
                raise InputError.single(
                    f"parts.{r}",
                    parts[r],
                    "absent (0) on a split supply: the base returns to ground through r_bottom alone",
                    title=f"invalid part value for {self.name}",
                )
        needed = self.resistors + self.capacitors
        problems = [
            Problem(f"parts.{r}", MISSING, f"{self.name} needs {', '.join(needed)}") for r in needed if r not in parts
        ]
        if problems:
            raise InputError(problems, title=f"parts do not fit topology {self.name}")
        roles = needed + self.supply_parts
        arrays = np.broadcast_arrays(*(np.atleast_1d(np.asarray(parts.get(r, 0.0), dtype=float)) for r in roles))
        out = dict(zip(roles, (a.ravel() for a in arrays)))
        for r, a in out.items():
            optional = (
                r in self.optional_parts
                or r in self.supply_parts
                or r in omitted
                or (split and self.direct_input and r == "c_in")
            )
            bad = ~(a >= 0) if optional else ~(a > 0)
            if np.any(bad):
                raise InputError.single(
                    f"parts.{r}",
                    float(a[bad][0]),
                    "a value >= 0" if optional else "a value > 0",
                    title=f"invalid part value for {self.name}",
                )
        return out

    @staticmethod
    def _hfe_array(device: AnyDevice, hfe: np.ndarray | float | None, n: int) -> np.ndarray:
        """The device's spread variable per candidate (hFE, or a JFET's IDSS/VP position; the
        typical device where none is given)."""
        return np.broadcast_to(np.asarray(device.spread_typ if hfe is None else hfe, dtype=float), (n,))

    def _checked_solve(
        self, parts: Parts, device: AnyDevice, conditions: Conditions, hfe: np.ndarray | float | None
    ) -> tuple[Parts, Bias, float, Conditions]:
        """Check the parts, then solve the bias (the entry of the public single-call methods);
        the frame's parts, bias and conditions (:func:`frame_conditions`)."""
        frame = frame_conditions(conditions, device)
        p = self.check_parts(parts, frame)
        return (*self._solve(p, device, frame, self._hfe_array(device, hfe, next(iter(p.values())).size)), frame)

    def _frame_parts(self, p: Parts, conditions: Conditions) -> Parts:
        """The parts as the frame's models see them: on a split supply the ground-referenced
        r_bottom becomes the divider across the span with the same Thevenin source (ground's
        place, r_bottom), r_top = r_bottom/g, r_bottom = r_bottom/(1-g), g the ground's fraction
        of the span: the same DC and, with every rail an AC ground, the same signal and noise."""
        g = conditions.below_ground
        kind = arrangement(g)
        if kind != "positive" and np.any(p["r_decouple"] > 0):
            raise InputError.single(
                "parts.r_decouple",
                float(np.max(p["r_decouple"])),
                "0 (absent): a supply decoupling RC is drawn for an NPN stage on a positive "
                "rail or a PNP stage on a negative rail",
                title=f"invalid part value for {self.name}",
            )
        if kind != "split" or self.split_bias != "ground_base":
            return p
        return {**p, "r_top": p["r_bottom"] / g, "r_bottom": p["r_bottom"] / (1.0 - g)}

    def _solve(
        self, p: Parts, device: AnyDevice, conditions: Conditions, beta: np.ndarray
    ) -> tuple[Parts, Bias, float]:
        """Bias of checked parts ``p`` with hFE ``beta`` (one value per candidate), in the frame
        of ``conditions`` (:func:`frame_conditions`); the frame's parts (:meth:`_frame_parts`).

        A direct-coupled input (c_in 0) adds the source's resistance to the base's DC path: it
        returns the base to the signal ground beside r_bottom, so the bias solves with r_bottom
        parallel to it and the base current flowing in it shifts the base (op ``i_source``, A, the
        DC the base draws through the source, in the device's direction)."""
        direct = p["c_in"] == 0 if self.direct_input else np.zeros(1, dtype=bool)
        r_dc_source = max(conditions.source_impedance, physics.R_FLOOR)
        p_dc = (
            self._frame_parts(
                {**p, "r_bottom": np.where(direct, physics.parallel(p["r_bottom"], r_dc_source), p["r_bottom"])},
                conditions,
            )
            if np.any(direct)
            else None
        )
        p = self._frame_parts(p, conditions)
        p_dc = p if p_dc is None else p_dc
        # floats at one temperature, arrays over the candidates at a temperature per candidate
        nvt = device.NF * thermal_voltage(conditions.temperature)
        i_s = saturation_current(device.IS, conditions.temperature)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            b = self._bias(p_dc, device, conditions, beta, nvt, i_s)
            v_local = np.broadcast_to(np.asarray(conditions.supply, dtype=float), beta.shape).copy()
            r_dec = p["r_decouple"]
            if np.any(r_dec > 0):
                # The local supply V = Vcc - r_decouple*I(V), with I the stage's current at V.
                # I is nearly linear in V (resistive returns, Vbe moves by mV), so one fixed-point
                # step and one secant step land on the root: three bias solves in all.
                i0 = b.op["supply_current"]
                v1 = conditions.supply - r_dec * i0
                i1 = self._bias(p_dc, device, replace(conditions, supply=v1), beta, nvt, i_s).op["supply_current"]
                dv = v1 - v_local
                slope = np.where(dv != 0, (i1 - i0) / np.where(dv != 0, dv, 1.0), 0.0)
                v_local = (conditions.supply - r_dec * i1 + r_dec * slope * v1) / (1.0 + r_dec * slope)
                b = self._bias(p_dc, device, replace(conditions, supply=v_local), beta, nvt, i_s)
        b.op["v_supply_local"] = v_local
        b.op["v_out_q"] = self._output_q(b.op)
        if arrangement(conditions.below_ground) == "split" and self.split_bias == "ground_base" and "i_divider" in b.op:
            # split: no r_top; the base current comes from ground through r_bottom, and the supply
            # current is what the collector-side rail gives (the divider equivalent's share removed)
            b.op["supply_current"] = b.op["supply_current"] - b.op["i_divider"]
            b.op["i_divider"] = (conditions.below_ground * conditions.supply - b.op[self.divider_tap]) * (
                1.0 / p["r_top"] + 1.0 / p["r_bottom"]
            )
            if self.direct_input:
                b.op["i_source"] = np.where(
                    direct, (conditions.below_ground * conditions.supply - b.op["v_base"]) / r_dc_source, 0.0
                )
        b.beta = beta
        return p, b, nvt

    def operating_point(
        self, parts: Parts, device: AnyDevice, conditions: Conditions, hfe: np.ndarray | float | None = None
    ) -> dict[str, np.ndarray]:
        _, b, _, frame = self._checked_solve(parts, device, conditions, hfe)
        return self._true_op(b.op, device, frame)

    def _true_op(self, op: dict[str, np.ndarray], device: AnyDevice, frame: Conditions) -> dict[str, np.ndarray]:
        """The operating point with its node voltages (and v_supply_local, v_out_q) in true,
        ground-referenced volts (:func:`true_volts`); vce, vbe and currents stay magnitudes."""
        if not np.any(frame.below_ground) and device.polarity != "pnp":
            return op
        keys = {*self.node_voltages.values(), "v_supply_local", "v_out_q"}
        return {k: true_volts(v, device, frame) if k in keys else v for k, v in op.items()}

    def evaluate(
        self,
        parts: Parts,
        device: AnyDevice,
        conditions: Conditions,
        hfe: np.ndarray | float | None = None,
        *,
        full: bool = True,
        thd_solve: bool = False,
        noise: bool = True,
        swing_where: Callable[[StageResult], np.ndarray] | None = None,
        swing: bool = True,
        swing_floor: float | None = None,
    ) -> StageResult:
        conditions = frame_conditions(conditions, device)
        p = self.check_parts(parts, conditions)
        n = next(iter(p.values())).size
        h = self._hfe_array(device, hfe, n)
        step = CHUNK_FULL if full else CHUNK_FAST
        if n <= step:
            return self._evaluate(p, device, conditions, h, full, thd_solve, noise, swing_where, swing, swing_floor)
        if swing_where is not None:
            raise ValueError(f"swing_where takes at most one chunk of candidates ({step}), not {n}")
        out: StageResult | None = None
        for i in range(0, n, step):
            r = self._evaluate(
                {k: v[i : i + step] for k, v in p.items()},
                device_rows(device, slice(i, i + step)),
                conditions,
                h[i : i + step],
                full,
                thd_solve,
                noise,
                swing=swing,
                swing_floor=swing_floor,
            )
            if out is None:
                out = StageResult(
                    *(
                        {k: np.empty(n, dtype=v.dtype) for k, v in d.items()}
                        for d in (r.metrics, r.operating_point, r.ratings)
                    )
                )
            for whole, part in (
                (out.metrics, r.metrics),
                (out.operating_point, r.operating_point),
                (out.ratings, r.ratings),
            ):
                for k, v in part.items():
                    whole[k][i : i + step] = v
        return out

    def _evaluate(
        self,
        parts: Parts,
        device: AnyDevice,
        conditions: Conditions,
        hfe: np.ndarray,
        full: bool,
        thd_solve: bool,
        noise: bool = True,
        swing_where: Callable[[StageResult], np.ndarray] | None = None,
        swing: bool = True,
        swing_floor: float | None = None,
    ) -> StageResult:
        """:meth:`evaluate` of one chunk of checked ``parts`` in the frame's ``conditions``."""
        p, b, nvt = self._solve(parts, device, conditions, hfe)
        r_source = _source_resistance(b, conditions)
        local = replace(conditions, supply=b.op["v_supply_local"])  # the stage's own supply node
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            mid = self._midband(p, conditions, b, r_source)
            # impedances are seen through the coupling capacitors at the band's geometric mean
            # (complex where a stage gives its mid-band impedance at that frequency: a bootstrap)
            w_mid = 2.0 * np.pi * conditions.band_centre
            z_in = np.abs(mid["input_impedance"] + input_reactance(p["c_in"], 1j * w_mid))
            z_out = np.abs(mid["output_impedance"] + 1.0 / (1j * w_mid * p["c_out"]))
            clip, vce_max = self._swing(p, device, local, b, mid)
            gain = mid["gain"]
            m: dict[str, np.ndarray] = {
                "gain": gain,
                "gain_db": 20.0 * np.log10(np.abs(gain)),
                "swing_vpp": np.full_like(gain, np.nan),  # solved last (swing_where)
                "clip_vpp": clip,
                "input_impedance": z_in,
                "output_impedance": z_out,
                "supply_current": b.op["supply_current"],
                "thd": np.abs(
                    sum(
                        sign * physics.thd_small_signal(0.5 * conditions.signal_vpp * vx, sup, nvt, u)
                        for vx, sup, u, sign in mid["hd2_terms"]
                    )
                ),
                "q_power": b.op["q_power"],
                "emitter_voltage": b.op["v_emitter"],
                "part_count": self.part_count(parts),
            }
            nan = np.full_like(gain, np.nan)
            m.update(
                f_low=nan,
                f_high=nan,
                midband_deviation=nan,
                noise_ein_v=nan,
                noise_figure_db=nan,
                psrr_db=nan,
                psrr_ripple_db=nan,
                psrr_mid_db=nan,
            )
            m.update(self._loop_metrics(p, conditions, b, r_source))
            if full:
                m.update(self._full_metrics(p, conditions, b, r_source, gain, noise))
            if thd_solve:
                m["thd"] = self._thd_static(p, device, conditions, b, nvt, b.beta, gain)
            ratings = self._ratings(p, conditions, b)
            if arrangement(conditions.below_ground) == "split" and self.split_bias == "ground_base":  # r_bottom alone
                ratings["p_r_top"] = np.zeros_like(gain)
                ratings["p_r_bottom"] = (
                    b.op[self.divider_tap] - conditions.below_ground * conditions.supply
                ) ** 2 / parts["r_bottom"]
            ratings["p_r_decouple"] = b.op["supply_current"] ** 2 * p["r_decouple"]
            ratings["v_c_decouple"] = np.where(p["c_decouple"] > 0, conditions.rail_max, 0.0) + 0.0 * gain
        ratings["vce_max"] = vce_max
        result = StageResult({k: m[k] for k in METRICS}, self._true_op(b.op, device, conditions), ratings)
        if not swing:
            return result
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            if swing_where is None:
                result.metrics["swing_vpp"] = self._usable_swing(
                    p, device, conditions, b, nvt, gain, 0.5 * clip, swing_floor
                )
            else:
                rows = np.flatnonzero(swing_where(result))
                if rows.size:
                    result.metrics["swing_vpp"][rows] = self._usable_swing(
                        p, device, conditions, b, nvt, gain, 0.5 * clip, swing_floor, rows=rows
                    )
        return result

    def _loop_metrics(self, p: Parts, c: Conditions, b: Bias, r_source: np.ndarray) -> dict[str, np.ndarray]:
        """loop_gain (V/V, mid-band) and phase_margin_deg (degrees) of a stage with an overall
        feedback loop around more than one transistor; NaN (no such loop) by default."""
        nan = np.full_like(r_source, np.nan)
        return {"loop_gain": nan, "phase_margin_deg": nan}

    def _full_metrics(
        self, p: Parts, c: Conditions, b: Bias, r_source: np.ndarray, gain: np.ndarray, noise: bool = True
    ) -> dict[str, np.ndarray]:
        # Element values stay 1-D over candidates and frequencies run along a leading axis, so
        # every array of the nodal solve is (frequencies, candidates) with the candidates
        # contiguous: numpy's inner loops then run over thousands of values, not a few frequencies.
        net = self._network(p, c, b.small_signal, True, r_source, True)
        response = self._response(net, r_source)
        f_low, f_high = physics.minus_3db_corners(response, gain, self.corner_steps)
        # the mid-band figures take the coupling and bypass capacitors as shorts (the followers' see
        # c_in and c_out, the bootstrap's its c_bootstrap) and the junction and load capacitances as
        # open: how far the whole response at the band's centre is from them. The impedances are
        # taken there too, every capacitor as it is: a feedback stage's loop sees the source
        # through c_in, which the closed forms leave out (its output impedance moved up to 18 %)
        h_centre, z_in, z_out = self.at_centre(net, c, r_source)
        corners = {
            "f_low": f_low,
            "f_high": f_high,
            "midband_deviation": np.abs(np.abs(h_centre) / np.abs(gain) - 1.0),
            "input_impedance": np.abs(z_in),
            "output_impedance": np.abs(z_out),
        }
        if not noise:  # the corners and impedances alone (evaluate's noise=False)
            return corners
        ein, nf = physics.noise_integrals(net, "out", "in", r_source, c.band)
        return {
            **corners,
            "noise_ein_v": ein,
            "noise_figure_db": nf,
            **self._psrr(p, c, b, r_source),
        }

    def _psrr(self, p: Parts, c: Conditions, b: Bias, r_source: np.ndarray) -> dict[str, np.ndarray]:
        """psrr_ripple_db, psrr_mid_db and psrr_db (the smaller), dB: 20*log10(1/|H|) of the
        transfer from the rail to the load (signal source quiet, its resistance and the load in place).

        The ripple rides on each rail that is not the signal ground, relative to that ground: the
        top rail of a frame grounded at its lowest (a positive NPN or negative PNP stage), the
        lowest rail of one grounded at its top (a negative NPN or positive PNP stage: the
        emitter side), each rail of a split supply in turn, the worse one counting. On a split
        supply r_bottom returns to ground itself here, not through the span-divider equivalent."""
        kind = arrangement(c.below_ground)
        if kind == "split" and self.split_bias == "ground_base":
            p = {
                **p,
                "r_top": np.full_like(p["r_top"], np.inf),
                "r_bottom": physics.parallel(p["r_top"], p["r_bottom"]),
            }
        net = self._network(p, c, b.small_signal, True, r_source, True, supply=True)
        f = np.array([[c.ripple_frequency], [c.band_centre]])
        at = net.at(2j * np.pi * f)
        ground = net.ground
        drives = ([({"vcc": np.full(1, physics.G_SHORT)}, "vcc")] if kind != "negative" else []) + (
            [
                (
                    {
                        "vcc": np.full(1, -physics.G_SHORT),
                        **({ground: np.full(1, -physics.G_SHORT)} if ground != "vcc" else {}),
                    },
                    None,
                )
            ]
            if kind != "positive"
            else []
        )
        rejection = None
        for drive, rail in drives:
            v = at.solve(drive, ["out", "vcc"] + ([ground] if ground and ground != "vcc" else []))
            v_ground = v[ground] if ground else 0.0
            ripple = (v[rail] if rail else 0.0) - v_ground
            r = -20.0 * np.log10(np.abs((v["out"] - v_ground) / ripple))
            rejection = r if rejection is None else np.minimum(rejection, r)
        assert rejection is not None  # every arrangement has a rail that is not ground
        return {
            "psrr_ripple_db": rejection[0],
            "psrr_mid_db": rejection[1],
            "psrr_db": np.minimum(rejection[0], rejection[1]),
        }

    def psrr(
        self, parts: Parts, device: AnyDevice, conditions: Conditions, hfe: np.ndarray | float | None = None
    ) -> dict[str, np.ndarray]:
        """Supply rejection alone (dB): psrr_ripple_db, psrr_mid_db, psrr_db per candidate (see
        :meth:`evaluate`); the bias and one small network solve, for sizing c_decouple."""
        p, b, _, frame = self._checked_solve(parts, device, conditions, hfe)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            return self._psrr(p, frame, b, _source_resistance(b, frame))

    @staticmethod
    def _response(net: physics.Network, r_source: np.ndarray) -> physics.Response:
        """Complex gain source->load at frequencies f (Hz, shape (k, candidates) or (k, 1)), shape (k, candidates)."""
        return physics.Response(net, "in", 1.0 / r_source)

    def frequency_response(
        self,
        parts: Parts,
        device: AnyDevice,
        conditions: Conditions,
        freqs: np.ndarray,
        hfe: np.ndarray | float | None = None,
    ) -> np.ndarray:
        """Complex gain source->load (V/V) at freqs (Hz), shape (candidates, freqs), by full nodal solve."""
        p, b, _, frame = self._checked_solve(parts, device, conditions, hfe)
        rs = _source_resistance(b, frame)
        f = np.asarray(freqs, dtype=float).reshape(-1, 1)
        h = self._response(self._network(p, frame, b.small_signal, True, rs, True), rs)(f)
        return np.ascontiguousarray(np.broadcast_to(h, (f.shape[0], rs.size)).T)

    @staticmethod
    def at_centre(
        net: physics.Network, c: Conditions, r_source: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Gain (V/V) and input and output impedance (ohm), all complex, at the band's centre with
        every capacitor at its value, from one nodal solve of ``net`` (the source-and-load network
        of :meth:`_network`) with three excitations: the source's drive, 1 A into 'in', 1 A into
        'out'. The impedances are the nodes' less what the network holds there: the source
        resistance from 'in' and the load (resistance and capacitance) from 'out'; the same as
        :meth:`midband_network` reads with the source and load taken out (tests/test_models.py)."""
        s = 2j * np.pi * c.band_centre
        one, zero = np.ones_like(r_source), np.zeros_like(r_source)
        v = net.at(np.full((3, 1), s)).solve(
            {"in": np.stack([1.0 / r_source, one, zero]), "out": np.stack([zero, zero, one])}, ["in", "out"]
        )
        y_load = (1.0 / c.load_impedance if np.isfinite(c.load_impedance) else 0.0) + s * c.load_capacitance
        return v["out"][0], 1.0 / (1.0 / v["in"][1] - 1.0 / r_source), 1.0 / (1.0 / v["out"][2] - y_load)

    def midband_network(
        self, parts: Parts, device: AnyDevice, conditions: Conditions, hfe: np.ndarray | float | None = None
    ) -> dict[str, np.ndarray]:
        """gain (V/V), input_impedance and output_impedance (|Z|, ohm) by full nodal solve at the
        band's geometric-mean frequency (a check of the closed forms)."""
        p, b, _, c = self._checked_solve(parts, device, conditions, hfe)
        rs = _source_resistance(b, c)
        s = np.array(2j * np.pi * c.band_centre)
        ss, one = b.small_signal, np.ones_like(rs)
        h = self._network(p, c, ss, True, rs, True).at(s).solve({"in": 1.0 / rs}, ["out"])["out"]
        z_in = self._network(p, c, ss, True, None, True).at(s).solve({"in": one}, ["in"])["in"]
        z_out = self._network(p, c, ss, True, rs, False).at(s).solve({"out": one}, ["out"])["out"]
        return {
            "gain": np.copysign(np.abs(h), h.real),
            "input_impedance": np.abs(z_in),
            "output_impedance": np.abs(z_out),
        }

    def part_count(self, p: Parts) -> np.ndarray:
        """Resistors and capacitors present (value non-zero: an optional part, or r_top on a split
        supply, may be left out) plus transistors."""
        n = next(iter(p.values())).size
        count = np.full(n, float(self.transistors))
        for r in self.resistors + self.capacitors + self.supply_parts:
            count += p[r] > 0
        return count

    @abstractmethod
    def static_output(
        self, p: Parts, device: AnyDevice, c: Conditions, b: Bias, nvt: float, i_s: float, beta: np.ndarray
    ) -> Callable[[np.ndarray], np.ndarray]:
        """Map source voltages (V, (candidates, samples)) to load voltages (V) by the static
        nonlinear stage equations around the operating point (capacitors hold their DC; nvt and
        i_s columns like the other arrays where the temperature is per candidate)."""

    def _static_fn(
        self,
        p: Parts,
        device: AnyDevice,
        c: Conditions,
        b: Bias,
        nvt: float | np.ndarray,
        beta: np.ndarray,
    ) -> Callable[[np.ndarray], np.ndarray]:
        """:meth:`static_output` of solved candidates, their arrays as columns (candidates, 1):
        views, no copies (nvt and IS too, where the temperature is per candidate)."""
        i_s = saturation_current(device.IS, c.temperature)
        if np.ndim(nvt):
            nvt, i_s = nvt[:, None], i_s[:, None]
        local = replace(  # c_decouple holds the supply
            c,
            supply=b.op["v_supply_local"][:, None],
            below_ground=c.below_ground[:, None] if np.ndim(c.below_ground) else c.below_ground,
        )
        op = {k: v[:, None] for k, v in b.op.items()}
        return self.static_output(
            {k: v[:, None] for k, v in p.items()},
            device_columns(device),
            local,
            Bias(op, b.small_signal),
            nvt,
            i_s,
            beta[:, None],
        )

    def _usable_swing(
        self,
        p: Parts,
        device: AnyDevice,
        c: Conditions,
        b: Bias,
        nvt: float,
        gain: np.ndarray,
        clip_peak: np.ndarray,
        floor: float | None = None,
        rows: np.ndarray | None = None,
    ) -> np.ndarray:
        """swing_vpp (V peak-to-peak at the load) by :func:`physics.usable_swing`, in double precision
        (single precision, with the small swings it leaves noisy solved again, was no faster at the
        search's groups of 16-64 designs and 1.1x at 16,384: benchmarks/results/models.md).
        A static output that keeps a warm start between its calls (its ``warm_start``: arrays with
        a row per candidate) hands the rows of the candidates a subset's transfer solves to it, so
        their solves start where the whole batch's would: the same figures alone or in a batch.
        Given a ``floor`` (V, :meth:`evaluate`'s swing_floor): solved only where
        :func:`physics.swing_reaches` leaves it undecided, on a transfer of those candidates alone
        (so the same figures as without the floor); a lower bound where it surely reaches the
        floor, NaN where it surely falls short. Given ``rows``, the swing of the candidates at
        those indices alone (the other arguments the whole batch's)."""
        if rows is not None:
            sub_p, sub_c, sub_b, sub_nvt = _rows_of(rows, gain.size, p, c, b, nvt)
            return self._usable_swing(
                sub_p, device_rows(device, rows), sub_c, sub_b, sub_nvt, gain[rows], clip_peak[rows], floor
            )
        whole = self._static_fn(p, device, c, b, nvt, b.beta)

        def rows_output(rows: np.ndarray) -> Callable[[np.ndarray], np.ndarray]:
            sub_p, sub_c, sub_b, sub_nvt = _rows_of(rows, gain.size, p, c, b, nvt)
            part = self._static_fn(sub_p, device_rows(device, rows), sub_c, sub_b, sub_nvt, sub_b.beta)
            kept = getattr(whole, "warm_start", None)
            if kept:
                part.warm_start[:] = [v[rows] for v in kept]  # type: ignore[attr-defined]
            return part

        if floor is not None:
            verdict, swing = physics.swing_reaches(
                whole,
                gain,
                clip_peak,
                floor,
                rows_output=rows_output,
                steps=0 if getattr(whole, "warm_start", None) is not None else physics.SWING_FLOOR_STEPS,
            )
            rows = np.flatnonzero(verdict == 0)
            if rows.size:
                swing[rows] = self._usable_swing(p, device, c, b, nvt, gain, clip_peak, rows=rows)
            return swing

        return physics.usable_swing(
            whole,
            gain,
            clip_peak,
            rows_output=rows_output,
            refine=b.op["active"].astype(bool),
        )

    def _thd_static(
        self,
        p: Parts,
        device: AnyDevice,
        c: Conditions,
        b: Bias,
        nvt: float | np.ndarray,
        beta: np.ndarray,
        gain: np.ndarray,
        samples: int = physics.THD_SAMPLES,
    ) -> np.ndarray:
        fn = self._static_fn(p, device, c, b, nvt, beta)
        return physics.thd_quasistatic(fn, 0.5 * c.signal_vpp / np.abs(gain), samples)

    def static_transfer(
        self,
        parts: Parts,
        device: AnyDevice,
        conditions: Conditions,
        source_v: np.ndarray,
        hfe: np.ndarray | float | None = None,
    ) -> np.ndarray:
        """Load voltage (V, change from quiescent) at each source voltage of ``source_v`` (V, a
        1-D sweep), per candidate, shape (candidates, samples): the static transfer curve behind
        the quasi-static THD, clipping included (capacitors hold their DC). A PNP stage's curve
        is the mirror image of its frame's: both voltages negated."""
        p, b, nvt, frame = self._checked_solve(parts, device, conditions, hfe)
        sign = -1.0 if device.polarity == "pnp" else 1.0
        vs = sign * np.asarray(source_v, dtype=float).reshape(1, -1)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            return sign * self._static_fn(p, device, frame, b, nvt, b.beta)(vs) + 0.0 * b.beta[:, None]

    def thd_quasistatic(
        self,
        parts: Parts,
        device: AnyDevice,
        conditions: Conditions,
        hfe: np.ndarray | float | None = None,
        samples: int = 256,
    ) -> np.ndarray:
        """THD (fraction) at conditions.signal_vpp at the load, by static solve + FFT (per candidate)."""
        p, b, nvt, frame = self._checked_solve(parts, device, conditions, hfe)
        rs = _source_resistance(b, frame)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            gain = self._midband(p, frame, b, rs)["gain"]
            return self._thd_static(p, device, frame, b, nvt, b.beta, gain, samples)
