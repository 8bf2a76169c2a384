"""feedback_pair: the two-transistor series-shunt feedback pair, non-inverting.

A divider-biased common emitter (q1) direct-coupled into a second common emitter (q2) whose
emitter resistor is bypassed; r_feedback returns the output (q2's collector) to q1's emitter,
so the closed-loop gain is close to 1 + r_feedback/r_emitter.

Nodes: r_top vcc-base, r_bottom base-gnd, c_in src-base, q1 collector-base-emitter,
r_collector vcc-collector (q1's load, q2's base), r_emitter emitter-gnd, q2
collector2-collector-emitter2, r_emitter2 emitter2-gnd, c_emitter2 emitter2-gnd (bypass),
r_collector2 vcc-collector2, r_feedback collector2-emitter, c_out collector2-out, load out-gnd.
Same device for q1 and q2, drawn NPN on a positive rail.
"""

from __future__ import annotations

import math
from typing import Any, Callable, ClassVar

import numpy as np

from optimizer import physics
from optimizer.devices import Device
from optimizer.errors import InputError
from optimizer.synthesis import (
    VBE_HAND,
    HandRequirements,
    coupling_capacitor,
    divider,
    parallel,
)
from optimizer.topologies.base import Bias, Conditions, Parts, StageModel
from optimizer.topologies.divider_ce import add_divider_stage, add_load, divider_ratings

COMPACT_MIN, COMPACT_SHARE = 256, 0.25  # a solve of at least this many elements goes on with those still
# moving alone once they are fewer than this share
PAIR_ITERATIONS = 40  # most damped 2-D Newton steps of the pair's bias (both junctions at once, from 1 mA)
STEP_TOL = 1e-12  # V: a pair whose Newton steps in both Vbe are smaller has converged and is not moved again
STEP_DOWN = 2.0  # V, largest fall of a Vbe in one Newton step (a rise is held to physics.MAX_STEP: from
# above, the residual is concave and Newton does not overshoot, so a falling junction may move fast)
STATIC_ITERATIONS = 20  # most Newton steps of a static transfer's drive (it stops once settled)
CROSSOVER_STEPS = 4  # Newton steps in log frequency refining the loop gain's unity crossing (|T| = 1)
HAND_EMITTER_MAX = 0.3  # the hand method's highest q1 emitter voltage, a share of the supply
VT_HAND = 0.026  # V, the hand method's thermal voltage (room temperature)
SPLIT_CURRENT_SHARE = 0.75  # the split rule's q1 and q2 each at this share of the hand current
SPLIT_BASE_DROP = 0.5  # share of Vbe the split rule lets q1's base current drop across r_bottom
HAND_LOOP_STEPS = 6  # fixed-point steps of the split hand rule's r_feedback for the finite loop gain
NO_CROSSOVER_MARGIN = 180.0  # degrees: a loop gain below 1 at every frequency cannot ring


