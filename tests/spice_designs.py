"""The design set the stage models are checked on against ngspice.

Hand-method designs (optimizer.synthesis, unrounded) over the topologies, supplies
3.3-30 V, hFE 50-500, collector currents 0.3-3 mA and a range of gains, sources and
loads: varied enough to exercise every term of the models, and the same designs show
how far the textbook estimate itself lands from the simulator.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from optimizer.devices import Device
from optimizer.sizing import size_decoupling
from optimizer.synthesis import HandRequirements, coupling_capacitor, on_split_supply
from optimizer.topologies import get_topology
from optimizer.topologies.base import Conditions
from optimizer.topologies.feedback_pair import SPLIT_CURRENT_SHARE


@dataclass(frozen=True)
class CheckDesign:
    """One design to simulate: topology, parts (ohm, F), device, conditions, and the
    hand method's own predictions of gain (V/V, signed) and collector current (A)."""

    name: str
    topology: str
    parts: dict[str, float]
    device: Device
    conditions: Conditions
    hand_gain: float
    hand_ic: float


def check_device(hfe: float) -> Device:
    """An invented small-signal NPN with typical parameters (from memory), BF = hfe."""
    return Device(
        id=f"check-npn-{hfe:g}",
        polarity="npn",
        hfe_min=hfe,
        hfe_typ=hfe,
        hfe_max=hfe,
        IS=1e-14,
        BF=hfe,
        NF=1.0,
        VAF=100.0,
        RB=50.0,
        CJE=10e-12,
        CJC=4e-12,
        TF=0.4e-9,
        vce_sat=0.2,
        vceo_max=45.0,
        p_max=0.5,
    )


# (topology, supply V, |gain| V/V, Ic A, hFE, source ohm, load ohm)
_CASES = [
    ("divider_ce", 9.0, 8.0, 1.0e-3, 200, 600, 100e3),
    ("divider_ce", 3.3, 3.0, 0.5e-3, 120, 1e3, 47e3),
    ("divider_ce", 5.0, 5.0, 1.0e-3, 50, 50, 22e3),
    ("divider_ce", 12.0, 10.0, 2.0e-3, 300, 600, 10e3),
    ("divider_ce", 15.0, 15.0, 0.5e-3, 500, 10e3, 100e3),
    ("divider_ce", 24.0, 20.0, 1.5e-3, 250, 1e3, 47e3),
    ("divider_ce", 30.0, 6.0, 3.0e-3, 100, 600, 10e3),
    ("divider_ce", 9.0, 4.0, 0.3e-3, 400, 100e3, 1e6),
    ("divider_ce_split", 9.0, 10.0, 1.0e-3, 200, 600, 100e3),
    ("divider_ce_split", 3.3, 4.0, 0.5e-3, 150, 1e3, 47e3),
    ("divider_ce_split", 5.0, 6.0, 1.0e-3, 60, 50, 22e3),
    ("divider_ce_split", 12.0, 12.0, 2.0e-3, 300, 600, 10e3),
    ("divider_ce_split", 15.0, 20.0, 0.5e-3, 500, 10e3, 100e3),
    ("divider_ce_split", 24.0, 25.0, 1.5e-3, 250, 1e3, 47e3),
    ("divider_ce_split", 30.0, 8.0, 3.0e-3, 100, 600, 10e3),
    ("divider_ce_split", 9.0, 5.0, 0.3e-3, 400, 100e3, 1e6),
    ("feedback_ce", 9.0, 8.0, 1.0e-3, 200, 600, 100e3),
    ("feedback_ce", 3.3, 3.0, 0.5e-3, 120, 1e3, 47e3),
    ("feedback_ce", 5.0, 5.0, 1.0e-3, 50, 50, 22e3),
    ("feedback_ce", 12.0, 10.0, 2.0e-3, 300, 600, 10e3),
    ("feedback_ce", 15.0, 15.0, 0.5e-3, 500, 10e3, 100e3),
    ("feedback_ce", 24.0, 20.0, 1.5e-3, 250, 1e3, 47e3),
    ("feedback_ce", 30.0, 6.0, 3.0e-3, 100, 600, 10e3),
    ("feedback_ce", 9.0, 4.0, 0.3e-3, 400, 10e3, 1e6),
    ("ce_follower", 9.0, 8.0, 1.0e-3, 200, 600, 10e3),
    ("ce_follower", 3.3, 3.0, 0.5e-3, 120, 1e3, 4.7e3),
    ("ce_follower", 5.0, 5.0, 1.0e-3, 60, 50, 2.2e3),
    ("ce_follower", 12.0, 10.0, 2.0e-3, 300, 600, 1e3),
    ("ce_follower", 15.0, 15.0, 0.5e-3, 500, 10e3, 10e3),
    ("ce_follower", 24.0, 20.0, 1.5e-3, 250, 1e3, 600),
    ("ce_follower", 30.0, 6.0, 3.0e-3, 100, 600, 2.2e3),
    ("ce_follower", 9.0, 4.0, 0.5e-3, 400, 10e3, 47e3),
]


