"""The textbook hand method, per topology: closed-form starting designs.

These are what a designer gets with rules of thumb: a fixed 0.65 V base-emitter drop, a
divider carrying ten times the base current, the gain taken as the ratio of collector to
emitter resistance, the quiescent point at the centre of the AC load line, and each
coupling capacitor sized alone for the band's low corner (common practice). They seed
the search and are the baseline every benchmark reports beside it.
"""
from __future__ import annotations

import itertools
import math
from dataclasses import dataclass
from typing import TYPE_CHECKING

from scipy.optimize import brentq

from optimizer import eseries
from optimizer.errors import InputError

if TYPE_CHECKING:
    from optimizer.devices import Device
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


def _parallel(a: float, b: float) -> float:
    return a * b / (a + b)


def _centred_collector_resistor(req: HandRequirements, r_emitter_dc: float = 0.0) -> tuple[float, float]:
    """Rc and Re_ac that put the quiescent point at the centre of the AC load line.

    With Rac = Rc || RL and Re_ac = Rac / gain, the centre condition is
    Ic * Rac = Vce_q - Vce_sat, where Vce_q = Vcc - Ic * (Rc + Re_ac + Re_dc).
    """
    ic, rl = req.collector_current, req.load_impedance

    def centre(rc: float) -> float:
        rac = _parallel(rc, rl)
        vce_q = req.supply - ic * (rc + rac / req.gain + r_emitter_dc)
        return ic * rac - (vce_q - req.vce_sat)

    upper = req.supply / ic
    if centre(1.0) > 0 or centre(upper) < 0:
        raise InputError.single(
            "supply", req.supply,
            f"a supply that can bias {req.collector_current * 1e3:.3g} mA at the centre of the load line",
            title="hand method has no solution",
        )
    rc = brentq(centre, 1.0, upper, xtol=1e-6)
    return rc, _parallel(rc, rl) / req.gain


def _divider(req: HandRequirements, v_base: float) -> tuple[float, float]:
    """r_top, r_bottom for a divider carrying ten times the base current."""
    ib = req.collector_current / req.hfe
    i_divider = DIVIDER_TO_BASE_CURRENT * ib
    r_bottom = v_base / i_divider
    r_top = (req.supply - v_base) / (i_divider + ib)
    return r_top, r_bottom


def _coupling_capacitor(resistance: float, f_low: float) -> float:
    """The textbook's capacitor for one corner at f_low with the resistance it sees (F)."""
    return 1.0 / (2.0 * math.pi * f_low * resistance)


def hand_design(topology: str, req: HandRequirements) -> dict[str, float]:
    """The unrounded textbook design of ``topology`` (part role -> value in ohm or F)."""
    ic, hfe = req.collector_current, req.hfe
    if topology in ("divider_ce", "ce_follower"):
        if topology == "ce_follower":
            # The follower presents ~ hfe * (r_follower || RL) to the first stage.
            follower_current = 2.0 * ic
            v_out_q = req.supply / 2.0
            r_follower = v_out_q / follower_current
            stage_load = hfe * _parallel(r_follower, req.load_impedance)
        else:
            stage_load = req.load_impedance
        first = HandRequirements(**{**req.__dict__, "load_impedance": stage_load})
        rc, re = _centred_collector_resistor(first)
        r_top, r_bottom = _divider(req, ic * re + VBE_HAND)
        z_in = _parallel(_parallel(r_top, r_bottom), hfe * re)
        parts = {"r_top": r_top, "r_bottom": r_bottom, "r_collector": rc, "r_emitter": re,
                 "c_in": _coupling_capacitor(z_in + req.source_impedance, req.f_low)}
        if topology == "ce_follower":
            parts["r_follower"] = r_follower
            parts["c_out"] = _coupling_capacitor(req.load_impedance, req.f_low)
        else:
            parts["c_out"] = _coupling_capacitor(rc + req.load_impedance, req.f_low)
        return parts
    if topology == "divider_ce_split":
        r_emitter_dc = 0.1 * req.supply / ic  # emitter at a tenth of the supply (common practice)
        rc, re = _centred_collector_resistor(req, r_emitter_dc)
        r_top, r_bottom = _divider(req, ic * (re + r_emitter_dc) + VBE_HAND)
        z_in = _parallel(_parallel(r_top, r_bottom), hfe * re)
        # The bypass sees Re_dc || (Re_ac + 1/gm) from its node (1/gm with VT ~ 26 mV).
        r_bypass = _parallel(r_emitter_dc, re + 0.026 / ic)
        return {"r_top": r_top, "r_bottom": r_bottom, "r_collector": rc, "r_emitter": re,
                "r_emitter_dc": r_emitter_dc,
                "c_in": _coupling_capacitor(z_in + req.source_impedance, req.f_low),
                "c_out": _coupling_capacitor(rc + req.load_impedance, req.f_low),
                "c_emitter": _coupling_capacitor(r_bypass, req.f_low)}
    if topology == "feedback_ce":
        rc, re = _centred_collector_resistor(req)
        ib = ic / hfe
        v_collector = req.supply - (ic + ib) * rc
        r_feedback = (v_collector - ic * re - VBE_HAND) / ib
        z_in = hfe * re  # the feedback resistor's Miller share is left out by hand
        return {"r_feedback": r_feedback, "r_collector": rc, "r_emitter": re,
                "c_in": _coupling_capacitor(z_in + req.source_impedance, req.f_low),
                "c_out": _coupling_capacitor(rc + req.load_impedance, req.f_low)}
    raise InputError.single("topology", topology,
                            "one of divider_ce, divider_ce_split, feedback_ce, ce_follower")


def rounded_designs(parts: dict[str, float], resistor_series: str, capacitor_series: str,
                    limit: int = 16) -> list[dict[str, float]]:
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


def hand_requirements(spec: "Spec", device: "Device") -> HandRequirements:
    """The hand method's inputs from a spec: collector current half the current budget
    (1 mA when the spec sets none), the device's typical hFE."""
    budget = spec.limits.supply_current_max
    return HandRequirements(supply=spec.supply, gain=spec.gain.target, load_impedance=spec.load_impedance,
                            source_impedance=spec.source_impedance, f_low=spec.band[0],
                            collector_current=0.5 * budget if budget else 1e-3,
                            hfe=device.hfe_typ, vce_sat=device.vce_sat)