def solve_pair(
    a1: np.ndarray,
    r_base1: np.ndarray,
    vcc: np.ndarray | float,
    rc1: np.ndarray,
    re: np.ndarray,
    rf: np.ndarray,
    g_c2: np.ndarray,
    j_c2: np.ndarray,
    v_e2_0: np.ndarray | float,
    r_e2: np.ndarray | float,
    *,
    rb: float,
    i_s: float,
    beta: np.ndarray,
    nvt: float,
    inv_vaf: float,
    v_start: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None,
    iterations: int = PAIR_ITERATIONS,
    j_e: np.ndarray | float = 0.0,
) -> dict[str, np.ndarray]:
    """Both junctions of q1 and q2's base-emitter junction, solved together by damped 3-D Newton (V, A, ohm, S).

    The loops: ``a1 = Vbe1 + r_base1*Ib1 + Ve1`` (q1's base Thevenin, RB included in r_base1),
    ``Vc1 = Vbe2 + RB*Ib2 + Ve2`` with ``Vc1 = vcc - rc1*(Ic1 + Ib2)``, ``Ve2 = v_e2_0 + r_e2*Ie2``;
    the emitter node (re to ground, rf to the collector2 node, and ``j_e`` A injected: a branch
    to a held voltage, its conductance inside re) and the collector2 node
    (``g_c2*Vc2 = j_c2 + Ve1/rf - Ic2``: rc2, rf and in the static solve the load, as one
    conductance and current) are linear and are eliminated: ``Ve1 = v0 + k_e*Ie1 - k_c*Ic2``.

    The unknowns are Vbe1, Vbe2 and q1's Vbc (all at the internal base). The Gummel-Poon
    currents (BR = 1, VAR infinite, as :mod:`optimizer.physics`): ``If = IS*(exp(Vbe/NF VT) - 1)``,
    ``Ir = IS*(exp(Vbc/NF VT) - 1)``, ``Ic = (If - Ir)*(1 - Vbc/VAF) - Ir``, ``Ib = If/BF + Ir``. q1's
    reverse current carries it into saturation, where a large swing takes its collector down to
    its emitter (which follows the fed-back output); q2's Vbc is linear in the unknowns, so its
    Early factor is solved exactly at each step and its saturation is left to the caller. The
    Jacobian is exact and Newton converges quadratically. A step may raise a Vbe by at most
    physics.MAX_STEP and lower it by at most STEP_DOWN; q1's Vbc may rise at once to the
    junction's critical voltage (NF VT ln(NF VT/(sqrt 2 IS)), where its current turns steep) and
    by physics.MAX_STEP above it. An element whose steps all fall below STEP_TOL is done and not
    moved again, so its values do not depend on the other elements of its call, and the loop ends
    when every element is done (at most ``iterations`` steps); a large solve goes on with the
    elements still moving alone once they are few (COMPACT_SHARE). ``v_start``: Vbe1, Vbe2, Vbc1
    to start from. Returns per transistor the keys small_signal needs (``q1``, ``q2``: vbe, vcb,
    i_forward, ic, ib), the node voltages v_e1, v_c1, v_e2, v_c2, ``settled`` (the three
    residuals under physics.NEWTON_TOL), ``converged`` (settled, both base-emitter junctions
    conducting) and ``unknowns`` (Vbe1, Vbe2, Vbc1 where the solve ended)."""
    g_e = 1.0 / re + 1.0 / rf - 1.0 / (rf * rf * g_c2)
    k_e = 1.0 / g_e
    k_c = k_e / (rf * g_c2)
    v0 = k_c * j_c2
    if np.any(j_e):
        v0 = v0 + k_e * j_e
    shape = np.broadcast_shapes(*(np.shape(x) for x in (a1, r_base1, vcc, rc1, re, rf, g_c2, j_c2, v_e2_0, r_e2, beta)))
    if v_start is None:
        x1 = np.full(shape, nvt * (math.log(1e-3 / i_s) if np.ndim(i_s) == 0 else np.log(1e-3 / i_s)))
        x2 = x1.copy()
        x3 = np.full(shape, -1.0)  # q1's base-collector junction off
    else:
        x1, x2, x3 = (np.broadcast_to(v, shape).astype(float) for v in v_start)
    inv_b = 1.0 / beta
    # q2's Vcb = c2 + m21*Ie1 - r_e2*Ib2 - Vbe2 - m22*Ic2 (the nodes eliminated)
    m21 = k_e / (rf * g_c2)
    m22 = (k_c / rf + 1.0) / g_c2 + r_e2
    c2 = (j_c2 + v0 / rf) / g_c2 - v_e2_0
    v_critical = nvt * np.log(nvt / (math.sqrt(2.0) * i_s))

    def state(x1: np.ndarray, x2: np.ndarray, x3: np.ndarray) -> tuple:
        """At Vbe1 x1, Vbe2 x2 and Vbc1 x3: the junction currents, q1's Early factor, q2's Vcb
        terms, the collector and base currents, the node voltages and the three residuals (A, V)."""
        f1, f2, fr = i_s * np.expm1(x1 / nvt), i_s * np.expm1(x2 / nvt), i_s * np.expm1(x3 / nvt)
        early1 = 1.0 - x3 * inv_vaf
        ic1 = (f1 - fr) * early1 - fr
        ib1, ib2 = f1 * inv_b + fr, f2 * inv_b
        vcb2_0 = c2 + m21 * (ic1 + ib1) - r_e2 * ib2 - x2
        den2 = 1.0 + f2 * m22 * inv_vaf
        ic2 = f2 * (1.0 + vcb2_0 * inv_vaf) / den2
        v_e1 = v0 + k_e * (ic1 + ib1) - k_c * ic2
        v_c1 = vcc - rc1 * (ic1 + ib2)
        v_e2 = v_e2_0 + r_e2 * (ic2 + ib2)
        v_c2 = (j_c2 + v_e1 / rf - ic2) / g_c2
        residuals = (a1 - x1 - r_base1 * ib1 - v_e1, v_c1 - x2 - rb * ib2 - v_e2, x3 - x1 - v_e1 + v_c1)
        return f1, f2, fr, early1, ic1, ib1, ib2, vcb2_0, den2, ic2, v_e1, v_c1, v_e2, v_c2, residuals

    moving = np.ones(shape, dtype=bool)
    for step in range(iterations):
        f1, f2, fr, early1, ic1, ib1, ib2, vcb2_0, den2, ic2, v_e1, v_c1, v_e2, v_c2, residuals = state(x1, x2, x3)
        g1, g2, gr = (f1 + i_s) / nvt, (f2 + i_s) / nvt, (fr + i_s) / nvt
        # The exact Jacobian. Vbe1 and Vbc1 move q2's current only through Ie1 (its Vcb's m21*Ie1
        # term): per unit of Ie1, Ve1 moves k_ie and Ve2 l_ie
        q2_early = f2 * inv_vaf / den2  # dIc2/dVcb2
        k_ie = k_e - k_c * m21 * q2_early
        l_ie = r_e2 * m21 * q2_early
        dic1_1, dic1_3 = g1 * early1, -gr * (early1 + 1.0) - (f1 - fr) * inv_vaf
        die1_1, die1_3 = dic1_1 + g1 * inv_b, dic1_3 + gr
        dib2_2 = g2 * inv_b
        dic2_2 = g2 * (1.0 + (vcb2_0 - ic2 * m22) * inv_vaf) / den2 - q2_early * (r_e2 * dib2_2 + 1.0)
        dve1_2, dvc1_2 = -k_c * dic2_2, -rc1 * dib2_2
        jacobian = [
            (
                -1.0 - r_base1 * g1 * inv_b - die1_1 * k_ie,
                -rc1 * dic1_1 - die1_1 * l_ie,
                -1.0 - die1_1 * k_ie - rc1 * dic1_1,
            ),
            (-dve1_2, dvc1_2 - 1.0 - rb * dib2_2 - r_e2 * (dic2_2 + dib2_2), dvc1_2 - dve1_2),
            (-r_base1 * gr - die1_3 * k_ie, -rc1 * dic1_3 - die1_3 * l_ie, 1.0 - die1_3 * k_ie - rc1 * dic1_3),
        ]
        steps = _solve3(jacobian, [-r for r in residuals])
        d1, d2, d3 = (
            np.where(moving, np.minimum(np.maximum(d, -STEP_DOWN), up), 0.0)
            for d, up in zip(steps, (physics.MAX_STEP, physics.MAX_STEP, np.maximum(physics.MAX_STEP, v_critical - x3)))
        )
        x1, x2, x3 = x1 + d1, x2 + d2, x3 + d3
        moving &= ~((np.abs(d1) < STEP_TOL) & (np.abs(d2) < STEP_TOL) & (np.abs(d3) < STEP_TOL))
        moving &= np.isfinite(d1) & np.isfinite(d2) & np.isfinite(d3)
        left = np.count_nonzero(moving)
        if not left:
            break
        if moving.size >= COMPACT_MIN and left < COMPACT_SHARE * moving.size and step + 1 < iterations:
            # the elements still moving go on alone (their steps are their own: the same values)
            at = np.flatnonzero(moving)
            rest = solve_pair(
                *(_elements(v, shape, at) for v in (a1, r_base1, vcc, rc1, re, rf, g_c2, j_c2, v_e2_0, r_e2)),
                rb=_elements(rb, shape, at),  # the device's figures too: per element where devices are stacked
                i_s=_elements(i_s, shape, at),
                beta=_elements(beta, shape, at),
                nvt=_elements(nvt, shape, at),
                inv_vaf=_elements(inv_vaf, shape, at),
                v_start=(x1.reshape(-1)[at], x2.reshape(-1)[at], x3.reshape(-1)[at]),
                iterations=iterations - step - 1,
                j_e=_elements(j_e, shape, at),
            )
            for x, y in zip((x1, x2, x3), rest["unknowns"]):
                x.reshape(-1)[at] = y
            break
    f1, f2, _, _, ic1, ib1, ib2, _, _, ic2, v_e1, v_c1, v_e2, v_c2, residuals = state(x1, x2, x3)
    settled = np.isfinite(f1) & np.isfinite(f2)
    for r in residuals:
        settled &= np.abs(r) < physics.NEWTON_TOL
    return {
        "q1": {"vbe": x1, "vcb": v_c1 - v_e1 - x1, "i_forward": f1, "ic": ic1, "ib": ib1},
        "q2": {"vbe": x2, "vcb": v_c2 - v_e2 - x2, "i_forward": f2, "ic": ic2, "ib": ib2},
        "v_e1": v_e1,
        "v_c1": v_c1,
        "v_e2": v_e2,
        "v_c2": v_c2,
        "settled": settled,
        "converged": settled & (f1 > 0) & (f2 > 0),
        "unknowns": (x1, x2, x3),
    }