# Designs of _CASES (by index) given a supply decoupling RC: r_decouple dropping this share of
# the supply at the hand method's current, c_decouple as sized for a corner a decade below the band.
_DECOUPLED = (0, 9, 16, 24)
_DECOUPLE_DROP = 0.1


def check_designs() -> list[CheckDesign]:
    """All bipolar designs of the ngspice agreement set (60, every bipolar topology; 4 with a decoupling RC)."""
    designs = []
    for topology, supply, gain, ic, hfe, rs, rl in _CASES:
        req = HandRequirements(
            supply=supply, gain=gain, load_impedance=rl, source_impedance=rs, f_low=20.0, collector_current=ic, hfe=hfe
        )
        parts = get_topology(topology).hand_design(req)
        conditions = Conditions(
            supply=supply, source_impedance=float(rs), load_impedance=float(rl), band=(20.0, 20000.0), temperature=27.0
        )
        name = f"{topology}-{supply:g}V-A{gain:g}-hfe{hfe}"
        designs.append(CheckDesign(name, topology, parts, check_device(hfe), conditions, hand_gain=-gain, hand_ic=ic))
    for d in (designs[i] for i in _DECOUPLED):
        r_dec = _DECOUPLE_DROP * d.conditions.supply / (1.1 * d.hand_ic)
        parts = {**d.parts, "r_decouple": r_dec}
        allowed = np.geomspace(1e-6, 1e-2, 41)
        parts["c_decouple"] = float(
            size_decoupling(
                get_topology(d.topology), {k: np.array([v]) for k, v in parts.items()}, d.device, d.conditions, allowed
            )[0]
        )
        designs.append(
            CheckDesign(
                f"{d.name}-rc", d.topology, parts, d.device, d.conditions, hand_gain=d.hand_gain, hand_ic=d.hand_ic
            )
        )
    return designs + pair_designs() + follower_designs()


# ---- feedback_pair (non-inverting series-shunt pair) -------------------------------------------
# (supply V, gain V/V, q2's Ic A, hFE, source ohm, load ohm, load capacitance F): hand designs of
# optimizer/topologies/feedback_pair.py; low gains with high hFE give loop gains of 50-65 and,
# with a cable-like load capacitance, phase margins from about 25 degrees up
_PAIR_CASES = [
    (12.0, 10.0, 1.0e-3, 200, 600, 10e3, 0.0),
    (9.0, 5.0, 0.5e-3, 100, 1e3, 47e3, 0.0),
    (24.0, 20.0, 2.0e-3, 300, 50, 2.2e3, 0.0),
    (15.0, 3.0, 1.0e-3, 500, 600, 47e3, 1e-9),
    (30.0, 3.0, 1.0e-3, 300, 600, 10e3, 2.2e-9),
    (12.0, 5.0, 2.0e-3, 300, 50, 10e3, 1e-9),
    (5.0, 4.0, 1.0e-3, 60, 50, 22e3, 0.0),
    (15.0, 15.0, 0.5e-3, 500, 10e3, 100e3, 330e-12),
]


