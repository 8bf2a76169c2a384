"""The textbook hand method: closed-form starting designs, and its building blocks.

These are what a designer gets with rules of thumb: a fixed 0.65 V base-emitter drop, a
divider carrying ten times the base current, the gain taken as the ratio of collector to
emitter resistance, the quiescent point at the centre of the AC load line, and each
coupling capacitor sized alone for the band's low corner (common practice). They seed
the search and are the baseline every benchmark reports beside it. Each topology composes
its own hand design from these blocks (``Topology.hand_design``).
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass
from typing import TYPE_CHECKING

from optimizer import eseries
from optimizer.devices import JFET
from optimizer.errors import InputError

if TYPE_CHECKING:
    from optimizer.devices import AnyDevice
    from optimizer.spec import Spec

VBE_HAND = 0.65  # V, the textbook's fixed base-emitter drop
DIVIDER_TO_BASE_CURRENT = 10.0  # divider current / base current (common practice)


@dataclass(frozen=True)
class HandRequirements:
    """What the hand method needs; SI units (V, V/V magnitude, ohm, Hz, A)."""

    supply: float
    gain: float
    load_impedance: float
    source_impedance: float = 0.0
    f_low: float = 20.0
    collector_current: float = 1e-3
    hfe: float = 200.0
    vce_sat: float = 0.2
    idss: float = 0.0  # A, a JFET's typical IDSS (0: a bipolar device)
    vp: float = 0.0  # V, its typical pinch-off magnitude


def parallel(a: float, b: float) -> float:
    return a * b / (a + b)


def centred_collector_resistor(req: HandRequirements, r_emitter_dc: float = 0.0) -> tuple[float, float]:
    """Rc and Re_ac that put the quiescent point at the centre of the AC load line.

    With Rac = Rc || RL and Re_ac = Rac / gain, the centre condition is
    Ic * Rac = Vce_q - Vce_sat, where Vce_q = Vcc - Ic * (Rc + Re_ac + Re_dc).
    """
    ic, rl = req.collector_current, req.load_impedance

    def centre(rc: float) -> float:
        rac = parallel(rc, rl)
        vce_q = req.supply - ic * (rc + rac / req.gain + r_emitter_dc)
        return ic * rac - (vce_q - req.vce_sat)

    upper = req.supply / ic
    if centre(1.0) > 0 or centre(upper) < 0:
        raise InputError.single(
            "supply",
            req.supply,
            f"a supply that can bias {req.collector_current * 1e3:.3g} mA at the centre of the load line",
            title="hand method has no solution",
        )
    # centre(rc) * (rc + RL) / Ic is the quadratic rc^2 + b*rc + c*RL with c = (Ic*Re_dc - Vcc +
    # Vce_sat)/Ic < 0 here, so it has exactly one positive root (the one bracketed above);
    # closed form, so a search's seeds need no SciPy import (tests/test_evaluate.py checks it
    # against scipy.optimize.brentq on the same function).
    c = r_emitter_dc - (req.supply - req.vce_sat) / ic
    b = rl * (2.0 + 1.0 / req.gain) + c
    rc = (-b + math.sqrt(b * b - 4.0 * c * rl)) / 2.0
    return rc, parallel(rc, rl) / req.gain


def divider(req: HandRequirements, v_base: float) -> tuple[float, float]:
    """r_top, r_bottom for a divider carrying ten times the base current."""
    ib = req.collector_current / req.hfe
    i_divider = DIVIDER_TO_BASE_CURRENT * ib
    r_bottom = v_base / i_divider
    r_top = (req.supply - v_base) / (i_divider + ib)
    return r_top, r_bottom


def coupling_capacitor(resistance: float, f_low: float) -> float:
    """The textbook's capacitor for one corner at f_low with the resistance it sees (F)."""
    return 1.0 / (2.0 * math.pi * f_low * resistance)


