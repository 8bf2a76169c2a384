"""Checks shared by the two JFET stages' test modules: ngspice agreement on the stage's
designs of spice_designs.jfet_check_designs, and the IDSS/VP corners simulated in ngspice."""

from __future__ import annotations

import dataclasses

import numpy as np

from optimizer.devices import JFET
from optimizer.topologies import get_topology
from spice_agreement import agreement_rows
from spice_designs import CheckDesign, jfet_check_designs
from spice_harness import spice_operating_point

CORNER_ID_TOLERANCE = 0.05  # the figure: Id within 5 % of ngspice at every IDSS/VP corner


def designs_of(topology: str) -> list[CheckDesign]:
    """The agreement set's designs of one JFET stage."""
    return [d for d in jfet_check_designs() if d.topology == topology]


def outside_tolerance(design: CheckDesign) -> list[str]:
    """Every metric of ``design`` outside its ngspice tolerance (empty when all agree)."""
    return [
        f"{r['metric']}: model {r['model']:.4g}, ngspice {r['simulator']:.4g}, "
        f"error {r['error']:+.3g} (tolerance {r['tolerance']:g} {r['kind']})"
        for r in agreement_rows(design)
        if not r["within"]
    ]


def corner_model(device: JFET, u: float) -> dict[str, float]:
    """The SPICE card of the part at IDSS/VP position u: BETA and VTO at SPICE's nominal 27 degC
    (ngspice applies TCV and BEX itself at the simulated temperature)."""
    beta, vto = device.params(np.array([u]), 27.0)
    return {**device.spice_model(), "BETA": float(beta[0]), "VTO": float(vto[0])}


def corner_errors(design: CheckDesign, temperatures: tuple[float, ...] = (0.0, 27.0, 50.0)) -> list[tuple]:
    """(temperature degC, u, model Id A, ngspice Id A, relative error, model's active flag,
    ngspice's channel in saturation) at each IDSS/VP corner of the device (its spread_edges)
    and each temperature."""
    topology = get_topology(design.topology)
    parts = {k: np.array([v]) for k, v in design.parts.items()}
    out = []
    for temperature in temperatures:
        conditions = dataclasses.replace(design.conditions, temperature=temperature)
        for u in design.device.spread_edges(temperature):
            op = topology.operating_point(parts, design.device, conditions, hfe=u)
            card = corner_model(design.device, u)
            spice = spice_operating_point(design.topology, design.parts, card, conditions)
            vto = card["VTO"] - card["TCV"] * (temperature - 27.0)  # ngspice's VTO(T)
            saturated = spice["v_drain"] - spice["v_source"] > spice["v_gate"] - spice["v_source"] - vto
            model = float(op["ic"][0])
            out.append(
                (temperature, u, model, spice["ic"], model / spice["ic"] - 1.0, bool(op["active"][0]), bool(saturated))
            )
    return out