def pair_designs() -> list[CheckDesign]:
    """The feedback_pair designs of the agreement set (8; hand gain +target, hand Ic q1's half)."""
    designs = []
    for supply, gain, ic, hfe, rs, rl, cl in _PAIR_CASES:
        req = HandRequirements(
            supply=supply, gain=gain, load_impedance=rl, source_impedance=rs, f_low=20.0, collector_current=ic, hfe=hfe
        )
        parts = get_topology("feedback_pair").hand_design(req)
        conditions = Conditions(
            supply=supply,
            source_impedance=float(rs),
            load_impedance=float(rl),
            band=(20.0, 20000.0),
            temperature=27.0,
            load_capacitance=cl,
        )
        name = f"feedback_pair-{supply:g}V-A{gain:g}-hfe{hfe}" + (f"-CL{cl * 1e9:g}n" if cl else "")
        designs.append(
            CheckDesign(name, "feedback_pair", parts, check_device(hfe), conditions, hand_gain=gain, hand_ic=0.5 * ic)
        )
    return designs


# ----------------------------------------------------------------------------- JFET stages
# (jfet branch) Hand-method designs of jfet_common_source and jfet_follower over the three
# catalog JFETs, supplies 5-30 V, sources 600 ohm-10 Mohm and loads 2.2k-1M.

# (topology, supply V, |gain| V/V, Id budget A, device id, source ohm, load ohm)
_JFET_CASES = [
    ("jfet_common_source", 12.0, 5.0, 1e-3, "SF-J1", 1e3, 47e3),
    ("jfet_common_source", 9.0, 3.0, 0.5e-3, "SF-J1", 100e3, 100e3),
    ("jfet_common_source", 24.0, 8.0, 2e-3, "SF-J2", 600, 22e3),
    ("jfet_common_source", 5.0, 2.0, 0.3e-3, "SF-J3", 1e6, 100e3),
    ("jfet_common_source", 15.0, 4.0, 1e-3, "SF-J2", 10e3, 10e3),
    ("jfet_common_source", 30.0, 10.0, 1e-3, "SF-J1", 1e3, 1e6),
    ("jfet_common_source", 12.0, 20.0, 0.2e-3, "SF-J3", 1e6, 1e6),
    ("jfet_common_source", 9.0, 1.0, 1e-3, "SF-J2", 47e3, 47e3),
    ("jfet_follower", 12.0, 1.0, 1e-3, "SF-J1", 1e3, 10e3),
    ("jfet_follower", 9.0, 1.0, 0.5e-3, "SF-J3", 10e6, 47e3),
    ("jfet_follower", 24.0, 1.0, 2e-3, "SF-J2", 10e3, 2.2e3),
    ("jfet_follower", 5.0, 1.0, 0.2e-3, "SF-J3", 1e6, 100e3),
    ("jfet_follower", 15.0, 1.0, 1e-3, "SF-J2", 100e3, 10e3),
    ("jfet_follower", 30.0, 1.0, 1e-3, "SF-J1", 10e3, 1e6),
    ("jfet_follower", 12.0, 1.0, 0.3e-3, "SF-J1", 5e6, 22e3),
    ("jfet_follower", 9.0, 1.0, 2e-3, "SF-J2", 47e3, 4.7e3),
]


def jfet_check_designs() -> list[CheckDesign]:
    """The JFET stages' designs of the ngspice agreement set (8 per stage), catalog devices."""
    from optimizer.catalog import load_catalog
    from optimizer.devices import device_from_row

    catalog = load_catalog("eseries_full")
    designs = []
    for topology, supply, gain, i_d, device_id, rs, rl in _JFET_CASES:
        device = device_from_row(catalog.transistor(device_id))
        req = HandRequirements(
            supply=supply,
            gain=gain,
            load_impedance=rl,
            source_impedance=rs,
            f_low=20.0,
            collector_current=i_d,
            idss=device.idss_typ,
            vp=-device.VTO,
            vce_sat=0.0,
        )
        parts = get_topology(topology).hand_design(req)
        conditions = Conditions(
            supply=supply, source_impedance=float(rs), load_impedance=float(rl), band=(20.0, 20000.0), temperature=27.0
        )
        name = f"{topology}-{supply:g}V-A{gain:g}-{device_id}-rs{rs:g}"
        hand_gain = -gain if get_topology(topology).inverting else gain
        designs.append(
            CheckDesign(
                name, topology, parts, device, conditions, hand_gain=hand_gain, hand_ic=min(i_d, 0.25 * device.idss_typ)
            )
        )
    return designs


