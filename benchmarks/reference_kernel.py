"""A plain-numpy reference kernel of divider_ce's core metrics: the speed bound the model is
measured against (benchmarks/bench_models.py reports the model's core rate as a fraction of it).

The same equations as the model, written once and flat, with no framework around them: the
Gummel-Poon base loop by 8 Newton steps (IS, BF, NF, VAF, RB; forward active), the hybrid-pi
small-signal parameters, the closed-form mid-band gain and impedances of the degenerated
common-emitter stage (textbook hybrid-pi analysis, common practice), the coupling capacitors'
reactance at the band's geometric mean, and the AC load line's clip level
2*min(Ic*Rac, (Vce - Vce_sat)*Rac/(Rac + Re)).

With ``swing=True`` (the bound the model's core is measured against) it adds the usable swing
(physics.usable_swing: the largest sine whose two output peaks are both within 10 % of the
mid-band gain times the drive) by the same search on the same static equations: the stage's
static transfer (the base loop with c_in and c_out holding their DC, the collector on
r_collector || load, flattened at vce_sat) solved at +a and -a by 6 Newton steps from the
quiescent Vbe (where Vce falls under 0.35 V but not under -1 V, again with the base-collector junction by 8 steps
of 2-D Newton from the saturated stage's estimate, as physics.solve_junction's ``saturation``), a scan at 0.8, 1.0 and 1.6 of the clip-level drive, then 3 Illinois
false-position steps on the peak deviation, in double precision as the model. Without it, the kernel is the
bound for the core without the swing; bench_models.py reports both.

    .venv/bin/python benchmarks/reference_kernel.py   # checks itself against the model, prints its rates
"""

from __future__ import annotations

import math

import numpy as np

from optimizer.devices import Device, saturation_current, thermal_voltage
from optimizer.topologies.base import Conditions

BLOCK = 16384  # candidates per block, as the model's core chunk
NEWTON_STEPS = 8
STATIC_STEPS = 6  # Newton steps per static solve of the swing search, from the quiescent Vbe
SATURATION_ONSET = 0.35  # V: a static sample with Vce below this is solved with the base-collector junction too,
SATURATION_DEEP = -1.0  # V: unless its one-junction Vce is below this (past the collector's floor either way)
SATURATED_VCE = 0.15  # V: the Vce of that solve's estimated start
SATURATED_STEPS = 8  # its 2-D Newton steps
SCAN = (0.8, 1.0, 1.6)  # multiples of the clip-level drive scanned first
FALSE_POSITION_STEPS = 3
TOLERANCE = 0.1  # both peaks within 10 % of the linear gain times the drive
KEYS = ("gain", "input_impedance", "output_impedance", "clip_vpp", "supply_current", "ic")


def core_metrics(
    parts: dict[str, np.ndarray], device: Device, conditions: Conditions, swing: bool = False
) -> dict[str, np.ndarray]:
    """gain (V/V), input_impedance, output_impedance (ohm), clip_vpp (V), supply_current (A) and
    ic (A) of divider_ce designs (parts in ohm and F, one value per candidate); with ``swing``
    also swing_vpp (V peak-to-peak at the load)."""
    n = parts["r_top"].size
    out = {k: np.empty(n) for k in KEYS + (("swing_vpp",) if swing else ())}
    for i in range(0, n, BLOCK):
        block = {k: v[i : i + BLOCK] for k, v in parts.items()}
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):  # a design clipped to zero output
            for k, v in _block(block, device, conditions, swing).items():
                out[k][i : i + BLOCK] = v
    return out


