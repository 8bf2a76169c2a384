"""Model against ngspice on the check designs: one row per (design, metric).

Shared by tests/test_spice_agreement.py (asserts every row is within tolerance) and
benchmarks/spice_agreement.py (writes the committed table).
"""
from __future__ import annotations

import math

import numpy as np

from optimizer.topologies import get_topology
from spice_designs import CheckDesign
from spice_harness import (spice_clip, spice_midband, spice_noise, spice_operating_point, spice_response,
                           spice_swing, spice_thd)

# metric -> (tolerance, kind): "rel" relative error, "db" absolute error in dB.
TOLERANCES = {
    "ic": (0.03, "rel"),
    "gain": (0.03, "rel"),
    "input_impedance": (0.05, "rel"),
    "output_impedance": (0.10, "rel"),
    "swing_vpp": (0.10, "rel"),  # usable swing, the 10 % rule
    "clip_vpp": (0.10, "rel"),  # hard clip level of the AC load line
    "f_low": (0.10, "rel"),
    "f_high": (0.25, "rel"),
    "noise_ein_v": (1.5, "db"),
    "thd": (0.30, "rel"),
}
THD_FRACTION_OF_CLIP = 0.3  # "moderate level": 30 % of the clip level


def _error(model: float, simulated: float, kind: str) -> float:
    if kind == "db":
        return 20.0 * math.log10(model / simulated)
    return (model - simulated) / simulated


def agreement_rows(design: CheckDesign) -> list[dict]:
    """Rows of (design, metric, model, simulator, error, tolerance, hand, hand error)."""
    topology = get_topology(design.topology)
    parts = {role: np.array([value]) for role, value in design.parts.items()}
    result = topology.evaluate(parts, design.device, design.conditions)
    metrics = {k: float(np.asarray(v)[0]) for k, v in result.metrics.items()}
    metrics["ic"] = float(np.asarray(result.operating_point["ic"])[0])

    model_card = design.device.spice_model()
    args = (design.topology, design.parts, model_card, design.conditions)
    simulated = {"ic": spice_operating_point(*args)["ic"]}
    simulated.update({k: v for k, v in spice_midband(*args).items()
                      if k in ("gain", "input_impedance", "output_impedance")})
    simulated.update(spice_response(*args))
    simulated["swing_vpp"] = spice_swing(*args)
    simulated["clip_vpp"] = spice_clip(*args)
    simulated["noise_ein_v"] = spice_noise(*args)
    level = THD_FRACTION_OF_CLIP * metrics["clip_vpp"]
    thd_conditions = type(design.conditions)(**{**design.conditions.__dict__, "signal_vpp": level})
    thd_result = topology.evaluate(parts, design.device, thd_conditions, full=False, thd_solve=True)
    metrics["thd"] = float(np.asarray(thd_result.metrics["thd"])[0])
    simulated["thd"] = spice_thd(*args, vpp_out=level)

    hand = {"gain": design.hand_gain, "ic": design.hand_ic}
    rows = []
    for metric, (tolerance, kind) in TOLERANCES.items():
        error = _error(metrics[metric], simulated[metric], kind)
        row = {"design": design.name, "metric": metric, "model": metrics[metric],
               "simulator": simulated[metric], "error": error, "tolerance": tolerance,
               "kind": kind, "within": abs(error) <= tolerance}
        if metric in hand:
            row["hand"] = hand[metric]
            row["hand_error"] = _error(hand[metric], simulated[metric], kind)
        rows.append(row)
    return rows