# ---- followers --------------------------------------------------------------------------
# (topology, supply V, emitter current A, hFE, source ohm, load ohm, load capacitance F):
# emitter and bootstrapped followers from a 50-ohm line to a 10-Mohm piezo source, each driving
# a cable; the bootstrapped ones at low current into high loads, where the input impedance
# reaches megohms.
_FOLLOWER_CASES = [
    ("emitter_follower", 9.0, 1.0e-3, 200, 600, 10e3, 1e-9),
    ("emitter_follower", 3.3, 0.5e-3, 120, 1e3, 4.7e3, 470e-12),
    ("emitter_follower", 5.0, 2.0e-3, 60, 50, 1e3, 10e-9),
    ("emitter_follower", 12.0, 5.0e-3, 300, 600, 600, 2.2e-9),
    ("emitter_follower", 15.0, 0.5e-3, 500, 10e3, 100e3, 220e-12),
    ("emitter_follower", 24.0, 1.5e-3, 250, 1e3, 2.2e3, 1e-9),
    ("emitter_follower", 30.0, 3.0e-3, 100, 600, 47e3, 4.7e-9),
    ("emitter_follower", 9.0, 0.3e-3, 400, 100e3, 1e6, 100e-12),
    ("bootstrap_follower", 9.0, 0.2e-3, 400, 1e6, 1e6, 100e-12),
    ("bootstrap_follower", 12.0, 0.3e-3, 300, 4.7e6, 470e3, 220e-12),
    ("bootstrap_follower", 9.0, 0.1e-3, 500, 10e6, 1e6, 100e-12),
    ("bootstrap_follower", 15.0, 0.5e-3, 250, 2.2e6, 220e3, 470e-12),
    ("bootstrap_follower", 24.0, 0.5e-3, 400, 1e6, 1e6, 220e-12),
    ("bootstrap_follower", 5.0, 0.2e-3, 200, 100e3, 100e3, 220e-12),
    ("bootstrap_follower", 12.0, 1.0e-3, 150, 10e3, 10e3, 2.2e-9),
    ("bootstrap_follower", 30.0, 0.3e-3, 500, 5.6e6, 2.2e6, 100e-12),
]


def follower_designs() -> list[CheckDesign]:
    """The followers' designs of the agreement set (8 per topology), hand method unrounded; the
    hand gain is the textbook's unity."""
    designs = []
    for topology, supply, ie, hfe, rs, rl, cl in _FOLLOWER_CASES:
        req = HandRequirements(
            supply=supply, gain=1.0, load_impedance=rl, source_impedance=rs, f_low=20.0, collector_current=ie, hfe=hfe
        )
        conditions = Conditions(
            supply=supply,
            source_impedance=float(rs),
            load_impedance=float(rl),
            band=(20.0, 20000.0),
            temperature=27.0,
            load_capacitance=cl,
        )
        designs.append(
            CheckDesign(
                f"{topology}-{supply:g}V-I{ie * 1e3:g}mA-hfe{hfe}-rs{rs:g}",
                topology,
                get_topology(topology).hand_design(req),
                check_device(hfe),
                conditions,
                hand_gain=1.0,
                hand_ic=ie,
            )
        )
    return designs


# ---- polarity and supply arrangements: PNP, negative rail, split supply -------------------
# The same stages drawn as NPN on a positive rail, built with a PNP device (mirrored) and/or
# on a negative rail (shifted), and on a split supply with a ground-referenced base (r_top
# absent): the polarity layer of optimizer/topologies/base.py against ngspice.

