"""jfet_follower: n-channel JFET source follower, self-biased, its gate resistor bootstrapped.

Nodes: c_in src-gate, r_gate gate-tap, q1 (JFET: drain on the rail, gate, source),
r_source source-tap (sets Vgs = -Id*r_source), r_follower tap-gnd (sets the output's DC),
c_out source-out, load out-gnd. r_gate returns to the tap, which follows the output, so the
input impedance in band is r_gate divided by 1 minus the tap's gain: megohms from a 1 Mohm part.
"""

from __future__ import annotations

import numpy as np

from optimizer import physics
from optimizer.synthesis import HandRequirements, coupling_capacitor, jfet_hand_bias
from optimizer.topologies.base import Bias, Conditions, Parts
from optimizer.topologies.jfet_stage import JFETStage, square_law_clip


class JFETFollower(JFETStage):
    name = "jfet_follower"
    inverting = False
    description = "n-channel JFET source follower, self-biased, gate resistor bootstrapped from the source"
    order = 70
    resistors = ("r_gate", "r_source", "r_follower")
    capacitors = ("c_in", "c_out")
    elements = (
        ("c_in", "src", "gate"),
        ("r_gate", "gate", "tap"),
        ("r_source", "source", "tap"),
        ("r_follower", "tap", "0"),
        ("c_out", "source", "out"),
    )
    transistor_pins = (("q1", "vcc", "gate", "source"),)
    node_voltages = {"gate": "v_gate", "source": "v_source", "tap": "v_tap"}
    gain_bound_roles = ("r_follower",)
    output_node = "source"

    def gain_bound(self, resistors: dict[str, np.ndarray], load: float) -> np.ndarray:
        # a follower's gain stays below one
        return np.ones_like(resistors["r_follower"])

    def hand_design(self, req: HandRequirements) -> dict[str, float]:
        i_d, r_bias, gm, r_gate = jfet_hand_bias(req)
        vdsat = req.vp * (i_d / req.idss) ** 0.5
        v_source = 0.5 * (req.supply - vdsat)  # output centred in the room left (common practice)
        r_follower = max(v_source / i_d - r_bias, 0.1 * r_bias)
        return {
            "r_gate": r_gate,
            "r_source": r_bias,
            "r_follower": r_follower,
            "c_in": coupling_capacitor(r_gate + req.source_impedance, req.f_low),
            "c_out": coupling_capacitor(req.load_impedance + 1.0 / gm, req.f_low),
        }

    def _r_bias(self, p: Parts) -> np.ndarray:
        return p["r_source"]

    def _r_ground(self, p: Parts) -> np.ndarray:
        return p["r_source"] + p["r_follower"]

    def _gate_return(self, p: Parts, i_d: np.ndarray) -> np.ndarray:
        return i_d * p["r_follower"]

    def _extra_op(self, p: Parts, i_d: np.ndarray) -> dict[str, np.ndarray]:
        return {"v_tap": i_d * p["r_follower"]}

    def _nodes(self) -> tuple[str, ...]:
        return ("in", "gate", "source", "tap", "out")

    def _stage_network(
        self,
        net: physics.Network,
        p: Parts,
        ss: list[dict[str, np.ndarray]],
        ac: bool,
        rail: str | None,
        device_caps: bool,
    ) -> None:
        net.resistor("gate", "tap", p["r_gate"])
        net.jfet("gate", rail, "source", ss[0], device_caps)
        net.resistor("source", "tap", p["r_source"])
        net.resistor("tap", None, p["r_follower"])

    def _r_out_dc(self, p: Parts) -> np.ndarray:
        return p["r_source"] + p["r_follower"]

    def _limits(
        self, p: Parts, c: Conditions, op: dict[str, np.ndarray], r_ac: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray]:
        # the source rises until the channel leaves saturation, falls toward cutoff (square_law_clip)
        di_sat = np.maximum(op["vds"] - op["vdsat"], 0.0) / r_ac
        clip = square_law_clip(op["id"], op["vdsat"], r_ac, r_ac, di_sat)
        return clip, c.supply - op["v_gate"] + 0.5 * clip

    def _ratings(self, p: Parts, c: Conditions, b: Bias) -> dict[str, np.ndarray]:
        return {**self._common_ratings(p, c, b), "p_r_follower": b.op["id"] ** 2 * p["r_follower"]}