def _block(p: dict[str, np.ndarray], d: Device, c: Conditions, swing: bool) -> dict[str, np.ndarray]:
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
    out = {
        "gain": gain,
        "input_impedance": np.hypot(z_in, 1.0 / (w * p["c_in"])),
        "output_impedance": np.hypot(rc * z_coll / (rc + z_coll), 1.0 / (w * p["c_out"])),
        "clip_vpp": clip,
        "supply_current": ic + (vcc - v_base) / rt,
        "ic": ic,
    }
    if not swing:
        return out
    # The static transfer: c_in holds v_base, so the loop's drive is a0 + k_a*vs; c_out holds v_c,
    # so the collector moves on r_ac around its quiescent point, Vcb = vcb0 - (r_ac+re) Ic - re Ib - Vbe.
    col = lambda x: x[:, None]  # noqa: E731 (per-candidate values against the drive's columns)
    k_a = rth / (rs + rth)
    a0, r_ib = col(vth * (1.0 - k_a) + v_base * k_a), col((rth * rs / (rs + rth) + d.RB + re) / beta)
    c0, c_ib, c_ic = col(1.0 + k * (v_c + ic * r_ac)), col(re * k / beta), col((r_ac + re) * k)
    k_a, re_c, r_ac_c, vbe_q, ic_q = col(k_a), col(re), col(r_ac), col(v), col(ic)

    vcb0, vcb_ic = col(v_c + ic * r_ac), col(r_ac + re)
    r_base = col(rth * rs / (rs + rth) + d.RB)
    v_critical = nvt * math.log(nvt / (math.sqrt(2.0) * i_s))

    def transfer(vs: np.ndarray) -> np.ndarray:
        """Change of the load voltage (V) at source voltages vs (V, (candidates, drives))."""
        a = a0 + k_a * vs
        x = vbe_q + 0.0 * vs
        for _ in range(STATIC_STEPS):
            f = i_s * np.expm1(x / nvt)
            t = r_ib + re_c * (c0 - c_ib * f - k * x) / (1.0 + c_ic * f)
            x = x + np.clip((a - x - f * t) / (1.0 + (f + i_s) / nvt * t), -0.1, 0.1)
        f = i_s * np.expm1(x / nvt)
        i_c = f * (c0 - c_ib * f - k * x) / (1.0 + c_ic * f)
        i_b = f / beta
        # Vce under SATURATION_ONSET: the base-collector junction too, by 2-D Newton in (Vbe, Vbc) from
        # the saturated stage at Vce SATURATED_VCE (Ic = If - 2 Ir, Ib = If/BF + Ir, BR = 1)
        vce = vcb0 - vcb_ic * i_c - re_c * i_b  # Vcb + Vbe
        soft = (vce < SATURATION_ONSET) & (vce > SATURATION_DEEP)
        if soft.any():
            rows = np.nonzero(soft)[0]
            aa, rb_, re_, c0_, cic, v1 = (
                a[soft],
                r_base[rows, 0],
                re_c[rows, 0],
                vcb0[rows, 0],
                vcb_ic[rows, 0],
                x[soft],
            )
            p_c, q_b = c0_ - SATURATED_VCE, aa - v1  # the collector loop at Vce SATURATED_VCE, the base loop
            det = cic * (rb_ + re_) - re_ * re_
            ic_s = (p_c * (rb_ + re_) - re_ * q_b) / det
            ir_s = ((cic * q_b - re_ * p_c) / det - ic_s / beta) / (1.0 + 2.0 / beta)
            fits = (ir_s > 0) & (ic_s + 2.0 * ir_s > 0)
            v = np.where(fits, nvt * np.log1p(np.where(fits, ic_s + 2.0 * ir_s, 0.0) / i_s), v1)
            u = np.minimum(np.where(fits, nvt * np.log1p(np.where(fits, ir_s, 0.0) / i_s), v1 - vce[soft]), v_critical)
            for _ in range(SATURATED_STEPS):
                ff, fr = i_s * np.expm1(v / nvt), i_s * np.expm1(u / nvt)
                g, gr, e = (ff + i_s) / nvt, (fr + i_s) / nvt, 1.0 - u * k
                icc, ibb = (ff - fr) * e - fr, ff / beta + fr
                r1 = aa - v - rb_ * ibb - re_ * (icc + ibb)
                r2 = u + c0_ - cic * icc - re_ * ibb - v
                dic_v, dic_u, dib_v = g * e, -gr * (e + 1.0) - (ff - fr) * k, g / beta
                j11, j12 = -1.0 - rb_ * dib_v - re_ * (dic_v + dib_v), -rb_ * gr - re_ * (dic_u + gr)
                j21, j22 = -cic * dic_v - re_ * dib_v - 1.0, 1.0 - cic * dic_u - re_ * gr
                det = j11 * j22 - j12 * j21
                v = v + np.clip((-r1 * j22 + r2 * j12) / det, -0.5, 0.1)
                u = u + np.clip((-r2 * j11 + r1 * j21) / det, -0.5, np.maximum(0.1, v_critical - u))
            ff, fr = i_s * np.expm1(v / nvt), i_s * np.expm1(u / nvt)
            i_c, i_b = i_c.copy(), i_b.copy()
            i_c[soft], i_b[soft] = (ff - fr) * (1.0 - u * k) - fr, ff / beta + fr
        return np.maximum(-(i_c - ic_q) * r_ac_c, re_c * (i_c + i_b) + d.vce_sat - col(v_c))

    g = gain[:, None]

    def deviation(x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(peak deviation - tolerance, peak-to-peak) at drive amplitudes x (V, (candidates, drives))."""
        y = transfer(np.concatenate([x, -x], axis=1))
        up, down = np.split(y, 2, axis=1)
        dev = np.maximum(np.abs(up / (g * x) - 1.0), np.abs(down / (g * x) + 1.0))
        return np.where(np.isfinite(dev), dev, np.inf) - TOLERANCE, np.abs(up - down)

    # scan: the first amplitude past the tolerance and the one before it (d(0) = -tolerance) bracket it
    scan = col(0.5 * clip / ((1.0 - TOLERANCE) * np.abs(gain))) * np.array(SCAN)
    d_scan, p_scan = deviation(scan)
    over = d_scan > 0.0
    found = over.any(axis=1)
    i1 = np.where(found, over.argmax(axis=1), len(SCAN) - 1)
    pick = lambda m, i: np.take_along_axis(m, i[:, None], axis=1)[:, 0]  # noqa: E731
    x1, d1, p1 = pick(scan, i1), np.minimum(pick(d_scan, i1), 1.0), pick(p_scan, i1)
    i0, first = np.maximum(i1 - 1, 0), i1 == 0
    x0 = np.where(first, 0.0, pick(scan, i0))
    d0 = np.where(first, -TOLERANCE, pick(d_scan, i0))
    p0 = np.where(first, 0.0, pick(p_scan, i0))
    last = np.zeros(gain.size)  # which end the last step replaced: +1 the outside one, -1 the inside one
    for _ in range(FALSE_POSITION_STEPS):  # Illinois: an end kept twice in a row has its value halved
        xm = np.clip(x0 + (x1 - x0) * d0 / np.where(d0 == d1, -1.0, d0 - d1), np.minimum(x0, x1), np.maximum(x0, x1))
        dm, pm = (m[:, 0] for m in deviation(xm[:, None]))
        dm = np.minimum(dm, 1.0)
        outside = dm > 0.0
        d0 = np.where(outside & (last > 0), 0.5 * d0, d0)
        d1 = np.where(~outside & (last < 0), 0.5 * d1, d1)
        x1, d1, p1 = np.where(outside, xm, x1), np.where(outside, dm, d1), np.where(outside, pm, p1)
        x0, d0, p0 = np.where(outside, x0, xm), np.where(outside, d0, dm), np.where(outside, p0, pm)
        last = np.where(outside, 1.0, -1.0)
    w = np.clip(d0 / np.where(d0 == d1, -1.0, d0 - d1), 0.0, 1.0)
    swing_vpp = np.where(found, p0 + w * (p1 - p0), p1)
    out["swing_vpp"] = np.where(np.isfinite(swing_vpp) & (np.abs(gain) > 0), swing_vpp, 0.0)
    return out


def check_against_model(parts: dict[str, np.ndarray], device: Device, conditions: Conditions) -> float:
    """Largest relative difference between this kernel and the model's core metrics (a check that
    both compute the same thing; the model is checked against ngspice in tests/)."""
    from optimizer.topologies import get_topology

    model = get_topology("divider_ce").evaluate(parts, device, conditions, full=False)
    ref = core_metrics(parts, device, conditions, swing=True)
    active = model.operating_point["active"]
    worst = {}
    for key in ("gain", "input_impedance", "output_impedance", "clip_vpp", "supply_current", "swing_vpp"):
        a, b = ref[key][active], model.metrics[key][active]
        worst[key] = float(np.max(np.abs(a - b) / np.maximum(np.abs(b), 1e-300)))
    return worst


if __name__ == "__main__":
    import sys
    import time
    from pathlib import Path

    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))  # the benchmarks package, run as a script

    from benchmarks.bench_models import CONDITIONS, DEVICE, random_divider_ce

    designs = random_divider_ce(1_000_000)
    worst = check_against_model(designs, DEVICE, CONDITIONS)
    print("largest relative difference to the model:", ", ".join(f"{k} {v:.1e}" for k, v in worst.items()))
    # the same equations in the same double-precision arithmetic, in another order: swing_vpp within
    # the model's own 0.5 % budget for its search (tests/test_models.py), the rest to rounding
    assert worst.pop("swing_vpp") < 5e-3 and max(worst.values()) < 1e-6, worst
    for swing in (False, True):
        t0 = time.process_time()
        core_metrics(designs, DEVICE, CONDITIONS, swing=swing)
        what = "with the usable swing" if swing else "without the usable swing"
        print(f"{what}: {1e6 / (time.process_time() - t0):,.0f} candidates per CPU second")
