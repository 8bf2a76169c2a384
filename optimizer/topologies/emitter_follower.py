"""emitter_follower: divider-biased emitter follower (common collector), gain just under +1.

Nodes: r_top vcc-base, r_bottom base-gnd, r_follower emitter-gnd, c_in source-base, c_out
emitter-out, load out-gnd; q1's collector on the rail (vcc). Drawn NPN on a positive rail.

The linear network around q1 is taken as a two-port between its base and emitter terminals
(:func:`two_port`): the open-circuit voltages V1, V2 and the impedances z11, z12, z22. One
base-loop Newton then solves the bias (capacitors open), and the same loop solves the static
transfer (capacitors holding their DC), so the bootstrapped stage (bootstrap_follower, whose
bias network couples base and emitter) reuses the whole flow with its own two-port.
"""

from __future__ import annotations

import math
from typing import Callable

import numpy as np

from optimizer import physics
from optimizer.devices import Device, device_columns
from optimizer.synthesis import VBE_HAND, HandRequirements, coupling_capacitor, divider, parallel
from optimizer.topologies.base import (
    Bias,
    Conditions,
    Parts,
    StageModel,
    _source_resistance,
    couple_input,
    input_hold,
    input_reactance,
)
from optimizer.topologies.divider_ce import add_load

Ports = tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]  # y11, y12, y22, j1, j2


def two_port(
    y11: np.ndarray, y12: np.ndarray, y22: np.ndarray, j1: np.ndarray, j2: np.ndarray
) -> tuple[np.ndarray, ...]:
    """Open-circuit voltages V1, V2 (V) and impedances z11, z12, z22 (ohm) of a linear network
    given by its nodal admittances y (S, symmetric) and injected currents j (A) at the base (1)
    and the emitter (2) terminals: V = Z j with Z = Y^-1."""
    det = y11 * y22 - y12 * y12
    z11, z12, z22 = y22 / det, -y12 / det, y11 / det
    return z11 * j1 + z12 * j2, z12 * j1 + z22 * j2, z11, z12, z22


def follower_loop(
    ports: tuple[np.ndarray, ...],
    device: Device,
    vcc: np.ndarray | float,
    beta: np.ndarray,
    nvt: float,
    i_s: float,
    **kw: object,
) -> dict[str, np.ndarray]:
    """q1 (collector on the rail ``vcc``, V) in the two-port (V1, V2, z11, z12, z22) of
    :func:`two_port`: base current ib out of terminal 1, emitter current ie into terminal 2,
    vB = V1 - z11*ib + z12*ie, vE = V2 - z12*ib + z22*ie. Returns :func:`physics.solve_junction`'s
    result plus v_base and v_emitter (V)."""
    v1, v2, z11, z12, z22 = ports
    q = physics.solve_junction(
        v1 - v2,
        z11 - z12 + device.RB,
        z22 - z12,
        i_s=i_s,
        beta=beta,
        nvt=nvt,
        inv_vaf=device.inv_vaf,
        vcb0=vcc - v2,
        vcb_ic=z22,
        vcb_ib=z22 - z12,
        vcb_vbe=1.0,
        **kw,
    )
    ie = q["ic"] + q["ib"]
    q["v_base"] = v1 - z11 * q["ib"] + z12 * ie
    q["v_emitter"] = v2 - z12 * q["ib"] + z22 * ie
    return q