POLARITY_TOPOLOGIES = ("divider_ce", "divider_ce_split")
# (V+, V- for divider_ce_split, V- for divider_ce, |gain| for divider_ce_split, Ic A, hFE, source
# ohm, load ohm): split supplies. divider_ce's r_emitter is its whole emitter resistance, so its
# gain needs a small negative rail.
_SPLIT_CASES = [
    (12.0, -3.0, -3.0, 8.0, 1.0e-3, 200, 600, 100e3),
    (6.0, -6.0, -1.5, 5.0, 0.5e-3, 120, 1e3, 47e3),
    (15.0, -15.0, -2.0, 15.0, 1.0e-3, 300, 600, 22e3),
    (12.0, -12.0, -2.5, 10.0, 2.0e-3, 250, 10e3, 100e3),
    (9.0, -2.5, -2.5, 4.0, 0.5e-3, 400, 1e3, 47e3),
    (5.0, -5.0, -1.5, 6.0, 1.0e-3, 60, 50, 22e3),
    (24.0, -6.0, -6.0, 20.0, 1.5e-3, 250, 1e3, 47e3),
    (15.0, -4.0, -1.8, 8.0, 3.0e-3, 100, 600, 10e3),
]
_VBE_HAND, _BASE_DROP = 0.65, 0.1  # V: the hand method's Vbe and the drop of Ib across r_bottom


def split_hand_design(
    topology: str,
    v_pos: float,
    v_neg: float,
    gain: float,
    ic: float,
    hfe: float,
    rs: float,
    rl: float,
    f_low: float = 20.0,
) -> tuple[dict[str, float], float]:
    """The hand method on a split supply (parts in ohm and F, and the signed gain it predicts):
    the base at ground through r_bottom (Ib dropping _BASE_DROP across it), the emitter
    resistors carrying Ic from -Vbe to the negative rail, the collector centred between the
    positive rail and ground; divider_ce's gain is then r_collector||load / r_emitter,
    divider_ce_split's r_emitter is set for ``gain`` and r_emitter_dc takes the rest."""
    r_bottom = _BASE_DROP * hfe / ic
    re_total = (-v_neg - _VBE_HAND - _BASE_DROP) / ic
    rc = v_pos / (2.0 * ic)
    rac = rc * rl / (rc + rl)
    re = re_total if topology == "divider_ce" else rac / gain
    parts = {
        "r_bottom": r_bottom,
        "r_collector": rc,
        "r_emitter": re,
        "c_in": coupling_capacitor(r_bottom * hfe * re / (r_bottom + hfe * re) + rs, f_low),
        "c_out": coupling_capacitor(rc + rl, f_low),
    }
    if topology == "divider_ce_split":
        parts["r_emitter_dc"] = re_total - re
        parts["c_emitter"] = coupling_capacitor(
            parts["r_emitter_dc"] * (re + 0.026 / ic) / (parts["r_emitter_dc"] + re + 0.026 / ic), f_low
        )
    return parts, -rac / re


def split_stage(
    hfe: float, v_pos: float, v_neg: float, pnp: bool, rs: float, rl: float, cl: float = 0.0
) -> tuple[Device, Conditions, str]:
    """The check device (hFE ``hfe``) and the conditions of a stage drawn as NPN on the rails
    v_pos/v_neg (V) with source ``rs``, load ``rl`` (ohm) and load capacitance ``cl`` (F), and the
    rails' label ("+12/-3V"). ``pnp``: the PNP stage, its mirror image (the emitter side on the
    positive rail, the rails negated)."""
    device = check_device(hfe)
    span = v_pos - v_neg
    if pnp:
        device = replace(device, id=device.id.replace("npn", "pnp"), polarity="pnp")
        v_pos, v_neg = -v_neg, -v_pos
    conditions = Conditions(
        supply=span,
        source_impedance=float(rs),
        load_impedance=float(rl),
        band=(20.0, 20000.0),
        temperature=27.0,
        load_capacitance=cl,
        below_ground=-v_neg / span,
    )
    return device, conditions, f"+{v_pos:g}/{v_neg:g}V"


