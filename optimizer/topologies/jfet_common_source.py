"""jfet_common_source: n-channel JFET common source, self-biased by its source resistors.

Nodes: c_in src-gate, r_gate gate-gnd, q1 (JFET: drain, gate, source), r_source source-s2
(unbypassed, sets the AC gain; may be left out: fully bypassed), r_source_dc s2-gnd bypassed
by c_source s2-gnd, r_drain vcc-drain, c_out drain-out, load out-gnd. The DC bias sees
r_source + r_source_dc: Vgs = Ig*r_gate - Id*(r_source + r_source_dc).
"""

from __future__ import annotations

import math

import numpy as np

from optimizer import physics
from optimizer.synthesis import HandRequirements, coupling_capacitor, jfet_hand_bias, parallel
from optimizer.topologies.base import Bias, Conditions, Parts
from optimizer.topologies.jfet_stage import JFETStage, square_law_clip


class JFETCommonSource(JFETStage):
    name = "jfet_common_source"
    inverting = True
    description = "n-channel JFET common source, self-biased by a source resistor, lower part bypassed"
    order = 60
    resistors = ("r_gate", "r_drain", "r_source", "r_source_dc")
    capacitors = ("c_in", "c_out", "c_source")
    optional_parts = ("r_source",)
    elements = (
        ("c_in", "src", "gate"),
        ("r_gate", "gate", "0"),
        ("r_drain", "vcc", "drain"),
        ("r_source", "source", "s2"),
        ("r_source_dc", "s2", "0"),
        ("c_source", "s2", "0"),
        ("c_out", "drain", "out"),
    )
    transistor_pins = (("q1", "drain", "gate", "source"),)
    node_voltages = {"gate": "v_gate", "source": "v_source", "s2": "v_s2", "drain": "v_drain"}
    gain_bound_roles = ("r_drain", "r_source")
    output_node = "drain"

    def gain_bound(self, resistors: dict[str, np.ndarray], load: float) -> np.ndarray:
        # the degenerated stage's gain gm*Rac/(1 + gm*Rs) never reaches Rac/Rs (none when fully bypassed)
        rd, rs = resistors["r_drain"], resistors["r_source"]
        with np.errstate(divide="ignore"):
            return np.where(rs > 0, rd * load / (rd + load) / np.where(rs > 0, rs, 1.0), np.inf)

    def hand_design(self, req: HandRequirements) -> dict[str, float]:
        i_d, r_bias, gm, r_gate = jfet_hand_bias(req)
        v_source = i_d * r_bias
        vdsat = req.vp * math.sqrt(i_d / req.idss)
        r_drain = 0.5 * (req.supply - v_source - vdsat) / i_d  # drain midway over the room left (common practice)
        r_ac = parallel(r_drain, req.load_impedance)
        r_source = max(r_ac / req.gain - 1.0 / gm, 0.0)  # gm*Rac/(1 + gm*Rs) = gain
        r_source = min(r_source, 0.9 * r_bias)
        r_source_dc = r_bias - r_source
        parts = {
            "r_gate": r_gate,
            "r_drain": r_drain,
            "r_source_dc": r_source_dc,
            "c_in": coupling_capacitor(r_gate + req.source_impedance, req.f_low),
            "c_out": coupling_capacitor(r_drain + req.load_impedance, req.f_low),
            "c_source": coupling_capacitor(parallel(r_source_dc, r_source + 1.0 / gm), req.f_low),
        }
        if r_source > 0:
            parts["r_source"] = r_source
        return parts

    def _r_bias(self, p: Parts) -> np.ndarray:
        return p["r_source"] + p["r_source_dc"]

    def _r_ground(self, p: Parts) -> np.ndarray:
        return p["r_source"] + p["r_source_dc"]

    def _r_rail(self, p: Parts) -> np.ndarray:
        return p["r_drain"]

    def _gate_return(self, p: Parts, i_d: np.ndarray) -> np.ndarray:
        return 0.0 * i_d

    def _extra_op(self, p: Parts, i_d: np.ndarray) -> dict[str, np.ndarray]:
        return {"v_s2": i_d * p["r_source_dc"]}

    def _nodes(self) -> tuple[str, ...]:
        return ("in", "gate", "source", "s2", "drain", "out")

    def _early_u(self, p: Parts, c: Conditions, ss: list[dict[str, np.ndarray]]) -> np.ndarray:
        return ss[0]["gds"] * physics.parallel(p["r_drain"], np.full_like(ss[0]["gds"], c.load_impedance))

    def _stage_network(
        self,
        net: physics.Network,
        p: Parts,
        ss: list[dict[str, np.ndarray]],
        ac: bool,
        rail: str | None,
        device_caps: bool,
    ) -> None:
        net.resistor("gate", None, p["r_gate"])
        net.jfet("gate", "drain", "source", ss[0], device_caps)
        net.resistor("source", "s2", p["r_source"])
        net.resistor("s2", None, p["r_source_dc"])
        net.capacitor("s2", None, p["c_source"], ac, True)
        net.resistor("drain", rail, p["r_drain"])

    def _r_out_dc(self, p: Parts) -> np.ndarray:
        return p["r_drain"]

    def _limits(
        self, p: Parts, c: Conditions, op: dict[str, np.ndarray], r_ac: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray]:
        # the triode edge: the current rises by dI until Vds_q - dI*(Rac + Rs) meets the
        # overdrive sqrt((Id + dI)/BETA'), which rises with it (BETA' = Id/x^2 at the operating
        # point): BETA'*R*y^2 + y - (Vds_q + Id*R) = 0 in y; the cutoff side: square_law_clip
        r = r_ac + p["r_source"]
        k_beta = op["id"] / op["vdsat"] ** 2
        free = op["vds"] + op["id"] * r
        y = 2.0 * free / (1.0 + np.sqrt(1.0 + 4.0 * k_beta * r * free))
        di_sat = np.maximum(k_beta * y * y - op["id"], 0.0)
        clip = square_law_clip(op["id"], op["vdsat"], p["r_source"], r_ac, di_sat)
        v_dg_max = np.minimum(c.supply, op["v_drain"] + 0.5 * clip) - op["v_gate"]  # drain-gate: the larger of Vds, Vdg
        return clip, v_dg_max

    def _ratings(self, p: Parts, c: Conditions, b: Bias) -> dict[str, np.ndarray]:
        i_d = b.op["id"]
        # the bypassed node never rises above the rail at its maximum
        return {
            **self._common_ratings(p, c, b),
            "p_r_drain": i_d**2 * p["r_drain"],
            "p_r_source_dc": i_d**2 * p["r_source_dc"],
            "v_c_source": np.full_like(i_d, c.rail_max),
        }