def follower_midband(
    ss: dict[str, np.ndarray],
    s: complex,
    z_source: np.ndarray,
    g_shunt: np.ndarray,
    g_bootstrap: np.ndarray,
    g_mid: np.ndarray,
    y_c: np.ndarray | complex,
    g_emitter: np.ndarray,
    g_load: np.ndarray,
) -> dict[str, np.ndarray]:
    """Closed-form small-signal follower at complex frequency s (rad/s), exact for the
    network of the model (hybrid-pi with rb, Cpi, Cmu).

    The base node B has g_shunt (S) to AC ground and g_bootstrap to a node M; M has g_mid to
    AC ground and y_c (S, the bootstrap capacitor's admittance, 0 without one) to the emitter
    E; E has g_emitter (S, without the load) and g_load to ground; q1's collector is at AC
    ground (its go joins g_emitter); the source z_source (ohm, complex: with c_in's reactance)
    drives B. Returns ``a`` (V/V, emitter over base), gain (source to emitter), z_in (ohm, into B),
    z_out (ohm, into E, the source in place, the load removed) and vx_per_out (V/V, q1's
    intrinsic b'e signal per volt at the emitter).
    """
    gm, rb = ss["gm"], ss["rb"]
    y_pi, y_mu = ss["gpi"] + s * ss["cpi"], s * ss["cmu"]
    d_b = 1.0 + rb * (y_pi + y_mu)  # q1 seen through rb: the internal base eliminated
    g_p = y_pi / d_b  # base current per volt of vB - vE (Cmu's share is a shunt at B)
    y_t = (y_pi + gm) / d_b  # emitter current per volt of vB - vE
    g_shunt = g_shunt + y_mu / d_b
    g_e = g_emitter + ss["go"] + y_t * rb * y_mu  # the emitter current lost through Cmu
    d = g_bootstrap + g_mid + y_c
    a_m, c_m = g_bootstrap / d, y_c / d  # vM = a_m*vB + c_m*vE
    a = (y_t + y_c * a_m) / (y_t + y_c * (1.0 - c_m) + g_e + g_load)
    z_in = 1.0 / (g_p * (1.0 - a) + g_bootstrap * (1.0 - a_m - c_m * a) + g_shunt)
    k = (g_p + g_bootstrap * c_m) / (g_p + g_bootstrap * (1.0 - a_m) + g_shunt + 1.0 / z_source)  # vB/vE
    y_out = g_e + y_t * (1.0 - k) + y_c * (1.0 - a_m * k - c_m)
    return {
        "a": a,
        "gain": a * z_in / (z_in + z_source),
        "z_in": z_in,
        "z_out": 1.0 / y_out,
        "vx_per_out": ((1.0 - a) / a - rb * y_mu) / d_b,
    }


def add_follower(
    net: physics.Network,
    p: Parts,
    c: Conditions,
    ss: dict[str, np.ndarray],
    ac: bool,
    load: bool,
    rail: str | None,
    nodes: tuple[str, str, str],
) -> None:
    """A follower transistor (small signal ``ss``) from its base node through rb to its
    internal base, collector on ``rail`` (None = AC ground), r_follower from its emitter to
    ground, c_out to 'out' and the load; ``nodes`` = (base, internal base, emitter)."""
    base, bint, emitter = nodes
    net.resistor(base, bint, ss["rb"])
    net.transistor(bint, rail, emitter, ss, ac)
    net.resistor(emitter, None, p["r_follower"])
    net.capacitor(emitter, "out", p["c_out"], ac, True)
    add_load(net, c, ac, load)


def real_signed(h: np.ndarray) -> np.ndarray:
    """|h| with the sign of its real part (a mid-band gain as the other stages give it)."""
    return np.copysign(np.abs(h), np.real(h))