def rounded_designs(
    parts: dict[str, float], resistor_series: str, capacitor_series: str, limit: int = 16
) -> list[dict[str, float]]:
    """The hand design rounded to the series: nearest first, then resistors rounded
    both ways (next-down / next-up), capacitors always up. At most ``limit`` designs."""

    def options(role: str, value: float) -> list[float]:
        series = capacitor_series if role.startswith("c_") else resistor_series
        if role.startswith("c_"):
            return [float(eseries.next_up(series, value))]
        nearest = float(eseries.nearest(series, value))
        others = {float(eseries.next_down(series, value)), float(eseries.next_up(series, value))} - {nearest}
        return [nearest, *sorted(others)]

    roles = list(parts)
    choices = [options(role, parts[role]) for role in roles]
    designs = [dict(zip(roles, combo)) for combo in itertools.islice(itertools.product(*choices), limit)]
    return designs


def jfet_hand_bias(req: HandRequirements) -> tuple[float, float, float, float]:
    """The hand method's JFET self-bias: drain current IDSS/4 (common practice: the middle of
    the square law, Vgs = -VP/2; less if the current budget asks), the source resistance
    |Vgs|/Id from the square law, gm = 2*sqrt(Id*IDSS)/VP, and r_gate 1 Mohm or ten times the
    source impedance (common practice). Returns (Id A, R_bias ohm, gm S, r_gate ohm)."""
    if not (req.idss > 0 and req.vp > 0):
        raise InputError.single("device", "bipolar", "a JFET (IDSS and VP)", title="no hand design")
    i_d = min(0.25 * req.idss, req.collector_current)
    vgs = -req.vp * (1.0 - math.sqrt(i_d / req.idss))
    gm = 2.0 * math.sqrt(i_d * req.idss) / req.vp
    return i_d, -vgs / i_d, gm, max(1e6, 10.0 * req.source_impedance)


def hand_requirements(spec: "Spec", device: "AnyDevice") -> HandRequirements:
    """The hand method's inputs from a spec: collector current half the current budget
    (1 mA when the spec sets none), the device's typical hFE (a JFET's typical IDSS and VP)."""
    budget = spec.limits.supply_current_max
    common = dict(
        supply=spec.supply,
        gain=spec.gain.target,
        load_impedance=spec.load_impedance,
        source_impedance=spec.source_impedance,
        f_low=spec.band[0],
        collector_current=0.5 * budget if budget else 1e-3,
    )
    if isinstance(device, JFET):
        return HandRequirements(**common, idss=device.idss_typ, vp=-device.VTO, vce_sat=0.0)
    return HandRequirements(**common, hfe=device.hfe_typ, vce_sat=device.vce_sat)


def on_split_supply(hand: dict[str, float], req: HandRequirements, ground: float) -> dict[str, float] | None:
    """A hand design (drawn as NPN on a positive rail of ``req.supply``, the span) moved to a
    split supply whose ground sits ``ground`` of the span above the stage's emitter-side rail:
    the base returns to ground through r_bottom alone, at the divider's Thevenin resistance
    (r_top dropped), and the DC emitter resistance (r_emitter_dc where part of it is bypassed,
    else r_emitter, a follower's r_follower) carries the
    hand current from ground less Vbe and Ib*r_bottom. None when
    the ground sits too low for the stage's own emitter resistance."""
    if "r_top" not in hand:
        return None
    ic = req.collector_current
    r_bottom = parallel(hand["r_top"], hand["r_bottom"])
    r_dc = (ground * req.supply - VBE_HAND - ic / req.hfe * r_bottom) / ic
    out = {k: v for k, v in hand.items() if k != "r_top"}
    out["r_bottom"] = r_bottom
    key = next(k for k in ("r_emitter_dc", "r_emitter", "r_follower") if k in hand)
    value = r_dc - (hand["r_emitter"] if key == "r_emitter_dc" else 0.0)
    if not value > 0:
        return None
    out[key] = value
    return out
