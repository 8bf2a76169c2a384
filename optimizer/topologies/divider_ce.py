"""divider_ce: common emitter, voltage-divider bias, emitter resistor unbypassed.

Nodes: r_top vcc-base, r_bottom base-gnd, r_collector vcc-collector, r_emitter
emitter-gnd, c_in source-base, c_out collector-out, load out-gnd.
"""

from __future__ import annotations

from typing import Callable

import numpy as np

from optimizer import physics
from optimizer.devices import Device
from optimizer.synthesis import (
    VBE_HAND,
    HandRequirements,
    centred_collector_resistor,
    coupling_capacitor,
    divider,
    parallel,
)
from optimizer.topologies.base import Bias, Conditions, Parts, StageModel, couple_input, input_hold


def divider_hand_design(req: HandRequirements, stage_load: float) -> dict[str, float]:
    """The hand method's divider-biased common emitter driving ``stage_load`` (ohm): r_top,
    r_bottom, r_collector, r_emitter and c_in (ohm, F); the caller adds its output side."""
    first = HandRequirements(**{**req.__dict__, "load_impedance": stage_load})
    rc, re = centred_collector_resistor(first)
    r_top, r_bottom = divider(req, req.collector_current * re + VBE_HAND)
    z_in = parallel(parallel(r_top, r_bottom), req.hfe * re)
    return {
        "r_top": r_top,
        "r_bottom": r_bottom,
        "r_collector": rc,
        "r_emitter": re,
        "c_in": coupling_capacitor(z_in + req.source_impedance, req.f_low),
    }