def _elements(v: Any, shape: tuple[int, ...], at: np.ndarray) -> Any:
    """The elements at flat indices ``at`` of ``v`` broadcast to ``shape`` (a scalar as it is)."""
    return np.broadcast_to(v, shape).reshape(-1)[at] if np.ndim(v) else v


def _solve3(columns: list[tuple], y: list[np.ndarray]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """x of the 3x3 system M x = y, M given by its ``columns`` (each a tuple of three rows), by Cramer's rule."""
    (a, d, g), (b, e, h), (c, f, k) = columns
    co0, co1, co2 = e * k - f * h, f * g - d * k, d * h - e * g
    det = a * co0 + b * co1 + c * co2
    y0, y1, y2 = y
    return (
        (y0 * co0 + b * (f * y2 - y1 * k) + c * (y1 * h - e * y2)) / det,
        (a * (y1 * k - f * y2) + y0 * co1 + c * (d * y2 - y1 * g)) / det,
        (a * (e * y2 - y1 * h) + b * (y1 * g - d * y2) + y0 * co2) / det,
    )


def loop_phase_margin(
    t0: np.ndarray,
    r1: np.ndarray,
    c1: np.ndarray,
    r2: np.ndarray,
    c2: np.ndarray,
    c_mu: np.ndarray,
    gm: np.ndarray,
    f3: np.ndarray,
) -> np.ndarray:
    """Phase margin (degrees) of T(s) = t0*(1 - s*c_mu/gm) / ((1 + s*b1 + s^2*b2)*(1 + s/(2 pi f3))).

    The two dominant poles are those of q2's common-emitter stage with c_mu bridging its input
    node (r1 ohm, c1 F) and output node (r2, c2): b1 = r1(c1+c_mu) + r2(c2+c_mu) + gm r1 r2 c_mu,
    b2 = r1 r2 (c1 c2 + c_mu (c1 + c2)) (pole splitting, with c_mu's right-half-plane zero at
    gm/c_mu); f3 (Hz) is the next pole (q1's emitter node), counted in phase. The unity crossing
    of the two-pole part is a quadratic in w^2; Newton steps in log w then add the third pole.
    """
    b1 = r1 * (c1 + c_mu) + r2 * (c2 + c_mu) + gm * r1 * r2 * c_mu
    b2 = r1 * r2 * (c1 * c2 + c_mu * (c1 + c2))
    tz = c_mu / gm
    # |T|^2 = 1 without the third pole: b2^2 u^2 + (b1^2 - 2 b2 - t0^2 tz^2) u + 1 - t0^2 = 0, u = w^2
    qb = b1 * b1 - 2.0 * b2 - t0 * t0 * tz * tz
    qc = 1.0 - t0 * t0
    u = (-qb + np.sqrt(np.maximum(qb * qb - 4.0 * b2 * b2 * qc, 0.0))) / (2.0 * b2 * b2)
    w = np.sqrt(np.maximum(u, 1e-30))
    w3 = 2.0 * np.pi * f3

    def log_mag(w: np.ndarray) -> np.ndarray:
        num = t0 * t0 * (1.0 + (w * tz) ** 2)
        den = ((1.0 - w * w * b2) ** 2 + (w * b1) ** 2) * (1.0 + (w / w3) ** 2)
        return 0.5 * np.log(num / den)

    for _ in range(CROSSOVER_STEPS):  # d ln|T| / d ln w by a small central difference
        slope = (log_mag(w * 1.01) - log_mag(w / 1.01)) / (2.0 * math.log(1.01))
        w = w * np.exp(-log_mag(w) / np.where(slope < -1e-3, slope, -1e-3))
    lag = np.arctan2(w * b1, 1.0 - w * w * b2) + np.arctan(w * tz) + np.arctan(w / w3)
    margin = 180.0 - np.degrees(lag)
    return np.where(t0 > 1.0, margin, NO_CROSSOVER_MARGIN)


def _hand_pair(
    req: HandRequirements, v_e1: float, v_c1: float, ic1: float, finite_loop: bool = False
) -> dict[str, float]:
    """The hand method's pair below q1's base (ohm, F), NPN on a positive rail of req.supply V:
    q2 at the hand current and q1 at ``ic1`` A, q1's emitter at ``v_e1`` V and its collector
    at ``v_c1`` V, q2's collector midway between its emitter (plus Vce_sat) and the rail,
    r_emitter carrying q1's emitter current and the feedback current, r_feedback =
    (gain - 1)*r_emitter. ``finite_loop``: r_feedback raised for the loop gain's shortfall,
    A = (1 + r_feedback/r_emitter)*T/(1 + T) with the hand loop gain T = gm2*(r_collector2 ||
    load)*(r_collector || r_pi2)/r_feedback (q1's emitter taken as a virtual ground; the
    asymptotic-gain relation). InputError when r_feedback's current would exceed q1's emitter
    current (the gain too low for where the emitter sits), or the loop too weak for the gain."""
    ic2 = req.collector_current
    vcc, gain = req.supply, max(req.gain, 1.5)
    v_e2 = v_c1 - VBE_HAND
    v_c2 = 0.5 * (vcc + v_e2 + req.vce_sat)
    gm2 = ic2 / VT_HAND
    ratio = gain - 1.0  # r_feedback / r_emitter
    for _ in range(HAND_LOOP_STEPS if finite_loop else 1):
        r_emitter = (v_e1 - (v_c2 - v_e1) / ratio) / ic1
        if not r_emitter > 0 or not v_c2 > v_e1 or not ratio > 0:
            raise InputError.single(
                "gain.target",
                req.gain,
                f"a gain the hand method can bias on {vcc:g} V (r_feedback's current would exceed q1's "
                "emitter current, or the loop gain falls short of it)",
                title="hand method has no solution",
            )
        r_feedback = ratio * r_emitter
        i_feedback = (v_c2 - v_e1) / r_feedback
        r_collector = (vcc - v_c1) / (ic1 + ic2 / req.hfe)
        r_collector2 = (vcc - v_c2) / (ic2 + i_feedback)
        k = gm2 * parallel(r_collector2, req.load_impedance) * parallel(r_collector, req.hfe / gm2)
        ratio = (gain - 1.0) / (1.0 - gain * r_emitter / k)  # T = k/r_feedback in the relation above
    r_emitter2 = v_e2 / ic2
    r_bypass = parallel(r_emitter2, VT_HAND / ic2 + r_collector / req.hfe)
    return {
        "r_collector": r_collector,
        "r_emitter": r_emitter,
        "r_emitter2": r_emitter2,
        "r_collector2": r_collector2,
        "r_feedback": r_feedback,
        "c_emitter2": coupling_capacitor(r_bypass, req.f_low),
        "c_out": coupling_capacitor(parallel(r_collector2, r_feedback) + req.load_impedance, req.f_low),
    }


class FeedbackPair(StageModel):
    name = "feedback_pair"
    inverting = False
    polarities = ("npn", "pnp")
    # on a split supply q1's base is ground-referenced (r_top left out), its emitter near -Vbe
    supplies = ("positive", "negative", "split")
    device_kind = "bjt"
    description = "series-shunt feedback pair: two direct-coupled common emitters, gain 1 + r_feedback/r_emitter"
    order = 50
    # (annotated as the base declares them: feedback_pair_ac extends them)
    resistors: ClassVar[tuple[str, ...]] = (
        "r_top",
        "r_bottom",
        "r_collector",
        "r_emitter",
        "r_emitter2",
        "r_collector2",
        "r_feedback",
    )
    capacitors: ClassVar[tuple[str, ...]] = ("c_in", "c_emitter2", "c_out")
    transistors = 2
    elements: ClassVar[tuple[tuple[str, str, str], ...]] = (
        ("c_in", "src", "base"),
        ("r_top", "vcc", "base"),
        ("r_bottom", "base", "0"),
        ("r_collector", "vcc", "collector"),
        ("r_emitter", "emitter", "0"),
        ("r_emitter2", "emitter2", "0"),
        ("c_emitter2", "emitter2", "0"),
        ("r_collector2", "vcc", "collector2"),
        ("r_feedback", "collector2", "emitter"),
        ("c_out", "collector2", "out"),
    )
    transistor_pins = (("q1", "collector", "base", "emitter"), ("q2", "collector2", "collector", "emitter2"))
    node_voltages = {
        "base": "v_base",
        "collector": "v_collector",
        "emitter": "v_emitter",
        "emitter2": "v_emitter2",
        "collector2": "v_collector2",
    }
    vce_keys = ("vce", "vce2")
    gain_bound_roles: ClassVar[tuple[str, ...]] = ("r_feedback", "r_emitter")
    corner_steps = 8  # a small phase margin peaks the response inside f_high's bracket

    def gain_bound(self, resistors: dict[str, np.ndarray], load: float) -> np.ndarray:
        # closed loop A = A_ideal*T/(1+T) seen through the input divider: never above 1 + Rf/Re
        return 1.0 + resistors["r_feedback"] / resistors["r_emitter"]

    def hand_design(self, req: HandRequirements) -> dict[str, float]:
        """Textbook pair: q2 at the hand current, q1 at half of it; q1's emitter at a tenth of
        the supply (raised until r_emitter carries at least three times the feedback current),
        q1 given max(1 V, a fifth of the supply) of Vce, q2's collector midway between its
        emitter (plus Vce_sat) and the rail; r_feedback = (gain - 1)*r_emitter. InputError when
        the emitter would have to sit above 30 % of the supply (a gain too low for the rail)."""
        vcc, gain = req.supply, max(req.gain, 1.5)
        vce1 = max(1.0, 0.2 * vcc)
        v_e1 = 0.1 * vcc
        for _ in range(3):  # q1's collector kept from the step before the emitter's last move
            v_c1 = v_e1 + vce1
            v_c2 = 0.5 * (vcc + v_c1 - VBE_HAND + req.vce_sat)
            v_e1 = min(max(0.1 * vcc, 3.0 * (v_c2 - v_e1) / (gain - 1.0)), HAND_EMITTER_MAX * vcc)
        parts = _hand_pair(req, v_e1, v_c1, 0.5 * req.collector_current)
        first = HandRequirements(**{**req.__dict__, "collector_current": 0.5 * req.collector_current})
        r_top, r_bottom = divider(first, v_e1 + VBE_HAND)
        z_in = parallel(parallel(r_top, r_bottom), req.hfe * parts["r_emitter"])
        return {
            "r_top": r_top,
            "r_bottom": r_bottom,
            **parts,
            "c_in": coupling_capacitor(z_in + req.source_impedance, req.f_low),
        }

    def split_hand_design(self, req: HandRequirements, ground: float) -> dict[str, float]:
        """The pair on a split supply (span req.supply, ground ``ground`` of it above the
        emitter-side rail): q1's base at ground through r_bottom alone, its base current dropping
        half of Vbe there (no DC reaches the source through c_in; the hFE spread moves q1's
        current by a few percent), so q1's emitter sits near -Vbe and r_emitter returns it to the
        emitter-side rail. r_emitter then drops most of that rail, so r_emitter and r_feedback
        come out large and the loop gain small; the rule wins it back where it can: q1 runs at
        q2's current, both at SPLIT_CURRENT_SHARE of the hand current (the pair's total stays
        where the positive rule has it), q1 gets only max(1 V, a tenth of the span above its
        emitter) of Vce (a larger r_collector), and r_feedback is raised for the loop gain's
        shortfall (:func:`_hand_pair`'s finite_loop); q2 as :meth:`hand_design`."""
        ic = SPLIT_CURRENT_SHARE * req.collector_current
        ib1 = ic / req.hfe
        r_bottom = SPLIT_BASE_DROP * VBE_HAND / ib1
        v_e1 = ground * req.supply - VBE_HAND - ib1 * r_bottom
        pair_req = HandRequirements(**{**req.__dict__, "collector_current": ic})
        parts = _hand_pair(pair_req, v_e1, v_e1 + max(1.0, 0.1 * (req.supply - v_e1)), ic, finite_loop=True)
        z_in = parallel(r_bottom, req.hfe * parts["r_emitter"])
        return {"r_bottom": r_bottom, **parts, "c_in": coupling_capacitor(z_in + req.source_impedance, req.f_low)}

    def _re_dc(self, p: Parts) -> np.ndarray:
        """Resistance (ohm) from q1's emitter to the rail at DC."""
        return p["r_emitter"]

    def _re_ac(self, p: Parts) -> np.ndarray:
        """The feedback network's shunt leg at mid-band (ohm): q1's emitter to AC ground."""
        return p["r_emitter"]

    def _emitter_leg(self, net: physics.Network, p: Parts, ac: bool) -> None:
        """q1's emitter to AC ground in the nodal network."""
        net.resistor("emitter", None, p["r_emitter"])

    def _emitter_hold(self, p: Parts, op: dict[str, np.ndarray]) -> tuple[np.ndarray, np.ndarray | float]:
        """q1's emitter node to ground in the quasi-static transfer, its capacitors holding their
        DC: the resistance (ohm) and the current it injects (A, a branch to a held voltage)."""
        return p["r_emitter"], 0.0

    def _nodes(self) -> tuple[str, ...]:
        """The nodal network's nodes."""
        return ("in", "base", "bint", "emitter", "collector", "bint2", "emitter2", "collector2", "out")

    def _bias(self, p: Parts, device: Device, c: Conditions, beta: np.ndarray, nvt: float, i_s: float) -> Bias:
        rt, rb_, rc1, re, rf = p["r_top"], p["r_bottom"], p["r_collector"], self._re_dc(p), p["r_feedback"]
        rc2, re2 = p["r_collector2"], p["r_emitter2"]
        vcc = c.supply
        vth, rth = vcc * rb_ / (rt + rb_), rt * rb_ / (rt + rb_)
        q = solve_pair(
            vth,
            rth + device.RB,
            vcc,
            rc1,
            re,
            rf,
            1.0 / rc2 + 1.0 / rf,
            vcc / rc2,
            0.0,
            re2,
            rb=device.RB,
            i_s=i_s,
            beta=beta,
            nvt=nvt,
            inv_vaf=device.inv_vaf,
        )
        q1, q2 = q["q1"], q["q2"]
        v_e1, v_c1, v_e2, v_c2 = q["v_e1"], q["v_c1"], q["v_e2"], q["v_c2"]
        v_base = v_e1 + q1["vbe"] + device.RB * q1["ib"]
        vce, vce2 = v_c1 - v_e1, v_c2 - v_e2
        i_div = (vcc - v_base) / rt
        active = physics.is_active(vce, q1["ic"], device.vce_sat, q["converged"]) & physics.is_active(
            vce2, q2["ic"], device.vce_sat, q["converged"]
        )
        i_rc2 = (vcc - v_c2) / rc2
        op = {
            "v_base": v_base,
            "v_collector": v_c1,
            "v_emitter": v_e1,
            "v_emitter2": v_e2,
            "v_collector2": v_c2,
            "ic": q1["ic"],
            "ib": q1["ib"],
            "ic2": q2["ic"],
            "ib2": q2["ib"],
            "i_divider": i_div,
            "i_feedback": (v_c2 - v_e1) / rf,
            "vce": vce,
            "vce2": vce2,
            "vbe": q1["vbe"],
            "vbe2": q2["vbe"],
            "active": active,
            "supply_current": i_div + (vcc - v_c1) / rc1 + i_rc2,
            "q_power": np.maximum(vce * q1["ic"], vce2 * q2["ic"]),
        }
        return Bias(
            op, [physics.small_signal(q1, device, beta, nvt, i_s), physics.small_signal(q2, device, beta, nvt, i_s)]
        )

    def _output_q(self, op: dict[str, np.ndarray]) -> np.ndarray:
        return op["v_collector2"]

    def _midband(self, p: Parts, c: Conditions, b: Bias, r_source: np.ndarray) -> dict[str, np.ndarray]:
        ss = b.small_signal
        one = np.ones_like(r_source)
        drive = self._network(p, c, ss, False, r_source, True)
        v = drive.solve({"in": 1.0 / r_source})
        hd2 = []
        for k, (bint, coll, emit) in enumerate((("bint", "collector", "emitter"), ("bint2", "collector2", "emitter2"))):
            hd2.append(self._hd2_term(ss[k], drive, v, bint, coll, emit))
        return {
            "gain": v["out"],
            "input_impedance": self._network(p, c, ss, False, None, True).solve({"in": one}, ["in"])["in"],
            "output_impedance": self._network(p, c, ss, False, r_source, False).solve({"out": one}, ["out"])["out"],
            "hd2_terms": hd2,
        }

    @staticmethod
    def _hd2_term(
        ss: dict[str, np.ndarray], drive: physics.Network, v: dict[str, np.ndarray], bint: str, coll: str, emit: str
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """One transistor's second harmonic at the load per volt of output amplitude, as the
        (v_x, suppression, Early u, sign) term :func:`physics.thd_small_signal` reads (u = 0: the
        Early effect is inside the suppression).

        Second-order perturbation of the Gummel-Poon junction: with x = vb'e and y = vcb per volt
        at the load, If's second harmonic gbe*x^2/(4 NF VT) flows in the collector (times the Early
        factor, gm + go) and in the base (gpi), and the Early product If*Vcb/VAF adds
        gbe*x*y/(2 VAF) = go*x*y/(2 NF VT) in the collector; each reaches the load through the
        closed loop's transimpedance from that branch. q2's base is fed from a high impedance, so
        its base share and the Early product both matter (they halve its distortion)."""
        one = np.ones_like(ss["gm"])
        nvt = ss["ib"] / ss["gpi"]  # NF*VT: ib = If/BF, gpi = (If + IS)/(NF VT BF)
        x = (v[bint] - v[emit]) / v["out"]
        y = (v[coll] - v[bint]) / v["out"]
        z = drive.solve({coll: -one, emit: one}, ["out"])["out"]
        z_b = drive.solve({bint: -one, emit: one}, ["out"])["out"]
        h = np.real(
            x * x / (4.0 * nvt) * ((ss["gm"] + ss["go"]) * z + ss["gpi"] * z_b) + x * y * ss["go"] / (2.0 * nvt) * z
        )
        return np.abs(x), 4.0 * nvt * np.abs(h) / np.abs(x), np.zeros_like(h), np.sign(h)

    def loop_gain(self, p: Parts, c: Conditions, ss: list[dict[str, np.ndarray]], r_source: np.ndarray) -> np.ndarray:
        """Mid-band loop gain T (V/V): the return ratio of q2's gm (its source replaced by a unit
        current, T = -gm2 * the control voltage that current produces), source and load in place."""
        ss2 = {**ss[1], "gm": np.zeros_like(ss[1]["gm"])}
        net = self._network(p, c, [ss[0], ss2], False, r_source, True)
        one = np.ones_like(r_source)
        v = net.solve({"collector2": -one, "emitter2": one}, ["bint2", "emitter2"])
        return -ss[1]["gm"] * (v["bint2"] - v["emitter2"])

    def _loop_metrics(self, p: Parts, c: Conditions, b: Bias, r_source: np.ndarray) -> dict[str, np.ndarray]:
        """loop_gain (V/V, mid-band) and phase_margin_deg (degrees) from the two dominant poles."""
        ss1, ss2 = b.small_signal
        t0 = self.loop_gain(p, c, b.small_signal, r_source)
        r_base_src = physics.parallel(r_source, p["r_top"], p["r_bottom"]) + ss1["rb"]
        # q1 as seen by the loop (driven at its emitter, base at AC ground through the source and
        # divider): its emitter resistance and its collector's output resistance
        r_into_e1 = (r_base_src + 1.0 / ss1["gpi"]) / (1.0 + ss1["gm"] / ss1["gpi"])
        r_e1 = physics.parallel(self._re_ac(p), r_into_e1)
        # input node of q2: its intrinsic base, fed by r_collector (q1's collector) through RB
        r1 = physics.parallel(p["r_collector"] + ss2["rb"], 1.0 / ss2["gpi"])
        c1 = ss2["cpi"] + ss1["cmu"] * p["r_collector"] / (p["r_collector"] + ss2["rb"])
        load = np.full_like(t0, c.load_impedance)
        r2 = physics.parallel(p["r_collector2"], load, p["r_feedback"] + r_e1, 1.0 / ss2["go"])
        c2 = np.full_like(t0, c.load_capacitance)
        f3 = 1.0 / (2.0 * np.pi * r_e1 * ss1["cpi"])
        return {"loop_gain": t0, "phase_margin_deg": loop_phase_margin(t0, r1, c1, r2, c2, ss2["cmu"], ss2["gm"], f3)}

    def _swing(
        self, p: Parts, device: Device, c: Conditions, b: Bias, mid: dict[str, np.ndarray]
    ) -> tuple[np.ndarray, np.ndarray]:
        op = b.op
        load = np.full_like(op["ic2"], c.load_impedance)
        r_ac = physics.parallel(p["r_collector2"], load, p["r_feedback"] + self._re_ac(p))
        cut, sat = physics.load_line_limits(op["ic2"], op["vce2"], device.vce_sat, r_ac, np.zeros_like(r_ac))
        vce_max = np.maximum(
            op["vce"] + np.abs(op["v_emitter"]), np.minimum(c.supply, op["v_collector2"] + cut) - op["v_emitter2"]
        )
        return 2.0 * np.minimum(cut, sat), vce_max

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
        net, rail = self._new_network(self._nodes(), p, c, ac, supply)
        add_divider_stage(net, p, ss, ac, r_source, rail)
        self._emitter_leg(net, p, ac)
        net.resistor("collector", "bint2", ss[1]["rb"])
        net.transistor("bint2", "collector2", "emitter2", ss[1], ac)
        net.resistor("emitter2", None, p["r_emitter2"])
        net.capacitor("emitter2", None, p["c_emitter2"], ac, True)
        net.resistor("collector2", rail, p["r_collector2"])
        net.resistor("collector2", "emitter", p["r_feedback"])
        net.capacitor("collector2", "out", p["c_out"], ac, True)
        add_load(net, c, ac, load)
        return net

    def _ratings(self, p: Parts, c: Conditions, b: Bias) -> dict[str, np.ndarray]:
        op = b.op
        vcc = op["v_supply_local"]
        rail = np.full_like(op["ic"], c.rail_max)
        # at power-up with q1 off, r_collector lifts q2's base (and emitter2) towards the rail
        return {
            **divider_ratings(p, c, op),
            "p_r_emitter": op["v_emitter"] ** 2 / p["r_emitter"],
            "p_r_emitter2": op["v_emitter2"] ** 2 / p["r_emitter2"],
            "p_r_collector2": (vcc - op["v_collector2"]) ** 2 / p["r_collector2"],
            "p_r_feedback": (op["v_collector2"] - op["v_emitter"]) ** 2 / p["r_feedback"],
            "v_c_emitter2": rail,
            "v_c_out": np.full_like(op["ic"], c.ground_rail_max),
        }

    def static_output(
        self, p: Parts, device: Device, c: Conditions, b: Bias, nvt: float, i_s: float, beta: np.ndarray
    ) -> Callable[[np.ndarray], np.ndarray]:
        """Load voltage (V) against source voltage (V): the pair's two loops solved together at
        every sample; c_in, c_emitter2 and c_out hold their DC (emitter2 held, the load returns
        to collector2's quiescent voltage); collector2 flattens at emitter2 + vce_sat. q1 saturates
        through its base-collector junction (:func:`solve_pair`): its emitter follows the fed-back
        output, so a large swing takes its collector down to its emitter, the loop breaks and the
        output folds back. A drive's solve starts from the last call's solution at the nearest
        drive of its candidate (a warm start: the swing's later drives lie between solved ones) and
        stops once settled; NaN where it did not settle within STATIC_ITERATIONS steps."""
        op = b.op
        rth = physics.parallel(p["r_top"], p["r_bottom"])
        vth = c.supply * p["r_bottom"] / (p["r_top"] + p["r_bottom"])
        rs = max(c.source_impedance, physics.R_FLOOR)
        rc2, rf = p["r_collector2"], p["r_feedback"]
        g_c2 = 1.0 / rc2 + 1.0 / rf + 1.0 / c.load_impedance
        j_c2 = c.supply / rc2 + op["v_collector2"] / c.load_impedance
        kw = {"rb": device.RB, "i_s": i_s, "beta": beta, "nvt": nvt, "inv_vaf": device.inv_vaf}
        re, j_e = self._emitter_hold(p, op)
        quiescent = (op["vbe"], op["vbe2"], op["v_emitter"] + op["vbe"] - op["v_collector"])
        last: list[np.ndarray] = []  # the last call's drives and unknowns (V), where the next call starts

        def start(vs: np.ndarray) -> tuple[np.ndarray, ...]:
            """Where the solve of each drive starts: the unknowns of the last call's nearest drive of
            the same candidate, where that drive is nearer than the quiescent point's zero (the
            usable swing's steps fall inside brackets whose ends were solved), else the quiescent point."""
            if not last or last[0].shape[0] != vs.shape[0]:
                return quiescent
            before, *unknowns = last
            gap = np.abs(vs[:, :, None] - before[:, None, :])
            nearest = np.argmin(gap, axis=2)
            near = np.take_along_axis(gap, nearest[:, :, None], axis=2)[:, :, 0] < np.abs(vs)
            picked = (np.take_along_axis(u, nearest, axis=1) for u in unknowns)
            return tuple(np.where(near & np.isfinite(u), u, q) for u, q in zip(picked, quiescent))

        def out(vs: np.ndarray) -> np.ndarray:
            a = (vth * rs + (vs + op["v_base"]) * rth) / (rs + rth)
            q = solve_pair(
                a,
                physics.parallel(rth, rs) + device.RB,
                c.supply,
                p["r_collector"],
                re,
                rf,
                g_c2,
                j_c2,
                op["v_emitter2"],
                0.0,
                v_start=start(vs),
                iterations=STATIC_ITERATIONS,
                j_e=j_e,
                **kw,
            )
            shape = np.broadcast_shapes(np.shape(vs), np.shape(q["v_c2"]))
            last[:] = [np.broadcast_to(vs, shape), *(np.broadcast_to(u, shape) for u in q["unknowns"])]
            v_c2 = np.maximum(q["v_c2"], op["v_emitter2"] + device.vce_sat)
            # no output (NaN: the swing counts it as deviating) where the solve did not settle
            return np.where(q["settled"], v_c2 - op["v_collector2"], np.nan)

        out.warm_start = last  # type: ignore[attr-defined]  # a subset's transfer takes its rows (Topology._usable_swing)
        return out
