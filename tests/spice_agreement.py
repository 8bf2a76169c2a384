"""Model against ngspice on the check designs: one row per (design, metric).

Shared by tests/test_spice_agreement.py (asserts every row is within tolerance) and
benchmarks/spice_agreement.py (writes the committed table).
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np

from optimizer.metrics import METRICS
from optimizer.topologies import get_topology
from spice_designs import CheckDesign
from spice_harness import (
    clip_of,
    held_transfer,
    phase_margin_of,
    spice_loop_gain,
    spice_midband,
    spice_noise,
    spice_noise_figure,
    spice_operating_point,
    spice_psrr,
    spice_response,
    spice_thd,
    swing_of,
)

# metric -> (tolerance, kind): "rel" relative error, "db" ratio in dB, "diff" difference (dB metrics).
# model vs ngspice: the metrics' tolerances from optimizer/metrics.py, plus two that are not metrics
TOLERANCES = {
    "ic": (0.03, "rel"),  # q1's collector current (operating point)
    **{m.key: m.spice for m in METRICS if m.spice},
    "noise_ein_flicker": (1.5, "db"),  # noise_ein_v with the device's KF = FLICKER_KF, AF = 1
}
THD_FRACTION_OF_CLIP = 0.3  # "moderate level": 30 % of the clip level
FLICKER_KF = 1e-14  # invented, strong enough that 1/f noise dominates the band's low end


def _error(model: float, simulated: float, kind: str) -> float:
    if kind == "db":
        return 20.0 * math.log10(model / simulated)
    if kind == "diff":
        return model - simulated
    return (model - simulated) / simulated


def agreement_rows(design: CheckDesign) -> list[dict]:
    """Rows of (design, metric, model, simulator, error, tolerance, hand, hand error)."""
    topology = get_topology(design.topology)
    parts = {role: np.array([value]) for role, value in design.parts.items()}
    result = topology.evaluate(parts, design.device, design.conditions)
    metrics = {k: float(np.asarray(v)[0]) for k, v in result.metrics.items()}
    metrics["ic"] = float(np.asarray(result.operating_point["ic"])[0])

    model_card = {**design.device.spice_model(), "polarity": design.device.polarity}
    args = (design.topology, design.parts, model_card, design.conditions)
    simulated = {"ic": spice_operating_point(*args)["ic"]}
    simulated.update(
        {k: v for k, v in spice_midband(*args).items() if k in ("gain", "input_impedance", "output_impedance")}
    )
    simulated.update(spice_response(*args))
    v_in, v_out, h = held_transfer(*args)
    simulated["swing_vpp"] = swing_of(design.topology, v_in, v_out, h)
    simulated["clip_vpp"] = clip_of(design.topology, v_in, v_out, float(design.conditions.supply))
    simulated["noise_ein_v"] = spice_noise(*args)
    simulated["noise_figure_db"] = spice_noise_figure(*args)
    frequencies = (design.conditions.ripple_frequency, math.sqrt(design.conditions.band[0] * design.conditions.band[1]))
    simulated["psrr_ripple_db"], simulated["psrr_mid_db"] = spice_psrr(*args, frequencies)
    flicker = dataclasses.replace(design.device, KF=FLICKER_KF, AF=1.0)
    metrics["noise_ein_flicker"] = float(topology.evaluate(parts, flicker, design.conditions).metrics["noise_ein_v"][0])
    simulated["noise_ein_flicker"] = spice_noise(
        design.topology, design.parts, {**flicker.spice_model(), "polarity": flicker.polarity}, design.conditions
    )
    level = THD_FRACTION_OF_CLIP * metrics["clip_vpp"]
    thd_conditions = type(design.conditions)(**{**design.conditions.__dict__, "signal_vpp": level})
    thd_result = topology.evaluate(parts, design.device, thd_conditions, full=False, thd_solve=True)
    metrics["thd"] = float(np.asarray(thd_result.metrics["thd"])[0])
    simulated["thd"] = spice_thd(*args, vpp_out=level)

    if math.isfinite(metrics["loop_gain"]):  # a stage with an overall loop: opened nowhere, by double injection
        f, loop = spice_loop_gain(*args)
        mid = frequencies[1]
        simulated["loop_gain"] = float(np.interp(np.log(mid), np.log(f), loop.real))
        simulated["phase_margin_deg"] = phase_margin_of(f, loop, mid)

    hand = {"gain": design.hand_gain, "ic": design.hand_ic}
    rows = []
    for metric, (tolerance, kind) in TOLERANCES.items():
        if metric not in simulated:  # no overall loop: nothing to compare
            continue
        error = _error(metrics[metric], simulated[metric], kind)
        row = {
            "design": design.name,
            "metric": metric,
            "model": metrics[metric],
            "simulator": simulated[metric],
            "error": error,
            "tolerance": tolerance,
            "kind": kind,
            "within": abs(error) <= tolerance,
        }
        if metric in hand:
            row["hand"] = hand[metric]
            row["hand_error"] = _error(hand[metric], simulated[metric], kind)
        rows.append(row)
    return rows


def outside_tolerance(rows: list[dict]) -> list[str]:
    """A line per row of :func:`agreement_rows` outside its tolerance (empty: all agree)."""
    return [
        f"{r['metric']}: model {r['model']:.4g}, ngspice {r['simulator']:.4g}, "
        f"error {r['error']:+.3g} (tolerance {r['tolerance']:g} {r['kind']})"
        for r in rows
        if not r["within"]
    ]