def polarity_designs() -> list[CheckDesign]:
    """Designs of the two POLARITY_TOPOLOGIES in each arrangement, 8 per topology and kind:
    PNP (the positive-rail designs of _CASES, on a positive rail and on a negative one in
    turn), NPN on a negative rail (the same designs), and split supplies (_SPLIT_CASES, NPN
    and PNP in turn, a PNP's rails mirrored): 48 in all."""
    base = [d for d in check_designs() if d.topology in POLARITY_TOPOLOGIES and not d.name.endswith("-rc")]
    designs = []
    for i, d in enumerate(base):
        pnp = replace(d.device, id=d.device.id.replace("npn", "pnp"), polarity="pnp")
        below = float(i % 2)
        designs.append(
            replace(
                d,
                name=f"{d.name}-pnp-{'negative' if below else 'positive'}",
                device=pnp,
                conditions=replace(d.conditions, below_ground=below),
            )
        )
        designs.append(replace(d, name=f"{d.name}-npn-negative", conditions=replace(d.conditions, below_ground=1.0)))
    for topology in POLARITY_TOPOLOGIES:
        for i, (v_pos, v_neg_bypassed, v_neg_unbypassed, gain, ic, hfe, rs, rl) in enumerate(_SPLIT_CASES):
            v_neg = v_neg_unbypassed if topology == "divider_ce" else v_neg_bypassed
            parts, hand_gain = split_hand_design(topology, v_pos, v_neg, gain, ic, hfe, rs, rl)
            device, conditions, rails = split_stage(hfe, v_pos, v_neg, bool(i % 2), rs, rl)
            designs.append(
                CheckDesign(
                    f"{topology}-split{rails}-hfe{hfe}-{device.polarity}",
                    topology,
                    parts,
                    device,
                    conditions,
                    hand_gain=hand_gain,
                    hand_ic=ic,
                )
            )
    return designs


# The stages written after the polarity layer (the followers and the feedback pair), each
# through the same layer: the first two follower and pair designs of the agreement set, the one
# built with a PNP device on a positive rail (mirrored), the other as NPN on a negative rail
# (shifted); the followers' same designs also on a split supply, moved there by the search's own
# seed rule (synthesis.on_split_supply: r_top left out, r_follower carrying the hand current
# from ground less Vbe), NPN with ground mid-span and PNP with ground a third of the span up.
LATER_POLARITY_TOPOLOGIES = ("emitter_follower", "bootstrap_follower", "feedback_pair")


def later_polarity_designs() -> list[CheckDesign]:
    """Two designs per LATER_POLARITY_TOPOLOGIES stage and arrangement: PNP on a positive rail,
    NPN on a negative rail and, for the followers, NPN and PNP on a split supply (20 in all)."""
    designs = []
    for topology in LATER_POLARITY_TOPOLOGIES:
        for d in [d for d in pair_designs() + follower_designs() if d.topology == topology][:2]:
            pnp = replace(d.device, id=d.device.id.replace("npn", "pnp"), polarity="pnp")
            designs.append(replace(d, name=f"{d.name}-pnp-positive", device=pnp))
            designs.append(
                replace(d, name=f"{d.name}-npn-negative", conditions=replace(d.conditions, below_ground=1.0))
            )
            c = d.conditions
            if topology == "feedback_pair":
                continue  # its split designs follow its own split hand rule: fb_split_designs
            req = HandRequirements(
                supply=c.supply,
                gain=1.0,
                load_impedance=c.load_impedance,
                source_impedance=c.source_impedance,
                f_low=c.band[0],
                collector_current=d.hand_ic,
                hfe=d.device.hfe_typ,
            )
            for device, below in ((d.device, 0.5), (pnp, 1.0 / 3.0)):
                parts = on_split_supply(d.parts, req, below if device.polarity == "npn" else 1.0 - below)
                assert parts is not None
                designs.append(
                    replace(
                        d,
                        name=f"{d.name}-{device.polarity}-split{below:.2f}",
                        parts=parts,
                        device=device,
                        conditions=replace(c, below_ground=below),
                    )
                )
    return designs


# ---- direct-coupled inputs on a split supply ------------------------------------------------
# A ground-referenced source that passes DC (spec input_coupling: direct) wired to the base of a
# stage whose base sits at ground on its split supply: no c_in, the source's resistance in the
# base's DC path beside r_bottom (the base current through it shifts the bias). divider_ce,
# divider_ce_split and emitter_follower on +-12 V and +-15 V, NPN and PNP in turn; divider_ce
# (its r_emitter the whole emitter resistance, so a gain above one needs a small negative rail)
# on +12/-2.5 V and +15/-3 V.
DIRECT_TOPOLOGIES = ("divider_ce", "divider_ce_split", "emitter_follower")
# (positive rail V, divider_ce's negative rail V, |gain| for divider_ce_split, Ic A, hFE, source
# ohm, load ohm, load capacitance F: a cable, which brings the follower's f_high into the sweep)
_DIRECT_CASES = [
    (12.0, -2.5, 10.0, 1.0e-3, 200, 600, 47e3, 1e-9),
    (15.0, -3.0, 15.0, 0.5e-3, 300, 2.2e3, 100e3, 470e-12),
    (12.0, -2.5, 6.0, 2.0e-3, 100, 10e3, 22e3, 2.2e-9),
    (15.0, -3.0, 20.0, 1.0e-3, 400, 1e3, 47e3, 1e-9),
]