class DividerCE(StageModel):
    name = "divider_ce"
    inverting = True
    polarities = ("npn", "pnp")
    supplies = ("positive", "negative", "split")
    direct_input = True  # on a split supply the base sits at ground: a DC source may drive it directly
    description = "common emitter, voltage-divider bias, emitter resistor unbypassed"
    order = 10
    resistors = ("r_top", "r_bottom", "r_collector", "r_emitter")
    capacitors = ("c_in", "c_out")
    transistors = 1
    elements = (
        ("c_in", "src", "base"),
        ("r_top", "vcc", "base"),
        ("r_bottom", "base", "0"),
        ("r_collector", "vcc", "collector"),
        ("r_emitter", "emitter", "0"),
        ("c_out", "collector", "out"),
    )
    transistor_pins = (("q1", "collector", "base", "emitter"),)
    node_voltages = {"base": "v_base", "collector": "v_collector", "emitter": "v_emitter"}
    gain_bound_roles = ("r_collector", "r_emitter")

    def gain_bound(self, resistors: dict[str, np.ndarray], load: float) -> np.ndarray:
        # the degenerated stage's gain beta*Rac/(r_pi + (beta+1)*Re) never reaches Rac/Re
        rc = resistors["r_collector"]
        return rc * load / (rc + load) / resistors["r_emitter"]

    def hand_design(self, req: HandRequirements) -> dict[str, float]:
        parts = divider_hand_design(req, req.load_impedance)
        parts["c_out"] = coupling_capacitor(parts["r_collector"] + req.load_impedance, req.f_low)
        return parts

    # emitter network: DC resistance, AC (unbypassed) resistance, DC voltage held by a bypass
    def _re_dc(self, p: Parts) -> np.ndarray:
        return p["r_emitter"]

    def _re_ac(self, p: Parts) -> np.ndarray:
        return p["r_emitter"]

    def _emitter_network(self, net: physics.Network, p: Parts, ac: bool) -> None:
        net.resistor("emitter", None, p["r_emitter"])

    def _nodes(self) -> tuple[str, ...]:
        return ("in", "base", "bint", "emitter", "collector", "out")

    def _bias(self, p: Parts, device: Device, c: Conditions, beta: np.ndarray, nvt: float, i_s: float) -> Bias:
        rt, rb, rc, re = p["r_top"], p["r_bottom"], p["r_collector"], self._re_dc(p)
        vcc = c.supply
        vth, rth = vcc * rb / (rt + rb), rt * rb / (rt + rb)
        q = physics.solve_junction(
            vth,
            rth + device.RB,
            re,
            i_s=i_s,
            beta=beta,
            nvt=nvt,
            inv_vaf=device.inv_vaf,
            vcb0=vcc,
            vcb_ic=rc + re,
            vcb_ib=re,
            vcb_vbe=1.0,
        )
        ic, ib = q["ic"], q["ib"]
        v_e = re * (ic + ib)
        v_base = v_e + q["vbe"] + device.RB * ib
        v_c = vcc - rc * ic
        vce = v_c - v_e
        i_div = (vcc - v_base) / rt
        op = {
            "v_base": v_base,
            "v_collector": v_c,
            "v_emitter": v_e,
            "ic": ic,
            "ib": ib,
            "i_divider": i_div,
            "vce": vce,
            "vbe": q["vbe"],
            "active": physics.is_active(vce, ic, device.vce_sat, q["converged"]),
            "supply_current": ic + i_div,
            "q_power": vce * ic,
        }
        op.update(self._extra_op(p, ic + ib))
        return Bias(op, [physics.small_signal(q, device, beta, nvt, i_s)])

    def _extra_op(self, p: Parts, ie: np.ndarray) -> dict[str, np.ndarray]:
        return {}

    def _output_q(self, op: dict[str, np.ndarray]) -> np.ndarray:
        return op["v_collector"]

    def _midband(self, p: Parts, c: Conditions, b: Bias, r_source: np.ndarray) -> dict[str, np.ndarray]:
        rth = physics.parallel(p["r_top"], p["r_bottom"])
        r_load = physics.parallel(p["r_collector"], np.full_like(rth, c.load_impedance))
        m = physics.ce_midband(b.small_signal[0], self._re_ac(p), r_load, physics.parallel(r_source, rth))
        z_in = physics.parallel(rth, m["z_base"])
        return {
            "gain": z_in / (z_in + r_source) * m["gain_c"],
            "input_impedance": z_in,
            "output_impedance": physics.parallel(p["r_collector"], m["z_coll"]),
            "hd2_terms": [(1.0 / np.abs(m["gain_x"]), 1.0 / m["loop"], b.small_signal[0]["go"] * r_load, 1.0)],
            "gain_c": m["gain_c"],
            "r_ac": r_load,
        }

    def _swing(
        self, p: Parts, device: Device, c: Conditions, b: Bias, mid: dict[str, np.ndarray]
    ) -> tuple[np.ndarray, np.ndarray]:
        op = b.op
        cut, sat = physics.load_line_limits(op["ic"], op["vce"], device.vce_sat, mid["r_ac"], self._re_ac(p))
        vce_max = np.minimum(c.supply, op["v_collector"] + cut) - op.get("v_e2", 0.0)
        return 2.0 * np.minimum(cut, sat), vce_max

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
        net, rail = self._new_network(self._nodes(), p, c, ac, supply)
        add_divider_stage(net, p, ss, ac, r_source, rail)
        self._emitter_network(net, p, ac)
        net.capacitor("collector", "out", p["c_out"], ac, True)
        add_load(net, c, ac, load)
        return net

    def _ratings(self, p: Parts, c: Conditions, b: Bias) -> dict[str, np.ndarray]:
        op = b.op
        ie = op["ic"] + op["ib"]
        r = {**divider_ratings(p, c, op), "v_c_out": np.full_like(ie, c.ground_rail_max)}
        r.update(self._extra_ratings(p, c, op, ie))
        return r

    def _extra_ratings(
        self, p: Parts, c: Conditions, op: dict[str, np.ndarray], ie: np.ndarray
    ) -> dict[str, np.ndarray]:
        return {}

    def static_output(
        self, p: Parts, device: Device, c: Conditions, b: Bias, nvt: float, i_s: float, beta: np.ndarray
    ) -> Callable[[np.ndarray], np.ndarray]:
        """Load voltage (V) against source voltage (V): the base loop solved at every sample.

        Coupling capacitors hold their DC voltages over the period; the emitter bypass (if
        any) holds the bypassed node; the collector sees r_collector || load around the
        quiescent point and flattens at vce_sat.
        """
        op = b.op
        rth = physics.parallel(p["r_top"], p["r_bottom"])
        vth = c.supply * p["r_bottom"] / (p["r_top"] + p["r_bottom"])
        rs = max(c.source_impedance, physics.R_FLOOR)
        r_t = physics.parallel(rth, rs)
        r_ac = physics.parallel(p["r_collector"], np.full_like(rth, c.load_impedance))
        re = self._re_ac(p)
        v_hold = op.get("v_e2", np.zeros_like(rth))
        ic_q, vc_q = op["ic"], op["v_collector"]
        # the loop's drive a0 + k_a*vs (V): the Thevenin of source and divider, c_in holding the base
        k_a = rth / (rs + rth)
        a0 = (vth * rs + input_hold(p, c, op) * rth) / (rs + rth) - v_hold
        floor = v_hold + device.vce_sat - vc_q  # the output's floor less v_e (V): vce_sat above the emitter

        def out(vs: np.ndarray) -> np.ndarray:
            q = physics.solve_junction(
                a0 + k_a * vs,
                r_t + device.RB,
                re,
                i_s=i_s,
                beta=beta,
                nvt=nvt,
                inv_vaf=device.inv_vaf,
                vcb0=vc_q + ic_q * r_ac - v_hold,
                vcb_ic=r_ac + re,
                vcb_ib=re,
                vcb_vbe=1.0,
                v_start=op["vbe"],
                iterations=physics.THD_ITERATIONS,
                currents_only=True,
                saturation=True,
            )
            return np.maximum((ic_q - q["ic"]) * r_ac, re * (q["ic"] + q["ib"]) + floor)  # v_c - vc_q

        return out


