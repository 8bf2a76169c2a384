"""Shared relations of the stage models: bias Newton, small-signal parameters, batched
nodal analysis, frequency-response corners, noise, swing and distortion.

Everything works on numpy arrays with a leading candidate axis (SI units). The
transistor is the SPICE Gummel-Poon model with only IS, BF, NF, VAF, RB, CJE, CJC,
TF and the flicker-noise KF, AF set (BR=1, IKF=inf, ISE=0, VAR=inf, RE=RC=0, VJ=0.75 V, MJ=0.33, FC=0.5), in the
forward-active region; a candidate outside it is flagged, not modelled.
"""

from __future__ import annotations

import functools
import math
import threading
from collections.abc import Callable, Iterable, Sequence
from typing import Any

import numpy as np

from optimizer.devices import BOLTZMANN, ELEMENTARY_CHARGE, KELVIN_OFFSET, AnyDevice

VJ = 0.75  # V, SPICE default junction potential (VJE = VJC)
MJ = 0.33  # SPICE default grading coefficient (MJE = MJC)
FC = 0.5  # SPICE default forward-bias depletion capacitance coefficient
ACTIVE_MARGIN = 0.1  # V above vce_sat for a transistor to count as active
G_SHORT = 1e6  # S, a mid-band coupling capacitor or a zero-ohm resistor (moderate: elimination precision)
R_FLOOR = 1e-3  # ohm, stand-in for a zero source impedance
SWEEP = (0.1, 1e8)  # Hz, span of the frequency-response search
COARSE_POINTS = 10  # log-spaced points over SWEEP (one per decade)
REFINE_STEPS = 4  # false-position steps per -3 dB crossing (see minus_3db_corners)
PEAK_STEPS = 6  # more steps where a crossing's inside end peaks above the reference (bisected first)
CORNER_XTOL = 1e-4  # decades: a corner whose next false-position step would move it less has converged
PEAK_DISTANCE = 60.0  # the corner distance at its clamp: |H| within 1e-26 of, or above, the reference
NOISE_POINTS = 6  # log-spaced frequencies for the in-band noise integral
NOISE_POINTS_FLICKER = 12  # the same where a 1/f source bends the input noise inside the band
NOISE_REFERENCE_K = 290.0  # K, standard source temperature of the noise figure
NEWTON_ITERATIONS = 8
THD_SAMPLES = 16  # samples per period of the quasi-static distortion solve (harmonics 2..7)
THD_ITERATIONS = 6  # Newton steps per sample, warm-started at the quiescent Vbe
THD_FREQUENCY = (
    1000.0  # Hz, where a frequency-dependent distortion term is judged (THD quoted at 1 kHz, common practice)
)
SWING_TOLERANCE = 0.1  # usable swing: both peaks within 10 % of the linear gain times the drive
SWING_GRID = (0.8, 1.0, 1.6)  # multiples of the clip-level drive scanned for the first deviation
SWING_STEPS = 3  # Illinois false-position steps on the drive amplitude after the scan
SWING_MORE_STEPS = 6  # further steps, only for candidates whose swing estimate still moves (see usable_swing)
WHOLE_SWING_BATCH = 64  # candidates up to which the swing's further steps solve the whole batch (see usable_swing)
SWING_RTOL = 5e-3  # a swing estimate that the last step moved by more than this share has not converged
SWING_FLOOR_MARGIN = 0.01  # share past a floor by which a peak-to-peak tells the swing's side of it (see swing_reaches)
SWING_FLOOR_STEPS = 2  # false-position steps for a swing the first two drives leave open (see swing_reaches)
SWING_DOUBLINGS = 3  # further scan points, each twice the last, for a stage that has not deviated by SWING_GRID's end
MAX_STEP = 0.1  # V, largest Newton step in Vbe (a guard; steps from above are about NF*VT)
SLOW_ITERATIONS = 8  # further Newton steps, only for candidates not yet converged (see solve_junction)
NEWTON_TOL = 1e-7  # V, residual of the base-loop equation counted as converged
# A static transfer's sample whose Vce falls below this is solved again with the base-collector
# junction (solve_junction's ``saturation``): from here down the junction's current, which the base
# carries at a gain of one against the forward current's 1/hFE (hFE exp(-Vce/VT) of the base
# current), can reach 1e-3 of the base current for an hFE of 300 at 50 degC
SATURATION_ONSET = 0.35  # V
# A sample whose one-junction Vce is below this lies past the collector's floor (emitter + vce_sat)
# in either solve and is left as it is: the swing's crossing is found in the knee above it (the
# same swings to the last bit on 50,000 random divider_ce designs from 600 ohm and from 47 kohm,
# at 1.4x the time of the one-junction solve where every sample under the onset took 2-2.3x)
SATURATION_DEEP = -1.0  # V
SATURATED_VCE = 0.15  # V, the Vce the saturated solve's estimated start assumes (see _saturated_base_loop)
SATURATION_ITERATIONS = 24  # most steps of that 2-D Newton (each element stops once its steps are below 1e-12 V)


# ----------------------------------------------------------------------------- bias


def solve_junction(
    a: np.ndarray,
    r_base: np.ndarray,
    r_emit: np.ndarray,
    *,
    i_s: float,
    beta: np.ndarray,
    nvt: float,
    inv_vaf: float,
    vcb0: np.ndarray | float = 0.0,
    vcb_ic: np.ndarray | float = 0.0,
    vcb_ib: np.ndarray | float = 0.0,
    vcb_vbe: np.ndarray | float = 0.0,
    v_start: np.ndarray | None = None,
    iterations: int = NEWTON_ITERATIONS,
    currents_only: bool = False,
    saturation: bool = False,
) -> dict[str, np.ndarray]:
    """Solve one forward-active transistor's base loop by vectorised damped Newton.

    The loop is ``a = Vbe + r_base*Ib + r_emit*(Ic+Ib)`` (V, ohm), with the Gummel-Poon
    currents ``If = IS*(exp(Vbe/(NF VT))-1)``, ``Ib = If/BF``, ``Ic = If*(1+Vcb/VAF)`` and
    the collector-base voltage linear in the unknowns:
    ``Vcb = vcb0 - vcb_ic*Ic - vcb_ib*Ib - vcb_vbe*Vbe``.
    Returns vbe, vcb, i_forward (If), ic, ib (A, V) and a boolean ``converged``.
    A fixed number of iterations is run for every candidate at once; v_start (V) is a
    warm start near the root (e.g. the quiescent Vbe when solving around an operating point).
    The arguments broadcast against each other (a static transfer's drives as columns against
    per-candidate columns); currents_only=True returns vbe, i_forward, ic and ib alone (a static
    transfer's solves, which use no more). ``saturation=True`` (a static transfer's samples):
    the elements whose Vce (Vcb + Vbe) ends below SATURATION_ONSET (and above SATURATION_DEEP)
    are solved again with the base-collector junction as well (:func:`_saturated_base_loop`), so a stage driven into
    saturation loses its gain gradually, its base taking the junction's current from the drive
    (``ic``, ``ib`` are then the terminal currents; ``i_forward`` the forward one).
    """
    dtype = np.float64
    # each at its own shape (per-candidate columns stay columns): the ufuncs below broadcast
    a, r_base, r_emit, beta = (np.asarray(x, dtype=dtype) for x in (a, r_base, r_emit, beta))
    r_ib = r_base / beta + r_emit / beta  # loop resistance per unit If through the base current
    inv_nvt = 1.0 / nvt
    c0 = 1.0 + np.asarray(vcb0, dtype=dtype) * inv_vaf  # Early factor terms, per unit If or Vbe
    c_ib, c_vbe, c_ic = vcb_ib * inv_vaf / beta, vcb_vbe * inv_vaf, vcb_ic * inv_vaf

    # Work arrays made once and written in place (out=): an iteration allocates nothing.
    shape = _broadcast_shape([np.shape(v_start), *(np.shape(x) for x in (a, r_emit, r_ib, c0, c_ib, c_vbe, c_ic))])
    v, e, den, early, g, t = (np.empty(shape, dtype=dtype) for _ in range(6))
    if v_start is None:
        # The residual is concave and falling in Vbe, so Newton from above never overshoots the root:
        # start at the smaller of two points above it (Vbe = a, or the Vbe of the largest current a/k).
        v[...] = np.minimum(a, nvt * np.log1p(np.maximum(a, 0.0) / np.maximum(r_ib + r_emit, 1e-3) / i_s))
    else:
        v[...] = v_start

    def currents(v: np.ndarray) -> None:
        """e = If, early = Ic/If, t = r_ib + r_emit*early and g = the loop residual, at Vbe = v."""
        np.multiply(v, inv_nvt, out=e)
        np.expm1(e, out=e)
        np.multiply(e, i_s, out=e)
        np.multiply(c_ic, e, out=den)
        np.add(den, 1.0, out=den)
        np.multiply(c_ib, e, out=early)
        np.multiply(c_vbe, v, out=t)
        np.add(early, t, out=early)
        np.subtract(c0, early, out=early)
        np.divide(early, den, out=early)
        np.multiply(r_emit, early, out=t)
        np.add(t, r_ib, out=t)
        np.subtract(a, v, out=g)
        np.multiply(e, t, out=den)
        np.subtract(g, den, out=g)  # a - Vbe - r_ib*If - r_emit*Ic

    def step(only: np.ndarray | None = None) -> None:
        """One damped Newton step (on the candidates of ``only``, when given)."""
        currents(v)
        np.add(e, i_s, out=den)  # the step g / (1 + (If + IS)/(NF VT) * t)
        np.multiply(den, t, out=den)
        np.multiply(den, inv_nvt, out=den)
        np.add(den, 1.0, out=den)
        np.divide(g, den, out=g)
        np.minimum(g, MAX_STEP, out=g)  # the ufuncs, not np.clip: no dispatch overhead on small groups
        np.maximum(g, -MAX_STEP, out=g)
        if only is not None:
            g[~only] = 0.0
        np.add(v, g, out=v)

    for _ in range(iterations):
        step()
    currents(v)
    # A large DC drop across the emitter resistance with the Early effect on (a split supply's
    # emitter resistors carry nearly its whole negative rail) slows Newton to a linear rate, as
    # the step treats Ic/If as fixed: those candidates alone take a few more steps (in a full
    # bias solve; the warm-started solves of a static transfer keep their own count), while
    # their collector junction stays reverse biased (a saturated one has no active root).
    for _ in range(SLOW_ITERATIONS if iterations >= NEWTON_ITERATIONS else 0):
        vcb = vcb0 - vcb_ic * e * early - vcb_ib * e / beta - vcb_vbe * v
        slow = ~(np.abs(g) < NEWTON_TOL) & np.isfinite(g) & (vcb > 0)
        if not slow.any():
            break
        step(slow)
        currents(v)
    ic = e * early
    vbe, ib = v, e / beta
    vcb = vcb0 - vcb_ic * ic - vcb_ib * ib - vcb_vbe * vbe
    if saturation:
        vce = vcb + vbe
        soft = np.flatnonzero((vce < SATURATION_ONSET) & (vce > SATURATION_DEEP))  # Vce (V) near saturation
        if soft.size:
            # this call's own arrays (written in place) at the solve's whole shape
            vbe, e, ic, ib, vcb = (
                x if np.shape(x) == shape else np.array(np.broadcast_to(x, shape)) for x in (vbe, e, ic, ib, vcb)
            )
            coords = np.unravel_index(soft, shape)

            def at(x: Any) -> Any:
                """The soft elements of ``x`` (an argument at its own shape, broadcasting to the solve's)."""
                if not np.ndim(x):
                    return x
                x = np.asarray(x)
                lead = len(shape) - x.ndim
                return x[tuple(c if n > 1 else 0 for c, n in zip(coords[lead:], x.shape))]

            sat = _saturated_base_loop(
                *(at(x) for x in (a, r_base, r_emit, vcb0, vcb_ic, vcb_ib, vcb_vbe, beta)),
                i_s=at(i_s),
                nvt=at(nvt),
                inv_vaf=at(inv_vaf),
                v_start=vbe.reshape(-1)[soft],
                w_start=-vcb.reshape(-1)[soft],  # Vbc
                estimate=True,
            )
            for x, y in zip((vbe, e, ic, ib, vcb), sat):
                x.reshape(-1)[soft] = y
    if currents_only:
        return {"vbe": vbe, "i_forward": e, "ic": ic, "ib": ib}
    return {
        "vbe": vbe,
        "vcb": vcb,
        "i_forward": e,
        "ic": ic,
        "ib": ib,
        "converged": (np.abs(g) < NEWTON_TOL) & np.isfinite(e) & (e > 0),
    }


