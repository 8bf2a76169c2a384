"""divider_ce_split: divider_ce with the emitter resistor split, r_emitter_dc bypassed.

Nodes: as divider_ce, with emitter -r_emitter- e2 -r_emitter_dc- gnd and c_emitter e2-gnd,
so the DC bias sees r_emitter + r_emitter_dc and the mid-band gain only r_emitter.
"""

from __future__ import annotations

import numpy as np

from optimizer import physics
from optimizer.synthesis import (
    VBE_HAND,
    HandRequirements,
    centred_collector_resistor,
    coupling_capacitor,
    divider,
    parallel,
)
from optimizer.topologies.base import Conditions, Parts
from optimizer.topologies.divider_ce import DividerCE


class DividerCESplit(DividerCE):
    name = "divider_ce_split"
    inverting = True
    polarities = ("npn", "pnp")
    supplies = ("positive", "negative", "split")
    description = "common emitter, divider bias, emitter resistor split with the lower part bypassed"
    order = 20
    resistors = ("r_top", "r_bottom", "r_collector", "r_emitter", "r_emitter_dc")
    capacitors = ("c_in", "c_out", "c_emitter")
    elements = (
        ("c_in", "src", "base"),
        ("r_top", "vcc", "base"),
        ("r_bottom", "base", "0"),
        ("r_collector", "vcc", "collector"),
        ("r_emitter", "emitter", "e2"),
        ("r_emitter_dc", "e2", "0"),
        ("c_emitter", "e2", "0"),
        ("c_out", "collector", "out"),
    )
    node_voltages = {**DividerCE.node_voltages, "e2": "v_e2"}

    def hand_design(self, req: HandRequirements) -> dict[str, float]:
        ic = req.collector_current
        r_emitter_dc = 0.1 * req.supply / ic  # emitter at a tenth of the supply (common practice)
        rc, re = centred_collector_resistor(req, r_emitter_dc)
        r_top, r_bottom = divider(req, ic * (re + r_emitter_dc) + VBE_HAND)
        z_in = parallel(parallel(r_top, r_bottom), req.hfe * re)
        # The bypass sees Re_dc || (Re_ac + 1/gm) from its node (1/gm with VT ~ 26 mV).
        r_bypass = parallel(r_emitter_dc, re + 0.026 / ic)
        return {
            "r_top": r_top,
            "r_bottom": r_bottom,
            "r_collector": rc,
            "r_emitter": re,
            "r_emitter_dc": r_emitter_dc,
            "c_in": coupling_capacitor(z_in + req.source_impedance, req.f_low),
            "c_out": coupling_capacitor(rc + req.load_impedance, req.f_low),
            "c_emitter": coupling_capacitor(r_bypass, req.f_low),
        }

    def _re_dc(self, p: Parts) -> np.ndarray:
        return p["r_emitter"] + p["r_emitter_dc"]

    def _emitter_network(self, net: physics.Network, p: Parts, ac: bool) -> None:
        net.resistor("emitter", "e2", p["r_emitter"])
        net.resistor("e2", None, p["r_emitter_dc"])
        net.capacitor("e2", None, p["c_emitter"], ac, True)

    def _nodes(self) -> tuple[str, ...]:
        return ("in", "base", "bint", "emitter", "e2", "collector", "out")

    def _extra_op(self, p: Parts, ie: np.ndarray) -> dict[str, np.ndarray]:
        return {"v_e2": ie * p["r_emitter_dc"]}

    def _extra_ratings(
        self, p: Parts, c: Conditions, op: dict[str, np.ndarray], ie: np.ndarray
    ) -> dict[str, np.ndarray]:
        # the bypassed node never rises above the divider's open-circuit voltage at the highest rail
        return {
            "p_r_emitter_dc": ie**2 * p["r_emitter_dc"],
            "v_c_emitter": c.rail_max * p["r_bottom"] / (p["r_top"] + p["r_bottom"]),
        }