def add_load(net: physics.Network, c: Conditions, ac: bool, load: bool) -> None:
    """Load resistance (with its noise) and, in the AC network, load capacitance from node 'out'
    to the signal ground."""
    if load and np.isfinite(c.load_impedance):
        net.resistor("out", net.ground, np.asarray(c.load_impedance, dtype=float))
    if load and c.load_capacitance > 0:
        net.capacitor("out", net.ground, np.asarray(c.load_capacitance, dtype=float), ac, False)


def add_divider_stage(
    net: physics.Network,
    p: Parts,
    ss: list[dict[str, np.ndarray]],
    ac: bool,
    r_source: np.ndarray | None,
    rail: str | None,
) -> None:
    """The source, c_in, the bias divider, q1 and r_collector (r_top and r_collector return to
    ``rail``, None = AC ground, r_bottom to the network's bias ground); the emitter side is the caller's."""
    if r_source is not None:
        net.admittance("in", net.ground, 1.0 / r_source)
    couple_input(net, p, ac)
    net.resistor("base", rail, p["r_top"])
    net.resistor("base", net.bias_ground, p["r_bottom"])
    net.resistor("base", "bint", ss[0]["rb"])
    net.transistor("bint", "collector", "emitter", ss[0], ac)
    net.resistor("collector", rail, p["r_collector"])


def divider_ratings(p: Parts, c: Conditions, op: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    """Resistor powers (W) of the divider stage and the largest voltage on c_in (V, the larger
    rail against ground at its maximum: see StageModel._ratings; 0 without c_in)."""
    vcc = op["v_supply_local"]
    return {
        "p_r_top": (vcc - op["v_base"]) ** 2 / p["r_top"],
        "p_r_bottom": op["v_base"] ** 2 / p["r_bottom"],
        "p_r_collector": (vcc - op["v_collector"]) ** 2 / p["r_collector"],
        "p_r_emitter": (op["ic"] + op["ib"]) ** 2 * p["r_emitter"],
        "v_c_in": np.where(p["c_in"] > 0, c.ground_rail_max, 0.0) + 0.0 * vcc,
    }