class EmitterFollower(StageModel):
    name = "emitter_follower"
    inverting = False
    polarities = ("npn", "pnp")
    supplies = (
        "positive",
        "negative",
        "split",
    )  # drawn NPN on a positive rail; the polarity layer mirrors or shifts it
    direct_input = True  # on a split supply the base sits at ground: a DC source may drive it directly
    device_kind = "bjt"
    description = "divider-biased emitter follower: gain just under +1, low output impedance"
    order = 50
    resistors = ("r_top", "r_bottom", "r_follower")
    capacitors = ("c_in", "c_out")
    transistors = 1
    elements = (
        ("c_in", "src", "base"),
        ("r_top", "vcc", "base"),
        ("r_bottom", "base", "0"),
        ("r_follower", "emitter", "0"),
        ("c_out", "emitter", "out"),
    )
    transistor_pins = (("q1", "vcc", "base", "emitter"),)
    node_voltages = {"base": "v_base", "emitter": "v_emitter"}
    gain_bound_roles = ("r_follower",)
    core_is_bound = False  # the mid-band figures see c_in (and a bootstrap's c_bootstrap) at the band's centre

    def gain_bound(self, resistors: dict[str, np.ndarray], load: float) -> np.ndarray:
        # the emitter follows the base less a forward-biased junction: |gain| < 1 whatever the parts
        return np.ones_like(resistors["r_follower"])

    def hand_design(self, req: HandRequirements) -> dict[str, float]:
        return follower_hand_design(req)

    # ---- the stage's two-port and mid-band admittances (bootstrap_follower overrides) ---------
    def _dc_ports(self, p: Parts, c: Conditions) -> Ports:
        """The bias network around q1 (capacitors open) as (y11, y12, y22, j1, j2)."""
        g_t, g_b = 1.0 / p["r_top"], 1.0 / p["r_bottom"]
        zero = 0.0 * g_t
        return g_t + g_b, zero, 1.0 / p["r_follower"] + zero, g_t * c.supply, zero

    def _held_ports(self, p: Parts, c: Conditions, op: dict[str, np.ndarray], vs: np.ndarray) -> Ports:
        """The network around q1 with the capacitors holding their DC, driven by the source EMF
        vs (V, change from quiescent): c_in holds the base's DC (none: the source is wired to the
        base, its DC the ground's), c_out the emitter's."""
        g_s = 1.0 / max(c.source_impedance, physics.R_FLOOR)
        g_t, g_b = 1.0 / p["r_top"], 1.0 / p["r_bottom"]
        g_l = 1.0 / c.load_impedance
        return (
            g_t + g_b + g_s,
            0.0 * g_t,
            1.0 / p["r_follower"] + g_l,
            g_t * c.supply + g_s * (vs + input_hold(p, c, op)),
            g_l * op["v_emitter"] + 0.0 * vs,
        )

    def _mid_admittances(self, p: Parts, c: Conditions) -> tuple:
        """g_shunt, g_bootstrap, g_mid, y_c, g_emitter (S) of :func:`follower_midband` at the
        band's geometric mean."""
        zero = 0.0 * p["r_top"]
        return 1.0 / p["r_top"] + 1.0 / p["r_bottom"], zero, zero + 1.0, 0.0, 1.0 / p["r_follower"]

    def _divider_op(self, p: Parts, v_base: np.ndarray, ib: np.ndarray, vcc: np.ndarray | float) -> dict:
        """Operating-point entries of the bias network: i_divider (A, through r_top)."""
        return {"i_divider": (vcc - v_base) / p["r_top"]}

    # ---- the models --------------------------------------------------------------------------
    def _bias(self, p: Parts, device: Device, c: Conditions, beta: np.ndarray, nvt: float, i_s: float) -> Bias:
        q = follower_loop(two_port(*self._dc_ports(p, c)), device, c.supply, beta, nvt, i_s)
        ic, ib, v_e = q["ic"], q["ib"], q["v_emitter"]
        vce = c.supply - v_e
        op = {
            "v_base": q["v_base"],
            "v_emitter": v_e,
            "ic": ic,
            "ib": ib,
            "vce": vce,
            "vbe": q["vbe"],
            "active": physics.is_active(vce, ic, device.vce_sat, q["converged"]),
            "q_power": vce * ic,
            **self._divider_op(p, q["v_base"], ib, c.supply),
        }
        op["supply_current"] = ic + op["i_divider"]
        return Bias(op, [physics.small_signal(q, device, beta, nvt, i_s)])

    def _output_q(self, op: dict[str, np.ndarray]) -> np.ndarray:
        return op["v_emitter"]

    def _follower(self, p: Parts, c: Conditions, b: Bias, r_source: np.ndarray) -> dict[str, np.ndarray]:
        """:func:`follower_midband` at the band's geometric mean, where the gain and impedances
        are judged: the source reaches the base through c_in (whose reactance the output
        impedance sees), the load (with its capacitance) hangs on the emitter through c_out.
        Adds gain_c (V/V, complex): source to load."""
        s = 2j * math.pi * c.band_centre
        y_load = 1.0 / c.load_impedance + s * c.load_capacitance
        y_out = s * p["c_out"]
        z_source = r_source + input_reactance(p["c_in"], s)
        m = follower_midband(
            b.small_signal[0], s, z_source, *self._mid_admittances(p, c), y_load * y_out / (y_load + y_out)
        )
        m["gain_c"] = m["gain"] * y_out / (y_load + y_out)
        return m

    def _midband(self, p: Parts, c: Conditions, b: Bias, r_source: np.ndarray) -> dict[str, np.ndarray]:
        m = self._follower(p, c, b, r_source)
        vx = np.abs(m["vx_per_out"])
        # the follower compresses (the emitter's own current feedback, loop 1 + v_e/v_x)
        return {
            "gain": real_signed(m["gain_c"]),
            "input_impedance": m["z_in"],
            "output_impedance": m["z_out"],
            "hd2_terms": [(vx, vx / (1.0 + vx), 0.0, -1.0)],
        }

    def _swing(
        self, p: Parts, device: Device, c: Conditions, b: Bias, mid: dict[str, np.ndarray]
    ) -> tuple[np.ndarray, np.ndarray]:
        op = b.op
        # cutoff: the emitter falls to where its own network holds it without q1's current
        z22 = two_port(*self._held_ports(p, c, op, 0.0))[4]
        cut = (op["ic"] + op["ib"]) * z22
        sat = np.maximum(op["vce"] - device.vce_sat, 0.0)
        vce_max = c.supply - np.maximum(op["v_emitter"] - cut, 0.0)
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
        if r_source is not None:
            net.admittance("in", net.ground, 1.0 / r_source)
        couple_input(net, p, ac)
        self._bias_network(net, p, ac, rail)
        add_follower(net, p, c, ss[0], ac, load, rail, ("base", "bint", "emitter"))
        return net

    def _nodes(self) -> tuple[str, ...]:
        return ("in", "base", "bint", "emitter", "out")

    def _bias_network(self, net: physics.Network, p: Parts, ac: bool, rail: str | None) -> None:
        net.resistor("base", rail, p["r_top"])
        net.resistor("base", net.bias_ground, p["r_bottom"])

    def _ratings(self, p: Parts, c: Conditions, b: Bias) -> dict[str, np.ndarray]:
        op = b.op
        vcc = op["v_supply_local"]
        v_div = op[self.divider_tap]
        r = {
            "p_r_top": (vcc - v_div) ** 2 / p["r_top"],
            "p_r_bottom": v_div**2 / p["r_bottom"],
            "p_r_follower": op["v_emitter"] ** 2 / p["r_follower"],
            "p_q1": op["vce"] * op["ic"],
            "v_c_in": np.where(p["c_in"] > 0, c.ground_rail_max, 0.0) + 0.0 * vcc,
            "v_c_out": np.full_like(vcc, c.ground_rail_max),
        }
        r.update(self._extra_ratings(p, c, op))
        return r

    def _extra_ratings(self, p: Parts, c: Conditions, op: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
        return {}

    def _thd_static(
        self,
        p: Parts,
        device: Device,
        c: Conditions,
        b: Bias,
        nvt: float,
        beta: np.ndarray,
        gain: np.ndarray,
        samples: int = physics.THD_SAMPLES,
    ) -> np.ndarray:
        """THD (fraction) at c.signal_vpp by the nonlinear-current method at physics.THD_FREQUENCY.

        The static solve over one period (capacitors holding their DC) gives q1's waveforms;
        what its currents do beyond their linearisation at the operating point (collector
        current beyond gm*vbe + go*vce, base current beyond gpi*vbe) and the current of its
        collector-base depletion charge (CJC: the base swings with the output against the
        fixed collector) are harmonic current sources, each carried to the load by the whole
        stage's network at its own frequency (source, c_in, the bootstrap, the load, the
        device capacitances). The fundamental is the static one. At a 10 Mohm source the
        charge term doubles the THD and the bootstrap turns the phase of the rest (ngspice,
        tests/spice_designs.py); at a low source it is the static FFT again."""
        harmonics = min(9, samples // 2 - 1)
        t = np.arange(samples) / samples
        vs = np.asarray(0.5 * c.signal_vpp / np.abs(gain))[:, None] * np.sin(2.0 * np.pi * t)
        fn = self._static_fn(p, device, c, b, nvt, beta)
        q = fn(vs, waves=True)
        op, ss = b.op, b.small_signal[0]
        col = lambda k: np.asarray(op[k])[:, None]  # noqa: E731
        d_vbe, d_ve = q["vbe"] - col("vbe"), q["v_emitter"] - col("v_emitter")
        i_c = q["ic"] - col("ic") - ss["gm"][:, None] * d_vbe + ss["go"][:, None] * d_ve
        i_b = q["ib"] - col("ib") - ss["gpi"][:, None] * d_vbe
        charge = physics.depletion_charge(device_columns(device).CJC, q["v_emitter"] + q["vbe"] - col("v_supply_local"))
        spectra = [np.fft.rfft(w, axis=-1)[:, 2 : harmonics + 1].T for w in (i_c, i_b, charge)]
        fundamental = np.abs(np.fft.rfft(fn(vs), axis=-1)[:, 1])
        f = physics.THD_FREQUENCY * np.arange(2, harmonics + 1)[:, None]
        s = 2j * math.pi * f
        c_k, b_k, q_k = spectra
        q_k = s * q_k  # the charge's current, out of the internal base
        net = self._network(p, c, b.small_signal, True, _source_resistance(b, c), True)
        rhs = {"emitter": c_k + b_k, "bint": -b_k - q_k}
        if "vloc" in net.index:  # behind a decoupling RC the collector current returns to the local rail
            rhs["vloc"] = -c_k
        out = net.at(s).solve(rhs, ["out"])["out"]  # (harmonics, candidates)
        return np.sqrt(np.sum(np.abs(out) ** 2, axis=0)) / fundamental

    def static_output(
        self, p: Parts, device: Device, c: Conditions, b: Bias, nvt: float, i_s: float, beta: np.ndarray
    ) -> Callable[..., np.ndarray]:
        """Load voltage (V) against source voltage (V): q1's base loop in the held-capacitor
        two-port at every sample. Past cutoff q1 passes no current and the emitter rests where
        its network holds it; at the other end q1 saturates through its base-collector junction
        (physics.solve_junction's ``saturation``: a base driven above the rail, as a bootstrap or
        a large drive does, lifts the emitter to within tens of millivolts of it, as ngspice has
        it), and a sample past that solve's reach (deep saturation) rests at the rail.
        ``waves=True``: q1's solution instead (vbe, ic, ib, v_emitter ... per sample)."""
        op = b.op

        def out(vs: np.ndarray, waves: bool = False) -> np.ndarray | dict[str, np.ndarray]:
            q = follower_loop(
                two_port(*self._held_ports(p, c, op, vs)),
                device,
                c.supply,
                beta,
                nvt,
                i_s,
                v_start=op["vbe"],
                iterations=physics.THD_ITERATIONS,
                saturation=True,
            )
            return q if waves else np.minimum(q["v_emitter"], c.supply) - op["v_emitter"]

        return out


def follower_hand_design(req: HandRequirements) -> dict[str, float]:
    """The hand method's follower: the emitter at half the supply at the hand current, the
    divider carrying ten times the base current, each coupling capacitor for the band's low
    corner alone (common practice)."""
    ie = req.collector_current
    r_follower = 0.5 * req.supply / ie
    r_top, r_bottom = divider(req, 0.5 * req.supply + VBE_HAND)
    z_in = parallel(parallel(r_top, r_bottom), req.hfe * parallel(r_follower, req.load_impedance))
    return {
        "r_top": r_top,
        "r_bottom": r_bottom,
        "r_follower": r_follower,
        "c_in": coupling_capacitor(z_in + req.source_impedance, req.f_low),
        "c_out": coupling_capacitor(req.load_impedance, req.f_low),
    }