def _take(x: Any, at: np.ndarray) -> Any:
    """The elements ``at`` of a 1-D argument; a scalar as it is."""
    return np.asarray(x)[at] if np.ndim(x) else x


def _saturated_base_loop(
    a: np.ndarray,
    r_base: np.ndarray,
    r_emit: np.ndarray,
    vcb0: np.ndarray | float,
    vcb_ic: np.ndarray | float,
    vcb_ib: np.ndarray | float,
    vcb_vbe: np.ndarray | float,
    beta: np.ndarray,
    *,
    i_s: np.ndarray | float,
    nvt: np.ndarray | float,
    inv_vaf: float | np.ndarray,
    v_start: np.ndarray,
    w_start: np.ndarray,
    iterations: int = SATURATION_ITERATIONS,
    estimate: bool = False,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """:func:`solve_junction`'s loop with the base-collector junction: the unknowns Vbe (v) and
    Vbc (w), Gummel-Poon currents with BR = 1 as the feedback pair's (``If = IS*(exp(v/NF VT) - 1)``,
    ``Ir = IS*(exp(w/NF VT) - 1)``, ``Ic = (If - Ir)*(1 - w/VAF) - Ir``, ``Ib = If/BF + Ir``), the
    base loop ``a = v + r_base*Ib + r_emit*(Ic + Ib)`` and the collector network
    ``-w = vcb0 - vcb_ic*Ic - vcb_ib*Ib - vcb_vbe*v``; damped 2-D Newton with the exact Jacobian
    from (v_start, w_start) (with ``estimate``, from the saturated stage at Vce SATURATED_VCE
    where the two loops give it a positive Ir: some 5 steps instead of 10), w starting no higher
    than the junction's critical voltage (where its current turns steep) and rising by at most
    MAX_STEP above it, either falling by at most 5 MAX_STEP a step. An element whose steps fall
    below 1e-12 V is not moved again (once few are left they go on alone, as in
    feedback_pair.solve_pair). The arguments are 1-D over elements, or scalars. Returns vbe, If,
    Ic, Ib and Vcb (V, A)."""
    v_critical = nvt * np.log(nvt / (math.sqrt(2.0) * i_s))
    inv_b = 1.0 / beta
    if estimate:  # start where the stage would sit saturated at Vce = SATURATED_VCE, where it would
        # (Newton on the exponentials from far off moves about NF*VT a step): Ic and Ib from the two
        # loops at that Vce and the one-junction Vbe, then Ir and If from Ic = If - 2 Ir, Ib = If/BF + Ir
        w_sat = v_start - SATURATED_VCE
        p_c, q_b = w_sat + vcb0 - vcb_vbe * v_start, a - v_start
        det = vcb_ic * (r_base + r_emit) - vcb_ib * r_emit
        ic_sat = (p_c * (r_base + r_emit) - vcb_ib * q_b) / det
        ir_sat = ((vcb_ic * q_b - r_emit * p_c) / det - ic_sat * inv_b) / (1.0 + 2.0 * inv_b)
        f_sat = ic_sat + 2.0 * ir_sat
        fits = (ir_sat > 0) & (f_sat > 0) & np.isfinite(f_sat)
        v_start = np.where(fits, nvt * np.log1p(np.where(fits, f_sat, 0.0) / i_s), v_start)
        w_start = np.where(fits, nvt * np.log1p(np.where(fits, ir_sat, 0.0) / i_s), w_start)
    v, w = v_start.astype(float), np.minimum(w_start, v_critical)
    moving = np.ones(v.shape, dtype=bool)
    inv_nvt, r_be = 1.0 / nvt, r_base + r_emit
    step_down = -5.0 * MAX_STEP  # V, the largest fall of either junction's voltage in one step
    for step in range(iterations):
        f, fr = np.expm1(v * inv_nvt), np.expm1(w * inv_nvt)
        f *= i_s
        fr *= i_s
        g, gr = (f + i_s) * inv_nvt, (fr + i_s) * inv_nvt
        early = 1.0 - w * inv_vaf
        ic, ib = (f - fr) * early - fr, f * inv_b + fr
        dic_v, dib_v = g * early, g * inv_b
        dic_w = -gr * (early + 1.0) - (f - fr) * inv_vaf
        r1 = a - v - r_be * ib - r_emit * ic  # the base loop's residual (V)
        r2 = w + vcb0 - vcb_ic * ic - vcb_ib * ib - vcb_vbe * v  # the collector network's (V)
        j11 = -1.0 - r_be * dib_v - r_emit * dic_v
        j12 = -r_be * gr - r_emit * dic_w
        j21 = -vcb_ic * dic_v - vcb_ib * dib_v - vcb_vbe
        j22 = 1.0 - vcb_ic * dic_w - vcb_ib * gr
        det = j11 * j22 - j12 * j21
        dv = np.where(moving, np.minimum(np.maximum((r2 * j12 - r1 * j22) / det, step_down), MAX_STEP), 0.0)
        dw = np.where(
            moving,
            np.minimum(np.maximum((r1 * j21 - r2 * j11) / det, step_down), np.maximum(MAX_STEP, v_critical - w)),
            0.0,
        )
        v, w = v + dv, w + dw
        moving &= ((np.abs(dv) >= 1e-12) | (np.abs(dw) >= 1e-12)) & np.isfinite(dv + dw)
        left = np.count_nonzero(moving)
        if not left:
            break
        if v.size >= 256 and left < 0.25 * v.size and step + 1 < iterations:
            # the elements still moving go on alone (their steps are their own: the same values)
            at = np.flatnonzero(moving)
            rest = _saturated_base_loop(
                *(_take(x, at) for x in (a, r_base, r_emit, vcb0, vcb_ic, vcb_ib, vcb_vbe, beta)),
                i_s=_take(i_s, at),
                nvt=_take(nvt, at),
                inv_vaf=_take(inv_vaf, at),
                v_start=v[at],
                w_start=w[at],
                iterations=iterations - step - 1,
            )
            v[at], w[at] = rest[0], -rest[4]
            break
    f, fr = i_s * np.expm1(v / nvt), i_s * np.expm1(w / nvt)
    ic, ib = (f - fr) * (1.0 - w * inv_vaf) - fr, f * inv_b + fr
    return v, f, ic, ib, -w


def is_active(vce: np.ndarray, ic: np.ndarray, vce_sat: float, converged: np.ndarray) -> np.ndarray:
    """True where the transistor is forward active: Vce > vce_sat + margin and Ic > 0."""
    return (vce > vce_sat + ACTIVE_MARGIN) & (ic > 0) & converged


# ----------------------------------------------------------------------------- small signal


def depletion_capacitance(c0: float, v: np.ndarray) -> np.ndarray:
    """SPICE junction depletion capacitance (F) at forward voltage v (V), with FC linearisation."""
    v = np.asarray(v, dtype=float)
    lin = c0 / (1.0 - FC) ** (1.0 + MJ) * (1.0 - FC * (1.0 + MJ) + MJ * v / VJ)
    rev = c0 / (1.0 - np.minimum(v, FC * VJ) / VJ) ** MJ
    return np.where(v < FC * VJ, rev, lin)


def depletion_charge(c0: float, v: np.ndarray) -> np.ndarray:
    """SPICE junction depletion charge (C) at forward voltage v (V): the integral from 0 V of
    :func:`depletion_capacitance`, c0*VJ/(1-MJ)*(1 - (1 - v/VJ)^(1-MJ)) below FC*VJ, its
    linear-capacitance continuation above."""
    v = np.asarray(v, dtype=float)
    vf = np.minimum(v, FC * VJ)
    rev = c0 * VJ / (1.0 - MJ) * (1.0 - (1.0 - vf / VJ) ** (1.0 - MJ))
    d = np.maximum(v - FC * VJ, 0.0)
    f = c0 / (1.0 - FC) ** (1.0 + MJ)
    return rev + f * ((1.0 - FC * (1.0 + MJ)) * d + MJ / (2.0 * VJ) * ((FC * VJ + d) ** 2 - (FC * VJ) ** 2))


def small_signal(
    bias: dict[str, np.ndarray], device: AnyDevice, beta: np.ndarray, nvt: float, i_s: float
) -> dict[str, np.ndarray]:
    """Hybrid-pi parameters at a bias point (from :func:`solve_junction`).

    gm (S, dIc/dVb'e at fixed Vce), gpi (S, dIb/dVb'e), go (S, dIc/dVce), cpi, cmu (F)
    rb (ohm, base spreading resistance RB), the DC ic, ib (A) for the shot noise, and
    flicker = KF*|Ib|^AF (A^2, the base-current flicker PSD times f).
    """
    e, vbe, vcb = bias["i_forward"], bias["vbe"], bias["vcb"]
    inv_vaf = device.inv_vaf
    gbe = (e + i_s) / nvt
    go = e * inv_vaf
    return {
        "gm": gbe * (1.0 + vcb * inv_vaf) - go,
        "gpi": gbe / beta,
        "go": go,
        "ic": bias["ic"],
        "ib": bias["ib"],
        "flicker": device.KF * np.abs(bias["ib"]) ** device.AF,
        "cpi": device.TF * gbe + depletion_capacitance(device.CJE, vbe),
        "cmu": depletion_capacitance(device.CJC, -vcb),
        "rb": np.full_like(e, device.RB),
    }


def ce_midband(
    ss: dict[str, np.ndarray], r_emit: np.ndarray, r_coll: np.ndarray, r_base_source: np.ndarray
) -> dict[str, np.ndarray]:
    """Closed-form mid-band hybrid-pi stage (exact for the network of the model, caps ignored).

    Emitter to ground through r_emit, collector to AC ground through r_coll (0 allowed),
    driven at the external base. Returns z_base (ohm, into the base), gain_c (V/V, base
    to collector), gain_e (V/V, base to emitter), gain_x, gain_x_e (V/V, internal vb'e to
    collector and to emitter), loop (1+T, the ratio vb'/vb'e), z_coll (ohm, into the collector with r_base_source
    from the base to ground) and z_emit (ohm, into the emitter, collector at AC ground).
    """
    gm, gpi, go, rb = ss["gm"], ss["gpi"], ss["go"], ss["rb"]
    with np.errstate(divide="ignore", invalid="ignore"):  # go = 0 (no Early effect): z_coll infinite
        share = go * r_coll / (1.0 + go * r_coll)  # go/(go + 1/r_coll)
        alpha = ((gpi + gm) - gm * share) / (1.0 / r_emit + go / (1.0 + go * r_coll))  # v_e / v_b'e
        vb_per_vx = 1.0 + alpha + rb * gpi
        gain_x = (go * alpha - gm) * r_coll / (1.0 + go * r_coll)
        rpi = 1.0 / gpi
        r_b = r_base_source + rb
        r_p = r_emit * (rpi + r_b) / (r_emit + rpi + r_b)
        return {
            "z_base": rb + (1.0 + alpha) * rpi,
            "gain_c": gain_x / vb_per_vx,
            "gain_e": alpha / vb_per_vx,
            "gain_x": gain_x,
            "gain_x_e": alpha,
            "loop": 1.0 + alpha,
            "z_coll": 1.0 / go + r_p + gm / go * r_p * rpi / (rpi + r_b),
            "z_emit": 1.0 / ((1.0 + gm * rpi) / (rpi + r_b) + go),
        }


def parallel(*rs: np.ndarray) -> np.ndarray:
    """Parallel combination of resistances (ohm); inf means absent. Float32 arrays stay float32."""
    g = sum(1.0 / (float(r) if np.ndim(r) == 0 else np.asarray(r, dtype=np.result_type(r, 1.0))) for r in rs)
    return np.asarray(1.0 / g)


# ----------------------------------------------------------------------------- nodal analysis


class Network:
    """A linear network Y(s) = G + s*C for batched nodal analysis over (candidates, freqs).

    Nodes are named; ``None`` is ground. Element values broadcast over a leading candidate
    axis; :meth:`at` gives the network at complex frequencies s. Structural zeros are skipped
    in the elimination, so a chain-like node order keeps the work close to the element count.
    Thermal and shot noise current sources are recorded with the elements that make them
    (their PSDs are formed only when asked for, by :meth:`noise_sources`).
    """

    def __init__(self, nodes: Sequence[str], temp_c: float | np.ndarray = 27.0) -> None:
        self.nodes = list(nodes)
        self.index = {n: i for i, n in enumerate(self.nodes)}
        self.y: dict[tuple[int, int], np.ndarray] = {}  # S, frequency independent part
        self.cap: dict[tuple[int, int], np.ndarray] = {}  # F, multiplied by s in :meth:`at`
        self.noise: list[tuple[str | None, str | None, str, np.ndarray]] = []  # (a, b, kind, R or I)
        self.temp_c = temp_c
        self.s: np.ndarray | None = None  # complex frequencies set by :meth:`at`
        # solve's structure per (injected nodes, wanted nodes, with capacitances): the plan and
        # the entries to fill; shared with the networks :meth:`at` makes, dropped on any new element
        self._plans: dict[tuple, tuple] = {}
        # where the signal source and the load return (None: the reference node), and where a
        # ground-referenced bias resistor returns; set by the stage when they differ from it
        self.ground: str | None = None
        self.bias_ground: str | None = None

    def _stamp(self, part: dict, a: str | None, b: str | None, v: np.ndarray) -> None:
        self._plans = {}
        # entries are never changed in place (solve copies them), so a new key may share v
        ia, ib = (None if n is None else self.index[n] for n in (a, b))
        neg = None
        for key, diagonal in (((ia, ia), True), ((ib, ib), True), ((ia, ib), False), ((ib, ia), False)):
            if key[0] is None or key[1] is None:
                continue
            if diagonal:
                part[key] = part[key] + v if key in part else v
            else:
                if neg is None:
                    neg = -np.asarray(v)
                part[key] = part[key] + neg if key in part else neg

    def admittance(self, a: str | None, b: str | None, y: np.ndarray) -> None:
        """Two-terminal admittance y (S) between nodes a and b (noiseless)."""
        self._stamp(self.y, a, b, y)

    def resistor(self, a: str | None, b: str | None, r: np.ndarray) -> None:
        """Resistor r (ohm, 0 = short) between a and b, with its thermal-noise current."""
        r = np.asarray(r, dtype=float)
        with np.errstate(divide="ignore"):
            self.admittance(a, b, np.where(r > 0, 1.0 / r, G_SHORT))
        self.noise.append((a, b, "thermal", r))

    def capacitor(self, a: str | None, b: str | None, c: np.ndarray, ac: bool, coupling: bool) -> None:
        """Capacitor c (F); at mid-band (ac False) a coupling/bypass one is a short, others open."""
        if ac:
            self._stamp(self.cap, a, b, c)
        elif coupling:  # a zero capacitor is absent
            self.admittance(a, b, np.where(np.asarray(c, dtype=float) > 0, G_SHORT, 0.0))

    def vccs(self, p: str | None, n: str | None, cp: str | None, cn: str | None, g: np.ndarray) -> None:
        """Current g*(v_cp - v_cn) (A) flowing from node p through the source to node n."""
        neg = -np.asarray(g)
        self._plans = {}
        for row, sign in ((p, 1.0), (n, -1.0)):
            for col, s2 in ((cp, 1.0), (cn, -1.0)):
                if row is not None and col is not None:
                    key = (self.index[row], self.index[col])
                    v = g if sign * s2 > 0 else neg
                    self.y[key] = self.y[key] + v if key in self.y else v

    def transistor(self, b: str, c: str | None, e: str | None, ss: dict[str, np.ndarray], ac: bool) -> None:
        """Hybrid-pi at internal base b: gpi, Cpi b-e; Cmu b-c; gm*vbe and go c-e; shot noise."""
        self.admittance(b, e, ss["gpi"])
        if ac:
            self._stamp(self.cap, b, e, ss["cpi"])
            self._stamp(self.cap, b, c, ss["cmu"])
        self.admittance(c, e, ss["go"])
        self.vccs(c, e, b, e, ss["gm"])
        self.noise.append((c, e, "shot", ss["ic"]))
        self.noise.append((b, e, "shot", ss["ib"]))
        if np.any(ss["flicker"] > 0):  # SPICE: KF*Ib^AF/f between the internal base and the emitter
            self.noise.append((b, e, "flicker", ss["flicker"]))

    def jfet(self, g: str, d: str | None, s: str | None, ss: dict[str, np.ndarray], ac: bool) -> None:
        """JFET small signal (SPICE level 1): gm*vgs and gds d-s, Cgs g-s and Cgd g-d; noise as
        in SPICE, the channel's thermal 8kT*gm/3 (a resistor 3/(2 gm)) and the flicker
        KF*Id^AF/f d-s, plus the gate leakage's shot noise 2q*Ig/2 across each of the two
        reverse-biased gate junctions, g-s and g-d."""
        self.admittance(d, s, ss["gds"])
        self.vccs(d, s, g, s, ss["gm"])
        if ac:
            self._stamp(self.cap, g, s, ss["cgs"])
            self._stamp(self.cap, g, d, ss["cgd"])
        self.noise.append((d, s, "thermal", 1.5 / ss["gm"]))
        self.noise.append((g, s, "shot", 0.5 * ss["ig"]))
        self.noise.append((g, d, "shot", 0.5 * ss["ig"]))
        if np.any(ss["flicker"] > 0):
            self.noise.append((d, s, "flicker", ss["flicker"]))

    def noise_sources(self) -> list[tuple[str | None, str | None, np.ndarray]]:
        """Noise current sources (from node, to node, PSD in A^2/Hz): resistors' thermal, junctions'
        shot and flicker (the last needs the frequencies of :meth:`at`)."""
        out = []
        for a, b, kind, x in self.noise:
            if kind == "thermal":
                psd = np.where(x > 0, thermal_noise(np.where(x > 0, x, 1.0), self.temp_c), 0.0)
            elif kind == "flicker":
                psd = x / (np.abs(np.imag(self.s)) / (2.0 * np.pi))
            else:
                psd = shot_noise(x)
            out.append((a, b, psd))
        return out

    def at(self, s: np.ndarray) -> "Network":
        """The network at complex frequencies s (rad/s), entries G + s*C.

        Nothing is computed here: the entries are formed by :meth:`solve` straight into its
        workspace (s broadcasts with the element values, e.g. (frequencies, 1) against
        (candidates,) gives (frequencies, candidates)).
        """
        n = object.__new__(Network)  # the same elements, noise sources and plans (no copies)
        n.__dict__.update(self.__dict__)
        n.s = np.asarray(s)
        return n

    def take(self, cols: np.ndarray, n: int) -> "Network":
        """The network of the candidates at indices ``cols`` alone (element values with a last
        axis of ``n`` candidates are sliced, others kept; no noise sources)."""
        t = Network(self.nodes, self.temp_c)
        t.ground, t.bias_ground = self.ground, self.bias_ground

        def part(v: np.ndarray) -> np.ndarray:
            return v[..., cols] if np.ndim(v) and np.shape(v)[-1] == n else v

        t.y = {k: part(v) for k, v in self.y.items()}
        t.cap = {k: part(v) for k, v in self.cap.items()}
        return t

    def transposed(self) -> "Network":
        """The adjoint network (Y transposed), for all transfers to one node in one solve."""
        t = Network(self.nodes, self.temp_c)
        t.noise, t.s = self.noise, self.s
        t.y = {(j, i): v for (i, j), v in self.y.items()}
        t.cap = {(j, i): v for (i, j), v in self.cap.items()}
        return t

    def solve(self, rhs: dict[str, np.ndarray], want: Iterable[str] | None = None) -> dict[str, np.ndarray]:
        """Node voltages (V) for injected currents rhs (A into each node); all nodes if want is None.

        Gaussian elimination in the natural node order over the nonzero entries only, vectorised
        over the broadcast shape of the entries. The sequence of operations depends only on the
        network's structure and is planned once (:func:`_elimination_plan`); it then runs in place
        in a per-thread workspace, so a solve allocates little beyond the voltages it returns.
        Capacitances count only after :meth:`at` (before it they are open).
        """
        s = self.s
        structure = (frozenset(rhs), None if want is None else tuple(want), s is not None)
        known = self._plans.get(structure)
        if known is None:
            known = self._plans[structure] = self._prepare(rhs, want, s is not None)
        plan, stack_g, stack_c, outputs, values_shape, dtype = known
        rhs_idx = [(plan.slot[("b", self.index[k])], np.asarray(v)) for k, v in rhs.items()]
        shapes = [values_shape, *(v.shape for _, v in rhs_idx)]
        dtypes = [dtype, *(v.dtype for _, v in rhs_idx)]
        if stack_c is not None:
            shapes.append(s.shape)
            dtypes.append(s.dtype)
        shape = _broadcast_shape(shapes)
        dtype = np.result_type(*dtypes)
        blocked = len(shape) > max(len(values_shape), 1)  # a leading frequency axis beyond the element values'
        rows = max(1, SOLVE_BLOCK // math.prod(shape[1:])) if blocked else 0
        if not blocked or rows >= shape[0]:
            return {name: v.copy() for name, v in self._run(known, rhs_idx, s, shape, dtype).items()}
        # Many frequencies (a leading axis beyond the element values'): solved a few rows at a
        # time, so the workspace stays in cache (every element's solve is its own: the same values)
        out = {name: np.empty(shape, dtype) for name, _ in outputs}

        def rows_of(v: np.ndarray, i: int) -> np.ndarray:
            return v[i : i + rows] if v.ndim == len(shape) and v.shape[0] == shape[0] else v

        for i in range(0, shape[0], rows):
            block = self._run(
                known,
                [(slot, rows_of(v, i)) for slot, v in rhs_idx],
                None if s is None else rows_of(s, i),
                (min(rows, shape[0] - i), *shape[1:]),
                dtype,
            )
            for name, v in block.items():
                out[name][i : i + rows] = v
        return out

    @staticmethod
    def _run(
        known: tuple,
        rhs_idx: list[tuple[int, np.ndarray]],
        s: np.ndarray | None,
        shape: tuple[int, ...],
        dtype: np.dtype,
    ) -> dict[str, np.ndarray]:
        """One elimination over ``shape`` in the per-thread workspace: the wanted voltages as views of it."""
        plan, stack_g, stack_c, outputs, values_shape, _ = known
        work = _workspace(plan.slots + 1, shape, dtype)
        # fill the matrix entries, G + s*C, in one go (element values broadcast to the solve's shape)
        m = stack_g.shape[0]
        expand = (m,) + (1,) * (len(shape) - len(values_shape)) + values_shape
        filled = work[:m]
        if stack_c is None:
            filled[...] = stack_g.reshape(expand)
        elif s.dtype.kind == "c" and not s.real.any():  # s = j*omega: real part G, imaginary omega*C
            filled.real = stack_g.reshape(expand)
            np.multiply(s.imag, stack_c.reshape(expand), out=filled.imag)
        else:
            np.multiply(s, stack_c.reshape(expand), out=filled)
            filled += stack_g.reshape(expand)
        for slot, v in rhs_idx:
            work[slot] = v
        w = list(work)  # one view per slot, made once
        scratch = w[plan.slots]
        multiply, subtract, reciprocal, negative = np.multiply, np.subtract, np.reciprocal, np.negative
        for op, target, a, b in plan.codes:  # run the plan in place (op codes: see _Plan.codes)
            t = w[target]
            if op == 0:  # "sub": t -= a*b
                multiply(w[a], w[b], scratch)
                subtract(t, scratch, t)
            elif op == 1:  # "scale"
                multiply(t, w[a], t)
            elif op == 2:  # "inv"
                reciprocal(t, t)
            elif op == 3:  # "neg": t = -a*b (a fill-in, or the first term of a node without injection)
                multiply(w[a], w[b], t)
                # on the float view: numpy's complex negative has no fast loop (about 5x a complex
                # multiply), and flipping both parts' signs as floats is the same operation
                t = t.view(np.float64)
                negative(t, t)
            else:  # "zero"
                t[...] = 0.0
        return {name: w[slot] for name, slot in outputs}

    def _prepare(self, rhs: dict[str, np.ndarray], want: Iterable[str] | None, with_caps: bool) -> tuple:
        """What :meth:`solve` keeps per structure: the plan, the entries' G and C stacked in slot
        order (the entries hold the plan's first slots; zero where absent, so the matrix is filled
        by two array operations, not two per entry; C None before :meth:`at`), the (node, slot) of
        each wanted voltage, and the entries' broadcast shape and dtype."""
        caps = self.cap if with_caps else {}
        entries = {k: (self.y.get(k), caps.get(k)) for k in set(self.y) | set(caps)}
        rhs_nodes = frozenset(self.index[k] for k in rhs)
        targets = frozenset(range(len(self.nodes)) if want is None else (self.index[w] for w in want))
        plan = _elimination_plan(len(self.nodes), frozenset(entries), rhs_nodes, targets)
        values = [v for pair in entries.values() for v in pair if v is not None]
        shape = _broadcast_shape([getattr(v, "shape", ()) for v in values])
        dtype = np.result_type(*values)
        stack_g, stack_c = np.zeros((2, len(entries), *shape), dtype=dtype)
        for key, (g, c) in entries.items():
            if g is not None:
                stack_g[plan.slot[key]] = g
            if c is not None:
                stack_c[plan.slot[key]] = c
        outputs = [(self.nodes[k], plan.slot[("x", k)]) for k in targets]
        return plan, stack_g, stack_c if caps else None, outputs, shape, dtype


class _Plan:
    """Operations of one elimination: (op, target slot, a slot, b slot); slots index the workspace."""

    def __init__(self) -> None:
        self.slot: dict = {}
        self.ops: list[tuple[str, int, int, int]] = []
        self.slots = 0  # slots in use (several keys may share one: x[k] is held in b[k]'s)
        self._codes: list[tuple[int, int, int, int]] | None = None

    def new(self, key: object) -> int:
        self.slot[key] = self.slots
        self.slots += 1
        return self.slot[key]

    @property
    def codes(self) -> list[tuple[int, int, int, int]]:
        """The operations with their names as small integers (0 sub, 1 scale, 2 inv, 3 neg, 4 zero), as
        :meth:`Network.solve` runs them (made once)."""
        if self._codes is None:
            names = ("sub", "scale", "inv", "neg", "zero")
            self._codes = [(names.index(op), t, a, b) for op, t, a, b in self.ops]
        return self._codes


_PLANS: dict[tuple, _Plan] = {}
_WORK = threading.local()
SOLVE_BLOCK = 8192  # elements (frequencies x candidates) per elimination: the workspace stays in cache
WORKSPACE_KEEP = 1 << 25  # bytes of solver workspace a thread keeps between solves (larger ones are dropped)


def _elimination_plan(n: int, entries: frozenset, rhs: frozenset, targets: frozenset) -> _Plan:
    """The in-place elimination and back substitution for one structure (cached)."""
    key = (n, entries, rhs, targets)
    plan = _PLANS.get(key)
    if plan is not None:
        return plan
    plan = _Plan()
    for e in sorted(entries):
        plan.new(e)
    for i in sorted(rhs):
        plan.new(("b", i))
    rows: list[set[int]] = [set() for _ in range(n)]
    cols: list[set[int]] = [set() for _ in range(n)]
    for i, j in entries:
        rows[i].add(j)
        cols[j].add(i)
    has_b = set(rhs)
    for k in range(n):
        if (k, k) not in plan.slot:
            raise ValueError(f"node {k} has no diagonal entry")
        pivot = plan.slot[(k, k)]
        plan.ops.append(("inv", pivot, -1, -1))  # the pivot slot holds 1/pivot from here on
        below = sorted(i for i in cols[k] if i > k)
        right = sorted(j for j in rows[k] if j > k)
        for i in below:
            f = plan.slot[(i, k)]
            plan.ops.append(("scale", f, pivot, -1))
            for j in right:
                if (i, j) in plan.slot:
                    plan.ops.append(("sub", plan.slot[(i, j)], f, plan.slot[(k, j)]))
                else:
                    plan.ops.append(("neg", plan.new((i, j)), f, plan.slot[(k, j)]))
                    rows[i].add(j)
                    cols[j].add(i)
            if k in has_b:
                if i in has_b:
                    plan.ops.append(("sub", plan.slot[("b", i)], f, plan.slot[("b", k)]))
                else:
                    plan.ops.append(("neg", plan.new(("b", i)), f, plan.slot[("b", k)]))
                    has_b.add(i)
    for k in range(n - 1, min(targets) - 1, -1):  # back substitution, x[k] held in b[k]'s slot
        acc = plan.slot.get(("b", k))
        for j in sorted(rows[k]):
            if j > k:
                if acc is None:
                    acc = plan.new(("b", k))
                    plan.ops.append(("neg", acc, plan.slot[(k, j)], plan.slot[("x", j)]))
                else:
                    plan.ops.append(("sub", acc, plan.slot[(k, j)], plan.slot[("x", j)]))
        if acc is None:  # no injection and nothing to its right: the node's voltage is zero
            acc = plan.new(("b", k))
            plan.ops.append(("zero", acc, -1, -1))
        plan.ops.append(("scale", acc, plan.slot[(k, k)], -1))
        plan.slot[("x", k)] = acc
    _PLANS[key] = plan
    return plan


def clear_workspace() -> None:
    """Drop this thread's cached solver workspace (its memory is then counted afresh by tracemalloc)."""
    _WORK.__dict__.pop("buffers", None)


def _broadcast_shape(shapes: list[tuple[int, ...]]) -> tuple[int, ...]:
    """numpy's broadcast of array shapes (ValueError where they do not broadcast), without its
    per-call cost on the few short shapes of a nodal solve or a base-loop Newton solve."""
    out = [1] * max(len(sh) for sh in shapes)
    for sh in shapes:
        offset = len(out) - len(sh)
        for i, d in enumerate(sh):
            o = out[offset + i]
            if d != o:
                if o == 1:
                    out[offset + i] = d
                elif d != 1:
                    raise ValueError(f"shapes {shapes} do not broadcast")
    return tuple(out)


def _workspace(slots: int, shape: tuple[int, ...], dtype: np.dtype) -> np.ndarray:
    """Arrays work[0..slots-1] of the given shape: a per-thread buffer reused between solves."""
    size = slots * math.prod(shape)
    nbytes = size * np.dtype(dtype).itemsize
    buffers = getattr(_WORK, "buffers", None)
    if buffers is None:
        buffers = _WORK.buffers = {}
    buf = buffers.get(np.dtype(dtype))
    if buf is None or buf.size < size:
        buf = np.empty(size, dtype=dtype)
        if nbytes <= WORKSPACE_KEEP:
            buffers[np.dtype(dtype)] = buf
    return buf[:size].reshape((slots, *shape))


# ----------------------------------------------------------------------------- response


def minus_3db_corners(
    response: Callable[[np.ndarray], np.ndarray], reference: np.ndarray, steps: int = REFINE_STEPS
) -> tuple[np.ndarray, np.ndarray]:
    """f_low, f_high (Hz) where |H| falls to |reference|/sqrt(2), one per candidate.

    ``response(f)`` maps frequencies (Hz) of shape (k, candidates) or (k, 1) to complex gains
    (k, candidates). A one-per-decade log grid over SWEEP brackets each crossing (the last
    crossing below the mid-band peak, the first above it), then Illinois false position in
    log f refines both at once on d = -ln(|ref|^2/|H|^2 - 1), zero at the corner and exactly
    linear in log f for a maximally flat skirt (|H|^2 = |ref|^2/(1 + (fc/f)^2n), any order n),
    so a few steps suffice (``steps``; a response peaking inside the bracket, as a feedback loop
    with a small phase margin does, needs more). Corners beyond SWEEP are reported at its ends.
    """
    corners = _corners(response, reference, (0, 1), steps)
    return corners[0], corners[1]


def low_3db_corner(response: Callable[[np.ndarray], np.ndarray], reference: np.ndarray) -> np.ndarray:
    """f_low (Hz) alone, as :func:`minus_3db_corners` finds it (the same values): its refinement
    steps solve one frequency per candidate instead of two (for the capacitor sizing)."""
    return _corners(response, reference, (0,))[0]


_GRID = np.logspace(np.log10(SWEEP[0]), np.log10(SWEEP[1]), COARSE_POINTS)  # Hz, the corners' coarse grid
_LOG_GRID = np.log10(_GRID)


def _corners(
    response: Callable[[np.ndarray], np.ndarray],
    reference: np.ndarray,
    sides: tuple[int, ...],
    steps: int = REFINE_STEPS,
) -> np.ndarray:
    """The -3 dB crossings of :func:`minus_3db_corners` on ``sides`` (0 low, 1 high), shape (sides, candidates)."""
    grid = _GRID
    ref2 = _magnitude2(reference)

    def distance(h: np.ndarray, r2: np.ndarray | None = None) -> np.ndarray:  # > 0 in band, <= 0 beyond the corner
        # -ln(max(ref2/(|h|^2 + 1e-300) - 1, 1e-30)), in place on one array
        d = _magnitude2(h)
        d += 1e-300
        np.divide(ref2 if r2 is None else r2, d, out=d)
        d -= 1.0
        np.maximum(d, 1e-30, out=d)
        np.log(d, out=d)
        return np.negative(d, out=d)

    db = distance(response(grid[:, None]))  # (k, n)
    n = db.shape[1]
    above = db > 0.0
    peak = np.argmax(db, axis=0)
    idx = np.arange(grid.size)[:, None]
    low_i = np.where(~above & (idx < peak), idx, -1).max(axis=0)  # last point below, left of peak
    high_i = np.where(~above & (idx > peak), idx, grid.size).min(axis=0) if 1 in sides else low_i
    rows = list(sides)
    i_out = np.stack([low_i, high_i])[rows]  # (sides, n): outside point of each crossing
    inside = (i_out >= 0) & (i_out < grid.size)
    i0 = np.clip(i_out, 0, grid.size - 1)
    i1 = np.clip(i0 + np.array([[1], [-1]])[rows], 0, grid.size - 1)
    cols = np.arange(n)
    x0, x1 = _LOG_GRID[i0], _LOG_GRID[i1]
    d0, d1 = db[i0, cols], db[i1, cols]
    # An inside end at or above the reference (a response peaking near its corner, as a
    # bootstrap's) has d at its clamp, where false position would crawl: such a bracket is
    # bisected in log f until its inside end lies below the reference, and its candidate takes
    # PEAK_STEPS more steps (those candidates alone, through ``response.take`` when it has one).
    above_ref = d1 >= PEAK_DISTANCE
    state = [
        x0,
        x1,
        d0,
        d1,
        np.zeros((len(rows), n), dtype=bool),
        above_ref,
        np.zeros_like(x0),
        _estimate(x0, x1, d0, d1),
    ]
    _false_position(response, distance, state, steps)
    if not hasattr(response, "take"):  # a plain callable: every candidate takes the peak steps
        if (above_ref & inside).any():
            _false_position(response, distance, state, PEAK_STEPS)
    else:  # the candidates whose estimate still moves, or that peaked, alone
        for _ in range(PEAK_STEPS):
            moved, above_ref = state[6], state[5]
            more = np.flatnonzero(((moved > CORNER_XTOL) | above_ref) & inside)
            if not more.size:
                break
            more = np.unique(more % n)
            part = [v[:, more] for v in state]
            _false_position(_columns(response, more, n, len(rows)), distance, part, 1, ref2[..., more])
            for whole, v in zip(state, part):
                whole[:, more] = v
    return np.where(inside, np.power(10.0, state[7]), np.array(SWEEP)[rows, None])


WHOLE_BATCH = 1024  # candidates up to which a corner's further steps solve the whole batch (see _columns)


def _columns(response: "Response", cols: np.ndarray, n: int, rows: int) -> Callable[[np.ndarray], np.ndarray]:
    """``response`` for the candidates at indices ``cols`` of its ``n`` alone, f of shape (rows,
    cols.size). A batch of up to WHOLE_BATCH candidates is solved whole, the others at a
    placeholder 1 kHz, and the wanted columns kept: there a smaller network (``response.take``)
    costs more to set up than the columns it saves; the values are the same (every column's solve
    is its own)."""
    if n > WHOLE_BATCH:
        return response.take(cols)
    f_all = np.full((rows, n), 1.0e3)

    def columns(f: np.ndarray) -> np.ndarray:
        f_all[:, cols] = f
        return response(f_all)[:, cols]

    return columns


def _estimate(x0: np.ndarray, x1: np.ndarray, d0: np.ndarray, d1: np.ndarray) -> np.ndarray:
    """The false-position point (log10 Hz) of brackets x0 (outside, d0 <= 0) to x1 (inside, d1 > 0)."""
    den = d0 - d1
    den[d0 == d1] = 1.0
    xm = x1 - x0
    xm *= d0
    xm /= den
    xm += x0
    return xm


def _false_position(
    response: Callable[[np.ndarray], np.ndarray],
    distance: Callable[..., np.ndarray],
    state: list[np.ndarray],
    steps: int,
    ref2: np.ndarray | None = None,
) -> None:
    """``steps`` Illinois false-position steps of :func:`_corners` on the brackets in ``state``
    ([x0, x1, d0, d1, last, above_ref, moved, next], each (sides, candidates), updated in place;
    moved: how far the last step moved the estimate, decades; next: the next step's point,
    log10 Hz); ``ref2``: the squared reference of these candidates when not the distance's own."""
    x0, x1, d0, d1, last, above_ref, _, xm = state
    for _ in range(steps):  # Illinois false position on the crossings at once
        lo, hi = np.minimum(x0, x1), np.maximum(x0, x1)
        np.maximum(xm, lo, out=xm)
        np.minimum(xm, hi, out=xm)
        if above_ref.any():  # bisected
            lo += hi
            lo *= 0.5
            np.copyto(xm, lo, where=above_ref)
        dm = distance(response(np.power(10.0, xm)), ref2)
        out_side = dm <= 0.0
        in_side = ~out_side
        keep = ~above_ref
        np.multiply(d1, 0.5, out=d1, where=out_side & last & keep)  # an end kept twice: halve its value
        np.multiply(d0, 0.5, out=d0, where=in_side & ~last & keep)
        np.copyto(x0, xm, where=out_side)
        np.copyto(d0, dm, where=out_side)
        np.copyto(x1, xm, where=in_side)
        np.copyto(d1, dm, where=in_side)
        np.copyto(above_ref, dm >= PEAK_DISTANCE, where=in_side)
        last[...] = out_side
        nxt = _estimate(x0, x1, d0, d1)
        moved = np.abs(nxt - xm)  # the next step's move
        xm = nxt
    state[6:] = [moved, xm]


class Response:
    """The complex gain source -> ``out`` of a network (V/V) at frequencies f (Hz, shape (k,
    candidates) or (k, 1)), shape (k, candidates), driven by the Norton current ``drive`` (A,
    one per candidate) into node ``source``; :meth:`take` restricts it to some candidates."""

    def __init__(self, network: "Network", source: str, drive: np.ndarray, out: str = "out") -> None:
        self.network, self.source, self.drive, self.out = network, source, np.asarray(drive), out

    def __call__(self, f: np.ndarray) -> np.ndarray:
        return self.network.at(2j * np.pi * f).solve({self.source: self.drive}, [self.out])[self.out]

    def take(self, cols: np.ndarray) -> "Response":
        """The same response for the candidates at indices ``cols`` alone."""
        n = self.drive.shape[-1]
        return Response(self.network.take(cols, n), self.source, self.drive[..., cols], self.out)


# ----------------------------------------------------------------------------- noise


def noise_integrals(
    network: Network, out_node: str, source_node: str, r_source: np.ndarray, band: tuple[float, float]
) -> tuple[np.ndarray, np.ndarray]:
    """Equivalent input noise (V rms over band, without the source's own noise) and NF (dB,
    referred to the standard 290 K source: 10*log10(1 + ein^2/(4k*290*r_source*B))).

    ``network`` is the stage network (AC) with the source resistance (noiseless) and the
    load in place, element values 1-D over candidates, evaluated at log-spaced frequencies
    over the band (arrays (frequencies, candidates)); its recorded noise current
    sources (resistors, shot noise) are summed at the output through the adjoint solve,
    which gives every node's transimpedance z (V/A) to out_node at once. The source is a
    Norton current vs/r_source into source_node, so the gain is z[source_node]/r_source.
    The stage's own sources are at the network's temperature; flicker sources (1/f) are integrated on a denser
    grid. Matches SPICE .noise input-referred total.
    """
    flicker = any(kind == "flicker" for _, _, kind, _ in network.noise)
    f = _noise_frequencies(band[0], band[1], NOISE_POINTS_FLICKER if flicker else NOISE_POINTS)
    net = network.at(2j * np.pi * f)
    z = net.transposed().solve({out_node: np.ones(1)})
    gain2 = _magnitude2(z[source_node]) / r_source**2
    out = 0.0
    for a, b, psd in net.noise_sources():
        h = (z[a] if a is not None else 0.0) - (z[b] if b is not None else 0.0)
        out = out + psd * _magnitude2(h)
    in_psd = out / gain2
    ein2 = np.sum(power_law_segments(f, in_psd, axis=0), axis=0)
    source2 = 4.0 * BOLTZMANN * NOISE_REFERENCE_K * r_source * (band[1] - band[0])
    return np.sqrt(ein2), 10.0 * np.log10(1.0 + ein2 / source2)


@functools.lru_cache(maxsize=64)
def _noise_frequencies(f_low: float, f_high: float, points: int) -> np.ndarray:
    """Log-spaced frequencies (Hz) over a band, shape (points, 1); made once per band (read-only)."""
    f = np.geomspace(f_low, f_high, points)[:, None]
    f.flags.writeable = False
    return f


def _magnitude2(h: np.ndarray | float) -> np.ndarray:
    """|h|^2 of a complex array (in the squared units of h), without the square root of abs."""
    h = np.asarray(h)
    return h.real * h.real + h.imag * h.imag


def power_law_segments(f: np.ndarray, psd: np.ndarray, axis: int = -1) -> np.ndarray:
    """Integral (per segment) of a PSD sampled at log-spaced f (along ``axis``, same number of
    dimensions as psd), taken as a power law between points.

    Exact for the 1/f^k skirts that coupling corners give the input-referred noise.
    """
    f, psd = np.asarray(f), np.asarray(psd)

    def part(a: np.ndarray, s: slice) -> np.ndarray:
        return a[(slice(None),) * (axis % a.ndim) + (s,)]

    f0, f1 = part(f, slice(None, -1)), part(f, slice(1, None))
    s0, s1 = part(psd, slice(None, -1)), part(psd, slice(1, None))
    # integral of s0 (f/f0)^k from f0 to f1 = (s1 f1 - s0 f0)/(k + 1), as (f1/f0)^k = s1/s0 (no power taken)
    log_step = np.log(f1 / f0)
    k1 = np.log(s1 / s0) / log_step + 1.0
    s0f0 = s0 * f0
    with np.errstate(divide="ignore", invalid="ignore"):
        general = (s1 * f1 - s0f0) / k1
    return np.where(np.abs(k1) < 1e-6, s0f0 * log_step, general)


def thermal_noise(r: np.ndarray, temp_c: float | np.ndarray) -> np.ndarray:
    """Thermal-noise current PSD 4kT/R (A^2/Hz) of a resistor r (ohm) at temp_c (degC, or per candidate)."""
    return 4.0 * BOLTZMANN * (temp_c + KELVIN_OFFSET) / r


def shot_noise(i: np.ndarray) -> np.ndarray:
    """Shot-noise current PSD 2qI (A^2/Hz) of a DC current i (A)."""
    return 2.0 * ELEMENTARY_CHARGE * np.abs(i)


# ----------------------------------------------------------------------------- swing, distortion


def load_line_limits(
    ic: np.ndarray, vce: np.ndarray, vce_sat: float, r_ac: np.ndarray, re_ac: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Peak output (V) before cutoff (Ic*Rac) and before saturation ((Vce-Vce_sat)*Rac/(Rac+Re_ac))."""
    return ic * r_ac, np.maximum(vce - vce_sat, 0.0) * r_ac / (r_ac + re_ac)


def usable_swing(
    static_output: Callable[[np.ndarray], np.ndarray],
    gain: np.ndarray,
    clip_peak: np.ndarray,
    tolerance: float = SWING_TOLERANCE,
    rows_output: Callable[[np.ndarray], Callable[[np.ndarray], np.ndarray]] | None = None,
    refine: np.ndarray | None = None,
) -> np.ndarray:
    """Usable swing (V peak-to-peak at the load): the largest sine whose two peaks are both
    within ``tolerance`` (10 %) of the linear mid-band gain times the drive.

    ``static_output(vs)`` is the stage's memoryless transfer (source V -> change of the load
    voltage, V, shape (candidates, samples)); a sine's output peaks are then the outputs at
    the drive's two peaks, so only +a and -a are solved. The peak deviation
    d(a) = max over both peaks of |out(+-a)/(+-gain*a) - 1| is scanned at SWING_GRID
    multiples of the clip-level drive a_clip = clip_peak/(0.9*|gain|) (where a stage that
    clips hard at the AC load line has fallen 10 % short; the grid runs past it for stages
    whose static curve clips later), the first scanned amplitude with d > tolerance
    brackets the crossing with the one before it (d(0) = 0), and Illinois false position
    on d - tolerance refines it; the swing is out(+a) - out(-a) there, interpolated between
    the bracket's ends. Where no scanned amplitude deviates (a stage whose static curve clips
    later than its AC load line), the scan goes on at doubling amplitudes (SWING_DOUBLINGS);
    where none of those deviates either, the peak-to-peak at the last one is returned. A drive whose
    output is not finite (``static_output`` gives NaN where its solve did not settle) counts
    as deviating, and the swing is not interpolated towards it.

    After SWING_STEPS steps, the candidates whose estimate the last step moved by more than
    SWING_RTOL (a transfer that folds back, as the feedback pair's once q1 saturates, where the
    peak-to-peak is far from linear across the bracket) take up to SWING_MORE_STEPS more, each
    until its estimate moves by no more than that (then it is not moved again, so it does not
    depend on the others of its call), through
    ``rows_output(rows)``, the same transfer for the candidates at ``rows`` alone, when the batch
    has more than WHOLE_SWING_BATCH (a smaller one steps whole, the others held: there a
    subset's transfer costs more to set up than the rows it saves); ``refine`` (bool per
    candidate, e.g. the active ones: a transfer about a saturated or cut-off stage's bias means
    nothing) limits the candidates that take them.
    """
    gain = np.asarray(gain, dtype=float)
    a_clip = np.asarray(clip_peak, dtype=float) / ((1.0 - tolerance) * np.abs(gain))
    measure = _swing_measure(static_output, gain, tolerance)
    n = gain.size
    rows = np.arange(n)
    grid = a_clip[:, None] * np.asarray(SWING_GRID)[None, :]
    d_grid, pp_grid = measure(grid)
    over = d_grid > 0.0
    found = over.any(axis=1)
    first = np.where(found, np.argmax(over, axis=1), grid.shape[1] - 1)
    x1, d1, p1 = grid[rows, first], d_grid[rows, first], pp_grid[rows, first]
    prev = np.maximum(first - 1, 0)
    start = first == 0
    x0 = np.where(start, 0.0, grid[rows, prev])
    d0 = np.where(start, -tolerance, d_grid[rows, prev])
    p0 = np.where(start, 0.0, pp_grid[rows, prev])
    d1 = np.minimum(d1, 1.0)  # a non-finite or huge deviation past a hard clip: keep the secant sane
    # A stage whose static curve clips later than its AC load line says (a follower whose bootstrap
    # or load lifts the clip) has not deviated by the scan's end: its scan goes on at twice the last
    # amplitude (those candidates alone count; the others are solved again at their own outside end
    # and left as they are)
    for _ in range(SWING_DOUBLINGS):
        more = ~found & np.isfinite(x1) & (x1 > 0)
        if not more.any():
            break
        a = np.where(more, 2.0 * x1, x1)
        dm, pm = (v[:, 0] for v in measure(a[:, None]))
        x0, d0, p0 = (np.where(more, new, old) for new, old in ((x1, x0), (d1, d0), (p1, p0)))
        x1, d1, p1 = (np.where(more, new, old) for new, old in ((a, x1), (np.minimum(dm, 1.0), d1), (pm, p1)))
        found |= more & (dm > 0.0)
    state = [x0, d0, p0, x1, d1, p1, np.zeros(n)]
    _swing_steps(measure, state, SWING_STEPS - 1)
    before = _swing_estimate(state)
    _swing_steps(measure, state, 1)
    estimate = _swing_estimate(state)
    moving = found & ~(np.abs(estimate - before) <= SWING_RTOL * np.abs(estimate))
    if refine is not None:
        moving &= refine
    if moving.any():
        if rows_output is None or n <= WHOLE_SWING_BATCH:  # the whole batch steps, the others held
            at: np.ndarray | slice = slice(None)
            part, part_measure = state, measure
        else:  # the moving rows alone
            at = np.flatnonzero(moving)
            part = [v[at] for v in state]
            part_measure = _swing_measure(rows_output(at), gain[at], tolerance)
        before, done = estimate[at], ~moving[at]
        for _ in range(SWING_MORE_STEPS):  # each until its estimate moves by no more than SWING_RTOL
            kept = [v[done] for v in part]
            _swing_steps(part_measure, part, 1)
            for v, old in zip(part, kept):  # a converged estimate is not moved again (nor by its batch)
                v[done] = old
            now = _swing_estimate(part)
            done |= np.abs(now - before) <= SWING_RTOL * np.abs(now)
            before = now
            if done.all():
                break
        estimate[at] = before
    swing = np.where(found, estimate, state[5])
    return np.where(np.isfinite(swing) & (np.abs(gain) > 0), swing, 0.0)


def swing_reaches(
    static_output: Callable[[np.ndarray], np.ndarray],
    gain: np.ndarray,
    clip_peak: np.ndarray,
    floor: float,
    tolerance: float = SWING_TOLERANCE,
    rows_output: Callable[[np.ndarray], Callable[[np.ndarray], np.ndarray]] | None = None,
    steps: int = SWING_FLOOR_STEPS,
) -> tuple[np.ndarray, np.ndarray]:
    """Whether the usable swing of :func:`usable_swing` reaches ``floor`` (V peak-to-peak),
    told from the transfer at a few drives where that is certain, without solving the swing.

    As :func:`usable_swing` does, this rests on the deviation d and the peak-to-peak rising
    with the drive: a drive within ``tolerance`` lies before the crossing, so the swing is at
    least its peak-to-peak, and one past it lies beyond, so the swing is at most its
    peak-to-peak. A peak-to-peak SWING_FLOOR_MARGIN above the floor at a drive within the
    tolerance tells reached (as far as :func:`usable_swing`'s scan reaches), one the margin
    below it at a drive past the tolerance tells short; the margin, twice the solved swing's own
    accuracy, gives the same side as :func:`usable_swing`'s figure would. The drives:
    floor/(2|gain|)/(1 - tolerance) (its peak-to-peak is the floor or more where within the
    tolerance), then floor/(2|gain|)/(1 + tolerance) for the others (past the tolerance, its
    peak-to-peak is the floor or less), then, where those two bracket the crossing, ``steps``
    of :func:`usable_swing`'s false-position steps (none for a transfer whose solves start from
    its earlier ones, as the feedback pair's: where it folds back, the solution its steps reach
    can depend on the drives solved before them). Returns (verdict: +1
    reached, -1 short, 0 undecided: a swing near the floor, for :func:`usable_swing` to solve;
    the peak-to-peak (V) that told reached, NaN elsewhere). The drives after the first are
    solved for the candidates still open alone, through ``rows_output`` as
    :func:`usable_swing`'s, when the batch has more than WHOLE_SWING_BATCH."""
    gain = np.asarray(gain, dtype=float)
    n = gain.size
    verdict, at_least = np.zeros(n, dtype=int), np.full(n, np.nan)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        a_floor = floor / (2.0 * np.abs(gain))
        scan_end = clip_peak / ((1.0 - tolerance) * np.abs(gain)) * SWING_GRID[-1] * 2.0**SWING_DOUBLINGS
        whole = _swing_measure(static_output, gain, tolerance)

        def measure_of(rows: np.ndarray) -> Callable[[np.ndarray], tuple[np.ndarray, np.ndarray]]:
            """The measure of the candidates at ``rows`` (drives (rows, k))."""
            if rows_output is not None and n > WHOLE_SWING_BATCH:
                return _swing_measure(rows_output(rows), gain[rows], tolerance)

            def on_whole(a: np.ndarray) -> tuple[np.ndarray, np.ndarray]:  # the others at their floor drive
                drives = np.repeat(a_floor[:, None], a.shape[1], axis=1)
                drives[rows] = a
                d, pp = whole(drives)
                return d[rows], pp[rows]

            return on_whole

        def tell(rows: np.ndarray, a: np.ndarray, d: np.ndarray, pp: np.ndarray) -> np.ndarray:
            """Record the sides the drives ``a`` of ``rows`` tell; the rows left open."""
            undecided = verdict[rows] == 0
            reached = undecided & (d <= 0.0) & (pp >= floor * (1.0 + SWING_FLOOR_MARGIN)) & (a <= scan_end[rows])
            short = undecided & (d > 0.0) & (pp <= floor * (1.0 - SWING_FLOOR_MARGIN))
            verdict[rows[reached]], at_least[rows[reached]] = 1, pp[reached]
            verdict[rows[short]] = -1
            return ~(reached | short)

        rows = np.arange(n)
        a_high = a_floor / (1.0 - tolerance)
        d_high, pp_high = (v[:, 0] for v in whole(a_high[:, None]))
        rows = rows[tell(rows, a_high, d_high, pp_high)]
        if rows.size:
            a_low = a_floor[rows] / (1.0 + tolerance)
            d_low, pp_low = (v[:, 0] for v in measure_of(rows)(a_low[:, None]))
            bracket = tell(rows, a_low, d_low, pp_low) & (d_low <= 0.0) & (d_high[rows] > 0.0)
            rows, at = rows[bracket], np.flatnonzero(bracket)
            if rows.size and steps:  # the crossing between the two drives: false position on it
                state = [
                    a_low[at],
                    d_low[at],
                    pp_low[at],
                    a_high[rows],
                    d_high[rows],
                    pp_high[rows],
                    np.zeros(rows.size),
                ]
                measure = measure_of(rows)
                for _ in range(steps):
                    _swing_steps(measure, state, 1)
                    x0, d0, p0, x1, d1, p1, _ = state
                    open_ = tell(rows, x0, d0, p0) & tell(rows, x1, d1, p1)
                    if not open_.any():
                        break
    return verdict, at_least


def _swing_measure(
    static_output: Callable[[np.ndarray], np.ndarray], gain: np.ndarray, tolerance: float
) -> Callable[[np.ndarray], tuple[np.ndarray, np.ndarray]]:
    """The measure of :func:`usable_swing`: (d - tolerance, peak-to-peak (V)) at drive amplitudes a (V, shape (n, k))."""
    g = gain[:, None]

    def measure(a: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        out = static_output(np.concatenate([a, -a], axis=1))
        k = a.shape[1]
        lin = g * a
        up, down = out[:, :k], out[:, k:]
        dev = np.maximum(np.abs(up / lin - 1.0), np.abs(down / lin + 1.0))
        return np.where(np.isfinite(dev), dev, np.inf) - tolerance, np.abs(up - down)

    return measure


def _swing_steps(
    measure: Callable[[np.ndarray], tuple[np.ndarray, np.ndarray]], state: list[np.ndarray], steps: int
) -> None:
    """``steps`` Illinois false-position steps of :func:`usable_swing` on the brackets in ``state``
    ([x0, d0, p0, x1, d1, p1, side], updated in place: x0 inside (d < 0), x1 outside, p the
    peak-to-peak at each end; side +1 where the last step moved x1, -1 where it moved x0)."""
    x0, d0, p0, x1, d1, p1, side = state
    for _ in range(steps):
        xm = x0 + (x1 - x0) * d0 / np.where(d0 == d1, -1.0, d0 - d1)
        xm = np.clip(xm, np.minimum(x0, x1), np.maximum(x0, x1))
        dm, pm = (v[:, 0] for v in measure(xm[:, None]))
        dm = np.minimum(dm, 1.0)
        out_side = dm > 0.0
        d0 = np.where(out_side & (side > 0), 0.5 * d0, d0)  # an end kept twice: halve its value
        d1 = np.where(~out_side & (side < 0), 0.5 * d1, d1)
        x1, d1, p1 = (np.where(out_side, new, old) for new, old in ((xm, x1), (dm, d1), (pm, p1)))
        x0, d0, p0 = (np.where(out_side, old, new) for new, old in ((xm, x0), (dm, d0), (pm, p0)))
        side = np.where(out_side, 1.0, -1.0)
    state[:] = [x0, d0, p0, x1, d1, p1, side]


def _swing_estimate(state: list[np.ndarray]) -> np.ndarray:
    """The swing (V peak-to-peak) where d crosses zero in the brackets of ``state``, interpolated
    between the ends' peak-to-peak. An outside end without an output (a transfer's solve that
    did not settle: NaN) is no figure to interpolate towards: the swing is then the inside end's,
    a drive that passed."""
    _, d0, p0, _, d1, p1, _ = state
    w = d0 / np.where(d0 == d1, -1.0, d0 - d1)
    return np.where(np.isfinite(p1), p0 + np.clip(w, 0.0, 1.0) * (p1 - p0), p0)


def thd_small_signal(
    v_x_peak: np.ndarray, suppression: np.ndarray, nvt: float, early_u: np.ndarray | float = 0.0
) -> np.ndarray:
    """Second-harmonic estimate (fraction) of one transistor: v_x/(4 NF VT) * suppression * (1-u)/(1+u).

    v_x (V peak) is the intrinsic base-emitter signal at the output level. suppression
    is 1/(1+T) of the local feedback (1/(1+gm*Re_ac) for a degenerated stage, giving the
    v_b/(4 NF VT (1+gm Re_ac)^2) form), or in general gm*|Z_ce->out|/|v_out/v_x| with
    Z_ce->out the transimpedance from a current in the collector-emitter source to the load.
    u = go*Rac (about Ic*Rac/VAF) is the Early-effect compression by the collector's own swing (Gummel-Poon
    Ic proportional to 1 + Vcb/VAF), which cancels part of the exponential's second harmonic.
    """
    return np.abs(v_x_peak) / (4.0 * nvt) * suppression * (1.0 - early_u) / (1.0 + early_u)


def harmonic_distortion(waveform: np.ndarray, harmonics: int = 9) -> np.ndarray:
    """THD (fraction) of one period of samples along the last axis: rms of harmonics 2..harmonics
    over the fundamental."""
    spectrum = np.abs(np.fft.rfft(waveform, axis=-1))
    return np.sqrt(np.sum(spectrum[..., 2 : harmonics + 1] ** 2, axis=-1)) / spectrum[..., 1]


def thd_quasistatic(
    static_output: Callable[[np.ndarray], np.ndarray],
    source_peak: np.ndarray,
    samples: int = THD_SAMPLES,
    harmonics: int = 9,
) -> np.ndarray:
    """THD (fraction) of the static nonlinear stage over one sine period, per candidate.

    ``static_output(vs)`` maps source voltages (V, shape (candidates, samples)) to load
    voltages (V); the stage is solved at every sample of every candidate at once and the
    output's spectrum taken. source_peak (V) has one value per candidate. Harmonics above
    samples/2 - 1 are not resolved and are left out.
    """
    harmonics = min(harmonics, samples // 2 - 1)
    t = np.arange(samples) / samples
    vs = np.asarray(source_peak, dtype=float).reshape(-1, 1) * np.sin(2.0 * np.pi * t)
    return harmonic_distortion(static_output(vs), harmonics)
