"""ce_follower: divider_ce (q1) direct-coupled into an emitter follower (q2).

Nodes: as divider_ce for q1; q1 collector = q2 base, q2 collector at vcc, r_follower
emitter2-gnd, c_out emitter2-out, load out-gnd. Same device for q1 and q2.
"""

from __future__ import annotations

from typing import Callable

import numpy as np

from optimizer import physics
from optimizer.devices import Device
from optimizer.synthesis import HandRequirements, coupling_capacitor, parallel
from optimizer.topologies.base import Bias, Conditions, Parts, StageModel, input_hold
from optimizer.topologies.divider_ce import add_divider_stage, divider_hand_design, divider_ratings
from optimizer.topologies.emitter_follower import add_follower

BIAS_PASSES = 3  # q1/q2 alternations; they couple only through q2's base current and Early effect


class CEFollower(StageModel):
    name = "ce_follower"
    inverting = True
    polarities = ("npn", "pnp")
    supplies = ("positive", "negative", "split")
    direct_input = True  # on a split supply the base sits at ground: a DC source may drive it directly
    description = "divider-biased common emitter direct-coupled into an emitter follower"
    resistors = ("r_top", "r_bottom", "r_collector", "r_emitter", "r_follower")
    capacitors = ("c_in", "c_out")
    transistors = 2
    order = 40
    elements = (
        ("c_in", "src", "base"),
        ("r_top", "vcc", "base"),
        ("r_bottom", "base", "0"),
        ("r_collector", "vcc", "collector"),
        ("r_emitter", "emitter", "0"),
        ("r_follower", "emitter2", "0"),
        ("c_out", "emitter2", "out"),
    )
    transistor_pins = (("q1", "collector", "base", "emitter"), ("q2", "vcc", "collector", "emitter2"))
    node_voltages = {"base": "v_base", "collector": "v_collector", "emitter": "v_emitter", "emitter2": "v_emitter2"}
    vce_keys = ("vce", "vce2")

    def hand_design(self, req: HandRequirements) -> dict[str, float]:
        # The follower presents ~ hfe * (r_follower || RL) to the first stage.
        follower_current = 2.0 * req.collector_current
        r_follower = req.supply / 2.0 / follower_current
        parts = divider_hand_design(req, req.hfe * parallel(r_follower, req.load_impedance))
        parts["r_follower"] = r_follower
        parts["c_out"] = coupling_capacitor(req.load_impedance, req.f_low)
        return parts

    def _bias(self, p: Parts, device: Device, c: Conditions, beta: np.ndarray, nvt: float, i_s: float) -> Bias:
        rt, rb, rc, re, rf = p["r_top"], p["r_bottom"], p["r_collector"], p["r_emitter"], p["r_follower"]
        vcc = c.supply
        vth, rth = vcc * rb / (rt + rb), rt * rb / (rt + rb)
        ib2 = np.zeros_like(vth)
        kw = {"i_s": i_s, "beta": beta, "nvt": nvt, "inv_vaf": device.inv_vaf}
        for _ in range(BIAS_PASSES):
            q1 = physics.solve_junction(
                vth, rth + device.RB, re, vcb0=vcc - rc * ib2, vcb_ic=rc + re, vcb_ib=re, vcb_vbe=1.0, **kw
            )
            # q2 loop: Vcc - Rc*(Ic1+Ib2) - RB*Ib2 - Vbe2 - Rf*(Ic2+Ib2) = 0; Vcb2 = Rc*(Ic1+Ib2) + RB*Ib2
            q2 = physics.solve_junction(
                vcc - rc * q1["ic"], rc + device.RB, rf, vcb0=rc * q1["ic"], vcb_ib=-(rc + device.RB), **kw
            )
            ib2 = q2["ib"]
        ic, ib, ic2 = q1["ic"], q1["ib"], q2["ic"]
        v_e = re * (ic + ib)
        v_base = v_e + q1["vbe"] + device.RB * ib
        v_c = vcc - rc * (ic + ib2)
        v_e2 = rf * (ic2 + ib2)
        vce, vce2 = v_c - v_e, vcc - v_e2
        i_div = (vcc - v_base) / rt
        active = physics.is_active(vce, ic, device.vce_sat, q1["converged"]) & physics.is_active(
            vce2, ic2, device.vce_sat, q2["converged"]
        )
        op = {
            "v_base": v_base,
            "v_collector": v_c,
            "v_emitter": v_e,
            "v_emitter2": v_e2,
            "ic": ic,
            "ib": ib,
            "ic2": ic2,
            "ib2": ib2,
            "i_divider": i_div,
            "vce": vce,
            "vce2": vce2,
            "vbe": q1["vbe"],
            "vbe2": q2["vbe"],
            "active": active,
            "supply_current": i_div + ic + ib2 + ic2,
            "q_power": np.maximum(vce * ic, vce2 * ic2),
        }
        return Bias(
            op, [physics.small_signal(q1, device, beta, nvt, i_s), physics.small_signal(q2, device, beta, nvt, i_s)]
        )

    def _stages(self, p: Parts, c: Conditions, b: Bias, r_source: np.ndarray) -> tuple[dict, dict, np.ndarray]:
        ss1, ss2 = b.small_signal
        rth = physics.parallel(p["r_top"], p["r_bottom"])
        r_e2 = physics.parallel(p["r_follower"], np.full_like(rth, c.load_impedance))
        zero = np.zeros_like(rth)
        z_b2 = physics.ce_midband(ss2, r_e2, zero, zero)["z_base"]
        m1 = physics.ce_midband(
            ss1, p["r_emitter"], physics.parallel(p["r_collector"], z_b2), physics.parallel(r_source, rth)
        )
        m2 = physics.ce_midband(ss2, r_e2, zero, physics.parallel(p["r_collector"], m1["z_coll"]))
        return m1, m2, rth

    def _midband(self, p: Parts, c: Conditions, b: Bias, r_source: np.ndarray) -> dict[str, np.ndarray]:
        m1, m2, rth = self._stages(p, c, b, r_source)
        z_in = physics.parallel(rth, m1["z_base"])
        return {
            "gain": z_in / (z_in + r_source) * m1["gain_c"] * m2["gain_e"],
            "input_impedance": z_in,
            "output_impedance": physics.parallel(p["r_follower"], m2["z_emit"]),
            # q1 expands (inverting), the follower compresses: their second harmonics subtract
            "hd2_terms": [
                (
                    1.0 / np.abs(m1["gain_x"] * m2["gain_e"]),
                    1.0 / m1["loop"],
                    b.small_signal[0]["go"] * physics.parallel(p["r_collector"], m2["z_base"]),
                    1.0,
                ),
                (1.0 / np.abs(m2["gain_x_e"]), 1.0 / m2["loop"], 0.0, -1.0),
            ],
            "follower_gain": m2["gain_e"],
            "z_base2": m2["z_base"],
        }

    def _swing(
        self, p: Parts, device: Device, c: Conditions, b: Bias, mid: dict[str, np.ndarray]
    ) -> tuple[np.ndarray, np.ndarray]:
        op = b.op
        a_f = np.abs(mid["follower_gain"])
        r_ac1 = physics.parallel(p["r_collector"], mid["z_base2"])
        cut1, sat1 = physics.load_line_limits(op["ic"], op["vce"], device.vce_sat, r_ac1, p["r_emitter"])
        r_e2 = physics.parallel(p["r_follower"], np.full_like(a_f, c.load_impedance))
        cut2 = (op["ic2"] + op["ib2"]) * r_e2
        sat2 = np.maximum(op["vce2"] - device.vce_sat, 0.0)
        peak = np.minimum(np.minimum(a_f * cut1, a_f * sat1), np.minimum(cut2, sat2))
        vce_max = np.maximum(
            np.minimum(c.supply, op["v_collector"] + cut1), c.supply - np.maximum(op["v_emitter2"] - cut2, 0.0)
        )
        return 2.0 * peak, vce_max

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
        net, rail = self._new_network(
            ("in", "base", "bint", "emitter", "collector", "bint2", "emitter2", "out"), p, c, ac, supply
        )
        add_divider_stage(net, p, ss, ac, r_source, rail)
        net.resistor("emitter", None, p["r_emitter"])
        add_follower(net, p, c, ss[1], ac, load, rail, ("collector", "bint2", "emitter2"))
        return net

    def _output_q(self, op: dict[str, np.ndarray]) -> np.ndarray:
        return op["v_emitter2"]

    def _ratings(self, p: Parts, c: Conditions, b: Bias) -> dict[str, np.ndarray]:
        op = b.op
        return {
            **divider_ratings(p, c, op),
            "p_r_follower": op["v_emitter2"] ** 2 / p["r_follower"],
            "p_q1": op["vce"] * op["ic"],
            "p_q2": op["vce2"] * op["ic2"],
            "v_c_out": np.full_like(op["ic"], c.ground_rail_max),
        }

    def static_output(
        self, p: Parts, device: Device, c: Conditions, b: Bias, nvt: float, i_s: float, beta: np.ndarray
    ) -> Callable[[np.ndarray], np.ndarray]:
        """Load voltage (V) against source voltage (V): q1's base loop, then q2's, at every sample."""
        op = b.op
        rth = physics.parallel(p["r_top"], p["r_bottom"])
        vth = c.supply * p["r_bottom"] / (p["r_top"] + p["r_bottom"])
        rs = max(c.source_impedance, physics.R_FLOOR)
        rc, re = p["r_collector"], p["r_emitter"]
        r_e2 = physics.parallel(p["r_follower"], np.full_like(rth, c.load_impedance))
        v_e2_th = op["v_emitter2"] * r_e2 / c.load_impedance  # Thevenin of r_follower and the charged c_out
        kw = {"i_s": i_s, "beta": beta, "nvt": nvt, "inv_vaf": device.inv_vaf}

        def out(vs: np.ndarray) -> np.ndarray:
            a = (vth * rs + (vs + input_hold(p, c, op)) * rth) / (rs + rth)
            q1 = physics.solve_junction(
                a,
                physics.parallel(rth, rs) + device.RB,
                re,
                vcb0=c.supply - rc * op["ib2"],
                vcb_ic=rc + re,
                vcb_ib=re,
                vcb_vbe=1.0,
                v_start=op["vbe"],
                iterations=physics.THD_ITERATIONS,
                currents_only=True,
                saturation=True,
                **kw,
            )
            v_e1 = re * (q1["ic"] + q1["ib"])
            # saturated, q1 takes no more collector current than keeps its collector at v_e1 + vce_sat
            ic1 = np.minimum(q1["ic"], (c.supply - v_e1 - device.vce_sat) / rc)
            q2 = physics.solve_junction(
                c.supply - rc * ic1 - v_e2_th,
                rc + device.RB,
                r_e2,
                vcb0=rc * ic1,
                vcb_ib=-(rc + device.RB),
                v_start=op["vbe2"],
                iterations=physics.THD_ITERATIONS,
                currents_only=True,
                **kw,
            )
            v_c1 = np.maximum(c.supply - rc * (q1["ic"] + q2["ib"]), v_e1 + device.vce_sat)
            # the follower cannot lift its emitter above its base less Vbe; cut off, the emitter
            # rests at the Thevenin voltage of r_follower and the charged c_out (never below it)
            v_e2 = np.minimum(
                v_e2_th + r_e2 * (q2["ic"] + q2["ib"]), np.maximum(v_c1 - device.RB * q2["ib"] - q2["vbe"], v_e2_th)
            )
            return v_e2 - op["v_emitter2"]

        return out
