"""A plain-numpy reference kernel of divider_ce's core metrics: the speed bound the model is
measured against (benchmarks/bench_models.py reports the model's core rate as a fraction of it).

The same equations as the model, written once and flat, with no framework around them: the
Gummel-Poon base loop by 8 Newton steps (IS, BF, NF, VAF, RB; forward active), the hybrid-pi
small-signal parameters, the closed-form mid-band gain and impedances of the degenerated
common-emitter stage (textbook hybrid-pi analysis, common practice), the coupling capacitors'
reactance at the band's geometric mean, and the AC load line's clip level
2*min(Ic*Rac, (Vce - Vce_sat)*Rac/(Rac + Re)). What it leaves out is the usable swing (the
static nonlinear solve of issue 11), which the model's core adds on top; the bench reports
the model's rate both ways.

    .venv/bin/python benchmarks/reference_kernel.py   # checks itself against the model, prints its rate
"""

from __future__ import annotations

import math

import numpy as np

from optimizer.devices import Device, saturation_current, thermal_voltage
from optimizer.topologies.base import Conditions

BLOCK = 16384  # candidates per block, as the model's core chunk
NEWTON_STEPS = 8


def core_metrics(parts: dict[str, np.ndarray], device: Device, conditions: Conditions) -> dict[str, np.ndarray]:
    """gain (V/V), input_impedance, output_impedance (ohm), clip_vpp (V), supply_current (A) and
    ic (A) of divider_ce designs (parts in ohm and F, one value per candidate)."""
    n = parts["r_top"].size
    out = {k: np.empty(n) for k in ("gain", "input_impedance", "output_impedance", "clip_vpp", "supply_current", "ic")}
    for i in range(0, n, BLOCK):
        block = {k: v[i : i + BLOCK] for k, v in parts.items()}
        for k, v in _block(block, device, conditions).items():
            out[k][i : i + BLOCK] = v
    return out


def _block(p: dict[str, np.ndarray], d: Device, c: Conditions) -> dict[str, np.ndarray]:
    rt, rb, rc, re = p["r_top"], p["r_bottom"], p["r_collector"], p["r_emitter"]
    vcc, beta, rl = c.supply, d.hfe_typ, c.load_impedance
    nvt = d.NF * float(thermal_voltage(c.temperature))
    i_s = float(saturation_current(d.IS, c.temperature))
    k = d.inv_vaf
    vth = vcc * rb / (rt + rb)
    rth = rt * rb / (rt + rb)
    r_loop = (rth + d.RB + re) / beta  # base-loop resistance per unit of the forward current
    # Base loop vth = Vbe + (rth+RB) Ib + re (Ic+Ib), Ib = If/BF, Ic = If (1 + Vcb/VAF),
    # Vcb = vcc - (rc+re) Ic - re Ib - Vbe; Newton on Vbe from above (the residual is concave).
    v = np.minimum(vth, nvt * np.log1p(np.maximum(vth, 0.0) / np.maximum(r_loop + re, 1e-3) / i_s))
    for _ in range(NEWTON_STEPS):
        f = i_s * np.expm1(v / nvt)
        early = (1.0 + k * (vcc - re * f / beta - v)) / (1.0 + k * (rc + re) * f)
        ic = f * early
        resid = vth - v - r_loop * f - re * ic
        step = resid / (1.0 + (f + i_s) / nvt * (r_loop + re * early))
        v = v + np.clip(step, -0.1, 0.1)
    f = i_s * np.expm1(v / nvt)
    ic = f * (1.0 + k * (vcc - re * f / beta - v)) / (1.0 + k * (rc + re) * f)
    ib = f / beta
    vcb = vcc - (rc + re) * ic - re * ib - v
    # hybrid-pi parameters and the degenerated stage's closed forms
    gbe = (f + i_s) / nvt
    go = f * k
    gm = gbe * (1.0 + vcb * k) - go
    gpi = gbe / beta
    r_ac = rc * rl / (rc + rl)
    rs = max(c.source_impedance, 1e-3)
    r_bs = rs * rth / (rs + rth)
    share = go * r_ac / (1.0 + go * r_ac)
    alpha = (gpi + gm - gm * share) / (1.0 / re + go / (1.0 + go * r_ac))
    gain_x = (go * alpha - gm) * r_ac / (1.0 + go * r_ac)
    rpi = 1.0 / gpi
    z_base = d.RB + (1.0 + alpha) * rpi
    z_in = rth * z_base / (rth + z_base)
    gain = z_in / (z_in + rs) * gain_x / (1.0 + alpha + d.RB * gpi)
    r_b = r_bs + d.RB
    r_p = re * (rpi + r_b) / (re + rpi + r_b)
    z_coll = 1.0 / go + r_p + gm / go * r_p * rpi / (rpi + r_b)
    w = 2.0 * math.pi * math.sqrt(c.band[0] * c.band[1])
    v_e = re * (ic + ib)
    v_c = vcc - rc * ic
    v_base = v_e + v + d.RB * ib
    clip = 2.0 * np.minimum(ic * r_ac, np.maximum(v_c - v_e - d.vce_sat, 0.0) * r_ac / (r_ac + re))
    return {
        "gain": gain,
        "input_impedance": np.hypot(z_in, 1.0 / (w * p["c_in"])),
        "output_impedance": np.hypot(rc * z_coll / (rc + z_coll), 1.0 / (w * p["c_out"])),
        "clip_vpp": clip,
        "supply_current": ic + (vcc - v_base) / rt,
        "ic": ic,
    }


def check_against_model(parts: dict[str, np.ndarray], device: Device, conditions: Conditions) -> float:
    """Largest relative difference between this kernel and the model's core metrics (a check that
    both compute the same thing; the model is checked against ngspice in tests/)."""
    from optimizer.topologies import get_topology

    model = get_topology("divider_ce").evaluate(parts, device, conditions, full=False)
    ref = core_metrics(parts, device, conditions)
    active = model.operating_point["active"]
    worst = 0.0
    for key in ("gain", "input_impedance", "output_impedance", "clip_vpp", "supply_current"):
        a, b = ref[key][active], model.metrics[key][active]
        worst = max(worst, float(np.max(np.abs(a - b) / np.maximum(np.abs(b), 1e-300))))
    return worst


if __name__ == "__main__":
    import time

    from benchmarks.bench_models import CONDITIONS, DEVICE, random_divider_ce

    designs = random_divider_ce(1_000_000)
    print(f"largest relative difference to the model: {check_against_model(designs, DEVICE, CONDITIONS):.1e}")
    t0 = time.process_time()
    core_metrics(designs, DEVICE, CONDITIONS)
    print(f"{1e6 / (time.process_time() - t0):,.0f} candidates per CPU second")