def direct_coupled_designs() -> list[CheckDesign]:
    """4 designs per DIRECT_TOPOLOGIES stage on a split supply with c_in left out (0, the source
    wired to the base), NPN and PNP in turn (a PNP's rails mirrored): 12 in all. The
    common-emitter stages by the split hand method, the follower by the hand method moved to the
    split supply by the search's seed rule (synthesis.on_split_supply)."""
    designs = []
    for topology in DIRECT_TOPOLOGIES:
        for i, (v_pos, v_neg_ce, gain, ic, hfe, rs, rl, cl) in enumerate(_DIRECT_CASES):
            v_neg = v_neg_ce if topology == "divider_ce" else -v_pos
            span = v_pos - v_neg
            if topology == "emitter_follower":
                req = HandRequirements(
                    supply=span,
                    gain=1.0,
                    load_impedance=rl,
                    source_impedance=rs,
                    f_low=20.0,
                    collector_current=ic,
                    hfe=hfe,
                )
                parts = on_split_supply(get_topology(topology).hand_design(req), req, -v_neg / span)
                assert parts is not None
                hand_gain = 1.0
            else:
                parts, hand_gain = split_hand_design(topology, v_pos, v_neg, gain, ic, hfe, rs, rl)
            device, conditions, rails = split_stage(hfe, v_pos, v_neg, bool(i % 2), rs, rl, cl)
            designs.append(
                CheckDesign(
                    f"{topology}-direct{rails}-hfe{hfe}-rs{rs:g}-{device.polarity}",
                    topology,
                    {**parts, "c_in": 0.0},
                    device,
                    conditions,
                    hand_gain=hand_gain,
                    hand_ic=ic,
                )
            )
    return designs


# ---- split supplies for the feedback pair and the collector-fed common emitter ----------------
# feedback_pair on +-12 V and +-15 V by its own split hand rule (FeedbackPair.split_hand_design:
# q1's base at ground through r_bottom alone, r_emitter to the negative rail, r_feedback raised
# for the finite loop gain), and feedback_ce across the two rails as it is (split_bias "span":
# r_feedback from the collector, r_emitter to the negative rail, source and load at ground);
# NPN and PNP in turn (a PNP's rails mirrored, so its emitter side is the positive rail).

# (rail magnitude V, |gain| V/V, Ic A, hFE, source ohm, load ohm, load capacitance F)
_FB_SPLIT_CASES = [
    (12.0, 6.0, 1.0e-3, 200, 600, 10e3, 0.0),
    (15.0, 6.0, 1.0e-3, 300, 600, 10e3, 0.0),
    (15.0, 10.0, 2.0e-3, 200, 50, 2.2e3, 0.0),
    (12.0, 3.0, 0.5e-3, 500, 1e3, 47e3, 1e-9),
    (15.0, 4.0, 1.0e-3, 100, 10e3, 100e3, 0.0),
    (12.0, 10.0, 2.0e-3, 300, 50, 10e3, 330e-12),
    (15.0, 3.0, 0.5e-3, 250, 600, 22e3, 2.2e-9),
    (12.0, 5.0, 1.5e-3, 150, 1e3, 4.7e3, 0.0),
]
FB_SPLIT_TOPOLOGIES = ("feedback_pair", "feedback_ce")


def hand_requirements(supply: float, gain: float, ic: float, hfe: float, rs: float, rl: float) -> HandRequirements:
    """The hand method's requirements of a check design (V, V/V, A, -, ohm, ohm; the band's low
    edge at 20 Hz)."""
    return HandRequirements(
        supply=supply, gain=gain, load_impedance=rl, source_impedance=rs, f_low=20.0, collector_current=ic, hfe=hfe
    )


