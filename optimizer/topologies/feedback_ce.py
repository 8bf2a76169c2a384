"""feedback_ce: common emitter biased by r_feedback from collector to base.

Nodes: r_feedback collector-base, r_collector vcc-collector, r_emitter emitter-gnd (0 =
emitter grounded), c_in source-base, c_out collector-out, load out-gnd.
"""

from __future__ import annotations

from typing import Callable

import numpy as np

from optimizer import physics
from optimizer.devices import Device
from optimizer.synthesis import VBE_HAND, HandRequirements, centred_collector_resistor, coupling_capacitor
from optimizer.topologies.base import Bias, Conditions, Parts, StageModel
from optimizer.topologies.divider_ce import add_load


class FeedbackCE(StageModel):
    name = "feedback_ce"
    inverting = True
    polarities = ("npn", "pnp")
    # biased from its own collector, so on a split supply it spans the two rails as it is: the
    # emitter side returns to the negative rail, and only the source and the load see ground
    supplies = ("positive", "negative", "split")
    split_bias = "span"
    description = "common emitter biased by a collector-to-base feedback resistor"
    resistors = ("r_feedback", "r_collector", "r_emitter")
    capacitors = ("c_in", "c_out")
    order = 30
    transistors = 1
    optional_parts = ("r_emitter",)
    elements = (
        ("c_in", "src", "base"),
        ("r_feedback", "collector", "base"),
        ("r_collector", "vcc", "collector"),
        ("r_emitter", "emitter", "0"),
        ("c_out", "collector", "out"),
    )
    transistor_pins = (("q1", "collector", "base", "emitter"),)
    node_voltages = {"base": "v_base", "collector": "v_collector", "emitter": "v_emitter"}

    def hand_design(self, req: HandRequirements) -> dict[str, float]:
        ic, hfe = req.collector_current, req.hfe
        rc, re = centred_collector_resistor(req)
        ib = ic / hfe
        v_collector = req.supply - (ic + ib) * rc
        r_feedback = (v_collector - ic * re - VBE_HAND) / ib
        z_in = hfe * re  # the feedback resistor's Miller share is left out by hand
        return {
            "r_feedback": r_feedback,
            "r_collector": rc,
            "r_emitter": re,
            "c_in": coupling_capacitor(z_in + req.source_impedance, req.f_low),
            "c_out": coupling_capacitor(rc + req.load_impedance, req.f_low),
        }

    def _bias(self, p: Parts, device: Device, c: Conditions, beta: np.ndarray, nvt: float, i_s: float) -> Bias:
        rf, rc, re = p["r_feedback"], p["r_collector"], p["r_emitter"]
        # Vcc = Rc*(Ic+Ib) + (Rf+RB)*Ib + Vbe + Re*(Ic+Ib); Vcb = (Rf+RB)*Ib
        q = physics.solve_junction(
            c.supply,
            rf + device.RB,
            rc + re,
            i_s=i_s,
            beta=beta,
            nvt=nvt,
            inv_vaf=device.inv_vaf,
            vcb_ib=-(rf + device.RB),
        )
        ic, ib = q["ic"], q["ib"]
        ie = ic + ib
        v_e = re * ie
        v_c = c.supply - rc * ie
        vce = v_c - v_e
        op = {
            "v_base": v_c - rf * ib,
            "v_collector": v_c,
            "v_emitter": v_e,
            "ic": ic,
            "ib": ib,
            "i_divider": ib,
            "vce": vce,
            "vbe": q["vbe"],
            "active": physics.is_active(vce, ic, device.vce_sat, q["converged"]),
            "supply_current": ie,
            "q_power": vce * ic,
        }
        return Bias(op, [physics.small_signal(q, device, beta, nvt, i_s)])

    def _midband(self, p: Parts, c: Conditions, b: Bias, r_source: np.ndarray) -> dict[str, np.ndarray]:
        ss = b.small_signal
        drive = self._network(p, c, ss, False, r_source, True)
        v = drive.solve({"in": 1.0 / r_source})
        gain_x = v["collector"] / (v["bint"] - v["emitter"])
        err = drive.solve({"collector": -np.ones_like(r_source), "emitter": np.ones_like(r_source)}, ["out"])["out"]
        return {
            "gain": v["out"],
            "input_impedance": self._network(p, c, ss, False, None, True).solve({"in": np.ones_like(r_source)}, ["in"])[
                "in"
            ],
            "output_impedance": self._network(p, c, ss, False, r_source, False).solve(
                {"out": np.ones_like(r_source)}, ["out"]
            )["out"],
            "hd2_terms": [
                (1.0 / np.abs(gain_x), ss[0]["gm"] * np.abs(err) / np.abs(gain_x), ss[0]["go"] * self._r_ac(p, c), 1.0)
            ],
        }

    @staticmethod
    def _r_ac(p: Parts, c: Conditions) -> np.ndarray:
        """AC load of the collector (ohm): r_collector || load || r_feedback."""
        return physics.parallel(p["r_collector"], np.full_like(p["r_collector"], c.load_impedance), p["r_feedback"])

    def _swing(
        self, p: Parts, device: Device, c: Conditions, b: Bias, mid: dict[str, np.ndarray]
    ) -> tuple[np.ndarray, np.ndarray]:
        op = b.op
        r_ac = self._r_ac(p, c)
        cut, sat = physics.load_line_limits(op["ic"], op["vce"], device.vce_sat, r_ac, p["r_emitter"])
        return 2.0 * np.minimum(cut, sat), np.minimum(c.supply, op["v_collector"] + cut)

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
        net, rail = self._new_network(("in", "base", "bint", "emitter", "collector", "out"), p, c, ac, supply)
        if r_source is not None:
            net.admittance("in", net.ground, 1.0 / r_source)
        net.capacitor("in", "base", p["c_in"], ac, True)
        net.resistor("base", "bint", ss[0]["rb"])
        net.resistor("collector", "base", p["r_feedback"])
        net.transistor("bint", "collector", "emitter", ss[0], ac)
        net.resistor("emitter", None, p["r_emitter"])
        net.resistor("collector", rail, p["r_collector"])
        net.capacitor("collector", "out", p["c_out"], ac, True)
        add_load(net, c, ac, load)
        return net

    def _output_q(self, op: dict[str, np.ndarray]) -> np.ndarray:
        return op["v_collector"]

    def _ratings(self, p: Parts, c: Conditions, b: Bias) -> dict[str, np.ndarray]:
        op = b.op
        ie = op["ic"] + op["ib"]
        return {
            "p_r_feedback": op["ib"] ** 2 * p["r_feedback"],
            "p_r_collector": ie**2 * p["r_collector"],
            "p_r_emitter": ie**2 * p["r_emitter"],
            "v_c_in": np.full_like(ie, c.ground_rail_max),
            "v_c_out": np.full_like(ie, c.ground_rail_max),
        }

    def static_output(
        self, p: Parts, device: Device, c: Conditions, b: Bias, nvt: float, i_s: float, beta: np.ndarray
    ) -> Callable[[np.ndarray], np.ndarray]:
        """Load voltage (V) against source voltage (V), the base and collector nodes eliminated.

        The collector node (r_collector to vcc, r_feedback to the base, the load through the
        charged c_out) is linear in the base voltage and Ic, so the base-node equation folds
        into the one-junction loop of :func:`physics.solve_junction` with effective resistances.
        """
        op = b.op
        rf, rc, re, rb = p["r_feedback"], p["r_collector"], p["r_emitter"], device.RB
        rs = max(c.source_impedance, physics.R_FLOOR)
        g_c = 1.0 / rc + 1.0 / rf + 1.0 / c.load_impedance
        c0 = c.supply / rc + op["v_collector"] / c.load_impedance  # vc = (c0 + vb/rf - ic)/g_c
        g_b = 1.0 / rs + 1.0 / rf - 1.0 / (rf * rf * g_c)
        k = 1.0 / (rf * g_c * g_b)
        r_emit = re + k
        r_base = rb + (1.0 - 1.0 / (rf * g_c)) / g_b + re - r_emit
        u = 1.0 / (rf * g_c)
        kw = {"i_s": i_s, "beta": beta, "nvt": nvt, "inv_vaf": device.inv_vaf}

        def out(vs: np.ndarray) -> np.ndarray:
            a = ((vs + op["v_base"]) / rs + c0 / (rf * g_c)) / g_b
            q = physics.solve_junction(
                a,
                r_base,
                r_emit,
                vcb0=c0 / g_c,
                vcb_ic=re + 1.0 / g_c - re * u,
                vcb_ib=re - (re + rb) * u,
                vcb_vbe=1.0 - u,
                v_start=op["vbe"],
                iterations=physics.THD_ITERATIONS,
                currents_only=True,
                saturation=True,
                **kw,
            )
            ie = q["ic"] + q["ib"]
            v_b = q["vbe"] + re * ie + rb * q["ib"]
            v_c = np.maximum((c0 + v_b / rf - q["ic"]) / g_c, re * ie + device.vce_sat)
            return v_c - op["v_collector"]

        return out