def fb_split_designs() -> list[CheckDesign]:
    """8 designs per FB_SPLIT_TOPOLOGIES stage on +-12 V and +-15 V, NPN and PNP in turn, each
    the stage's own split hand design (Topology.split_hand_design), unrounded (16 in all)."""
    designs = []
    for topology in FB_SPLIT_TOPOLOGIES:
        for i, (rail, gain, ic, hfe, rs, rl, cl) in enumerate(_FB_SPLIT_CASES):
            req = hand_requirements(2.0 * rail, gain, ic, hfe, rs, rl)
            device, conditions, _ = split_stage(hfe, rail, -rail, bool(i % 2), rs, rl, cl)
            parts = get_topology(topology).split_hand_design(req, 0.5)
            assert parts is not None
            inverting = get_topology(topology).inverting
            designs.append(
                CheckDesign(
                    f"{topology}-split+-{rail:g}V-A{gain:g}-hfe{hfe}-{device.polarity}"
                    + (f"-CL{cl * 1e9:g}n" if cl else ""),
                    topology,
                    parts,
                    device,
                    conditions,
                    hand_gain=-gain if inverting else gain,
                    hand_ic=ic * (SPLIT_CURRENT_SHARE if topology == "feedback_pair" else 1.0),
                )
            )
    return designs


# ---- feedback_pair_ac (the pair with its feedback leg AC-coupled) ------------------------------
# Hand designs of optimizer/topologies/feedback_pair_ac.py (the plain pair's bias at its DC gain,
# then r_emitter and c_feedback for the gain): on positive rails, and on +-12 V and +-15 V (NPN
# and PNP in turn) at the gains the plain pair's split rule cannot reach (20-40 V/V).
# (rails V: (positive, negative), gain V/V, q2's hand Ic A, hFE, source ohm, load ohm, load capacitance F)
_PAIR_AC_CASES = [
    ((15.0, 0.0), 20.0, 1.0e-3, 200, 600, 10e3, 0.0),
    ((24.0, 0.0), 30.0, 2.0e-3, 300, 150, 2.2e3, 0.0),
    ((12.0, 0.0), 8.0, 1.0e-3, 100, 1e3, 47e3, 1e-9),
    ((9.0, 0.0), 10.0, 0.5e-3, 500, 50, 22e3, 0.0),
    ((15.0, -15.0), 30.0, 3.0e-3, 200, 2.2e3, 2e3, 0.0),
    ((12.0, -12.0), 20.0, 2.0e-3, 300, 600, 10e3, 0.0),
    ((15.0, -15.0), 40.0, 2.0e-3, 150, 150, 47e3, 330e-12),
    ((12.0, -12.0), 10.0, 1.0e-3, 500, 10e3, 10e3, 0.0),
]


def pair_ac_designs() -> list[CheckDesign]:
    """The feedback_pair_ac designs of the agreement set (8: four on a positive rail, four on a
    split supply, NPN and PNP in turn; hand gain +target, hand Ic q1's: half of q2's on a
    positive rail, SPLIT_CURRENT_SHARE of the hand current on a split supply)."""
    topology = get_topology("feedback_pair_ac")
    designs = []
    for i, ((v_pos, v_neg), gain, ic, hfe, rs, rl, cl) in enumerate(_PAIR_AC_CASES):
        req = hand_requirements(v_pos - v_neg, gain, ic, hfe, rs, rl)
        device, conditions, rails = split_stage(hfe, v_pos, v_neg, v_neg < 0 and bool(i % 2), rs, rl, cl)
        if v_neg < 0:
            parts, hand_ic = topology.split_hand_design(req, 0.5), SPLIT_CURRENT_SHARE * ic
        else:
            parts, hand_ic = topology.hand_design(req), 0.5 * ic
        name = f"feedback_pair_ac-{rails}-A{gain:g}-hfe{hfe}-{device.polarity}" + (f"-CL{cl * 1e9:g}n" if cl else "")
        designs.append(
            CheckDesign(name, "feedback_pair_ac", parts, device, conditions, hand_gain=gain, hand_ic=hand_ic)
        )
    return designs
