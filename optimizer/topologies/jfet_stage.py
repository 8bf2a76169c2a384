"""The shared model of the self-biased n-channel JFET stages (jfet_common_source, jfet_follower).

SPICE JFET level 1 (devices.JFET): in saturation Id = BETA*(Vgs - VTO)^2*(1 + LAMBDA*Vds),
in the triode region Id = BETA*Vds*(2*(Vgs - VTO) - Vds)*(1 + LAMBDA*Vds). The part's
BETA and VTO come from its IDSS/VP position (the ``hfe`` argument of the shared flow is that
position, u in [0, 1], typical 0.5) at the operating temperature.

Both stages bias the gate through r_gate from a node that the drain current raises by the
same amount as the source, save for the source resistor r_source (or r_source + r_source_dc):
Vgs = Ig*r_gate - Id*R_bias, with Ig the gate leakage flowing out of the gate. With the
overdrive x = Vgs - VTO this is the quadratic R_bias*BETA*k*x^2 + x - a = 0 (a = Ig*r_gate -
VTO, k = 1 + LAMBDA*Vds), solved in closed form and iterated on k (Vds falls with Id).
"""

from __future__ import annotations

from typing import Any, Callable

import numpy as np

from optimizer import physics
from optimizer.devices import JFET, JFET_M, JFET_PB, thermal_voltage
from optimizer.topologies.base import Bias, Conditions, Parts, StageModel
from optimizer.topologies.divider_ce import add_load

BIAS_ITERATIONS = 6  # fixed-point steps on the channel-length factor k = 1 + LAMBDA*Vds
STATIC_ITERATIONS = 12  # Newton steps per sample of the static (swing, distortion) solve


def drain_current(
    beta: np.ndarray, vto: np.ndarray, lam: float, vgs: np.ndarray, vds: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """SPICE level-1 drain current (A) and its gm, gds (S) at Vgs, Vds (V; Vds >= 0)."""
    x = np.maximum(vgs - vto, 0.0)
    vds = np.maximum(vds, 0.0)
    k = 1.0 + lam * vds
    sat = vds >= x
    v = np.minimum(vds, x)
    i = beta * v * (2.0 * x - v) * k
    gm = 2.0 * beta * v * k
    gds = np.where(sat, lam * beta * x * x, beta * (2.0 * x - 2.0 * vds) * k + lam * beta * vds * (2.0 * x - vds))
    return i, gm, gds


def self_bias(
    a: np.ndarray, r_bias: np.ndarray, r_total: np.ndarray, supply: np.ndarray, beta: np.ndarray, lam: float
) -> dict[str, np.ndarray]:
    """Saturation operating point of Vgs = a + VTO - Id*r_bias, Vds = supply - Id*r_total:
    the overdrive x (V), id (A), vds (V). a = Vg - VTO (V); a <= 0 is a pinched-off part (Id 0)."""
    a = np.maximum(a, 0.0)
    k = np.ones_like(a)
    for _ in range(BIAS_ITERATIONS):
        b = r_bias * beta * k
        x = 2.0 * a / (1.0 + np.sqrt(1.0 + 4.0 * b * a))  # the quadratic's root, stable at b -> 0
        i_d = beta * x * x * k
        vds = supply - i_d * r_total
        k = 1.0 + lam * np.maximum(vds, 0.0)
    return {"x": x, "id": i_d, "vds": vds}


def cutoff_drop(i_d: np.ndarray, x: np.ndarray, r_degeneration: np.ndarray) -> np.ndarray:
    """How far the drain current falls (A) before the square law has halved the stage's
    incremental gain (the clip criterion of clip_vpp on the cutoff side): with
    g = 2*sqrt(BETA'*I), the degenerated g/(1 + g*R) falls to half its quiescent value at
    g' = h/(1 - h*R), h = 0.5*gm/(1 + gm*R); then I' = g'^2/(4*BETA'), BETA' = Id/x^2. An
    undegenerated stage keeps a quarter of Id (Vgs half-way to pinch-off), a heavily
    degenerated one falls nearly to cutoff."""
    gm = 2.0 * i_d / x
    h = 0.5 * gm / (1.0 + gm * r_degeneration)
    g = h / (1.0 - h * r_degeneration)
    return i_d - g * g * x * x / (4.0 * i_d)


def _drive(i_d: np.ndarray, x: np.ndarray, r_degeneration: np.ndarray, di: np.ndarray) -> np.ndarray:
    """Gate drive (V) that moves a degenerated square-law stage's current by di (A)."""
    return x * (np.sqrt(np.maximum(1.0 + di / i_d, 0.0)) - 1.0) + r_degeneration * di


def _current(i_d: np.ndarray, x: np.ndarray, r_degeneration: np.ndarray, v: np.ndarray) -> np.ndarray:
    """Current change (A) of a degenerated square-law stage driven by v (V) at the gate:
    with u the new overdrive, BETA'*R*u^2 + u - (x + v + R*Id) = 0 (BETA' = Id/x^2)."""
    k_beta = i_d / (x * x)
    free = np.maximum(x + v + r_degeneration * i_d, 0.0)
    u = 2.0 * free / (1.0 + np.sqrt(1.0 + 4.0 * k_beta * r_degeneration * free))
    return k_beta * u * u - i_d


def square_law_clip(
    i_d: np.ndarray, x: np.ndarray, r_degeneration: np.ndarray, r_out: np.ndarray, di_sat: np.ndarray
) -> np.ndarray:
    """clip_vpp (V) of a degenerated square-law stage: the output's peak-to-peak at the gate
    drive where one side clips, the cutoff side when the incremental gain has halved
    (:func:`cutoff_drop`), the other at the triode edge (a current rise of di_sat, A); the
    side not clipping is taken on the square law at the same drive. r_out (ohm) turns the
    current change into the output's."""
    di_cut = -cutoff_drop(i_d, x, r_degeneration)
    a = np.minimum(-_drive(i_d, x, r_degeneration, di_cut), _drive(i_d, x, r_degeneration, di_sat))
    up = np.minimum(_current(i_d, x, r_degeneration, a), di_sat)
    down = np.maximum(_current(i_d, x, r_degeneration, -a), di_cut)
    return (up - down) * r_out


class JFETStage(StageModel):
    """Shared flow of the self-biased JFET stages; a stage names its source and gate return."""

    device_kind = "jfet"
    polarities = ("njf",)
    supplies = ("positive",)
    transistors = 1
    vce_keys = ("vds",)
    output_node: str  # the node c_out couples to the load ("drain" or "source")

    # ---- the stage's own arrangement ---------------------------------------------------
    def _r_bias(self, p: Parts) -> np.ndarray:
        """Resistance (ohm) between the source and the gate's return node (the DC Vgs per Id)."""
        raise NotImplementedError

    def _r_ground(self, p: Parts) -> np.ndarray:
        """DC resistance (ohm) from the source to ground that the drain current crosses."""
        raise NotImplementedError

    def _r_rail(self, p: Parts) -> np.ndarray:
        """DC resistance (ohm) from the rail to the drain (0: the drain on the rail)."""
        return 0.0 * self._r_ground(p)

    def _gate_return(self, p: Parts, i_d: np.ndarray) -> np.ndarray:
        """DC voltage (V) of the node r_gate returns to."""
        raise NotImplementedError

    # ---- bias --------------------------------------------------------------------------
    def headroom(self, op: dict[str, np.ndarray], vce_sat: float) -> np.ndarray:
        """Vds above the saturation edge Vgs - VTO and the active margin (V)."""
        return op["vds"] - op["vdsat"] - physics.ACTIVE_MARGIN

    def _bias(self, p: Parts, device: JFET, c: Conditions, beta: np.ndarray, nvt: float, i_s: float) -> Bias:
        # beta here is the shared flow's spread variable: the part's IDSS/VP position u
        k_beta, vto = device.params(beta, c.temperature)
        ig = device.gate_leakage(c.temperature) + 0.0 * k_beta
        vdd = np.broadcast_to(np.asarray(c.supply, dtype=float), k_beta.shape)
        r_ground = self._r_ground(p)
        q = self_bias(ig * p["r_gate"] - vto, self._r_bias(p), r_ground + self._r_rail(p), vdd, k_beta, device.LAMBDA)
        i_d, x, vds = q["id"], q["x"], q["vds"]
        v_source = i_d * r_ground
        v_gate = self._gate_return(p, i_d) + ig * p["r_gate"]
        vgs = v_gate - v_source
        k = 1.0 + device.LAMBDA * np.maximum(vds, 0.0)
        flicker = device.KF * np.abs(i_d) ** device.AF
        ss = {
            "gm": 2.0 * k_beta * x * k,
            "gds": device.LAMBDA * k_beta * x * x,
            "cgs": _junction_capacitance(device.CGS, vgs),
            "cgd": _junction_capacitance(device.CGD, vgs - vds),
            "ig": ig,
            "id": i_d,
            "flicker": flicker,
            "x": x,
        }
        op = {
            "v_gate": v_gate,
            "v_source": v_source,
            "v_drain": v_source + vds,
            "id": i_d,
            "ic": i_d,
            "ig": ig,
            "vgs": vgs,
            "vds": vds,
            "vdsat": x,
            "v_emitter": v_source,
            "beta_jfet": k_beta,
            "vto": vto,
            "active": (vds > x + physics.ACTIVE_MARGIN) & (x > 0) & np.isfinite(i_d),
            "supply_current": i_d,
            "q_power": vds * i_d,
        }
        op.update(self._extra_op(p, i_d))
        return Bias(op, [ss])

    def _extra_op(self, p: Parts, i_d: np.ndarray) -> dict[str, np.ndarray]:
        return {}

    def _output_q(self, op: dict[str, np.ndarray]) -> np.ndarray:
        return op[f"v_{self.output_node}"]

    # ---- mid-band ----------------------------------------------------------------------
    def _solve_mid(
        self,
        p: Parts,
        c: Conditions,
        ss: list[dict[str, np.ndarray]],
        r_source: np.ndarray | None,
        load: bool,
        rhs: dict[str, np.ndarray],
        want: list[str],
    ) -> dict[str, np.ndarray]:
        return self._network(p, c, ss, False, r_source, load).solve(rhs, want)

    def _midband(self, p: Parts, c: Conditions, b: Bias, r_source: np.ndarray) -> dict[str, np.ndarray]:
        """Gain, impedances and the square-law second-harmonic term.

        The gain and the impedances are solved at the band's geometric mean with the device
        capacitances in place (at megohm levels the gate's Cgd and the bootstrapped Cgs are no
        longer open there) and the coupling and bypass capacitors short, as in every stage's
        mid-band. The input impedance is the gate's and the output impedance the output
        node's (the shared flow adds c_in and c_out in series); the gain is the signed |H|
        (sign of its real part). The distortion term comes from the resistive network."""
        ss = b.small_signal
        one = np.ones_like(r_source)
        s = np.array(2j * np.pi * c.band_centre)
        h = (
            self._network(p, c, ss, False, r_source, True, device_caps=True)
            .at(s)
            .solve({"in": 1.0 / r_source}, ["out"])["out"]
        )
        z_in = self._network(p, c, ss, False, None, True, device_caps=True).at(s).solve({"gate": one}, ["gate"])["gate"]
        z_out = (
            self._network(p, c, ss, False, r_source, False, device_caps=True)
            .at(s)
            .solve({self.output_node: one}, [self.output_node])[self.output_node]
        )
        v = self._solve_mid(p, c, ss, r_source, True, {"in": 1.0 / r_source}, ["out", "gate", "source"])
        # the channel's own current (d -> s) to the load: the transimpedance the distortion current sees
        z_ds = self._solve_mid(p, c, ss, r_source, True, self._channel_rhs(one), ["out"])["out"]
        vgs_per_out = np.abs((v["gate"] - v["source"]) / v["out"])
        suppression = ss[0]["gm"] * np.abs(z_ds) * vgs_per_out
        # thd_small_signal's v_x/(4 NF VT) is the square law's v_gs/(4 x): v_x scaled by NF*VT/x (NF = 1)
        nvt = thermal_voltage(c.temperature)  # per candidate where the temperature is
        return {
            "gain": np.copysign(np.abs(h), h.real),
            "input_impedance": np.abs(z_in),
            "output_impedance": np.abs(z_out),
            "hd2_terms": [(vgs_per_out * nvt / ss[0]["x"], suppression, self._early_u(p, c, ss), 1.0)],
        }

    def _channel_rhs(self, one: np.ndarray) -> dict[str, np.ndarray]:
        """Injections (A) of a unit current through the channel, drain to source."""
        return {"drain": -one, "source": one} if "drain" in self._nodes() else {"source": one}

    def _early_u(self, p: Parts, c: Conditions, ss: list[dict[str, np.ndarray]]) -> np.ndarray | float:
        """The channel-length compression term u of thd_small_signal (0: the drain does not swing)."""
        return 0.0

    def _nodes(self) -> tuple[str, ...]:
        """The network's nodes: 'in', 'gate', 'source', the stage's own, 'out' last."""
        raise NotImplementedError

    def _stage_network(
        self,
        net: physics.Network,
        p: Parts,
        ss: list[dict[str, np.ndarray]],
        ac: bool,
        rail: str | None,
        device_caps: bool,
    ) -> None:
        """The gate return, the JFET (its capacitances with ``device_caps``) and the source and
        drain networks (``rail``: see _new_network)."""
        raise NotImplementedError

    def _r_out_dc(self, p: Parts) -> np.ndarray:
        """Resistance (ohm) from the output node (the one c_out couples) to AC ground, the JFET aside."""
        raise NotImplementedError

    def _limits(
        self, p: Parts, c: Conditions, op: dict[str, np.ndarray], r_ac: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray]:
        """clip_vpp (V) with the output node's AC load r_ac (ohm), and the largest drain-gate voltage (V)."""
        raise NotImplementedError

    def _network(
        self,
        p: Parts,
        c: Conditions,
        ss: list[dict[str, np.ndarray]],
        ac: bool,
        r_source: np.ndarray | None,
        load: bool,
        supply: bool = False,
        device_caps: bool | None = None,
    ) -> physics.Network:
        """As StageModel._network; ``device_caps`` True with ac False: coupling and bypass
        capacitors short, the JFET's Cgs and Cgd in place (the mid-band of a megohm stage)."""
        net, rail = self._new_network(self._nodes(), p, c, ac, supply)
        if r_source is not None:
            net.admittance("in", None, 1.0 / r_source)
        net.capacitor("in", "gate", p["c_in"], ac, True)
        self._stage_network(net, p, ss, ac, rail, ac if device_caps is None else device_caps)
        net.capacitor(self.output_node, "out", p["c_out"], ac, True)
        add_load(net, c, ac, load)
        return net

    def _swing(
        self, p: Parts, device: JFET, c: Conditions, b: Bias, mid: dict[str, np.ndarray]
    ) -> tuple[np.ndarray, np.ndarray]:
        r_ac = physics.parallel(self._r_out_dc(p), np.full_like(b.op["id"], c.load_impedance))
        return self._limits(p, c, b.op, r_ac)

    # ---- static (swing and distortion) -------------------------------------------------
    def static_output(
        self, p: Parts, device: JFET, c: Conditions, b: Bias, nvt: float, i_s: float, beta: np.ndarray
    ) -> Callable[[np.ndarray], np.ndarray]:
        """Load voltage change (V) against source voltage (V): the level-1 channel (saturation
        and triode) solved at every sample against the stage's linear network, capacitors
        holding their DC: node changes are linear in the source voltage and in the channel
        current's change, taken from two mid-band solves with the channel's gm and gds at zero."""
        op = b.op
        zero = np.zeros_like(b.small_signal[0]["gm"])
        bare = [{**b.small_signal[0], "gm": zero, "gds": zero}]  # the network without the channel
        flat = {k: np.asarray(v)[:, 0] for k, v in p.items()}
        rs = np.full(zero.shape, max(c.source_impedance, physics.R_FLOOR))
        nodes = ["out", "gate", "source"] + (["drain"] if "drain" in self._nodes() else [])
        by_vs = self._solve_mid(flat, c, bare, rs, True, {"in": 1.0 / rs}, nodes)
        by_i = self._solve_mid(flat, c, bare, rs, True, self._channel_rhs(np.ones_like(rs)), nodes)
        col: dict[str, tuple[Any, Any]] = {k: (by_vs[k][:, None], by_i[k][:, None]) for k in nodes}
        if "drain" not in col:
            col["drain"] = (0.0, 0.0)  # the drain sits on the rail
        k_beta, vto, lam = op["beta_jfet"], op["vto"], device.LAMBDA
        i_q, vgs_q, vds_q = op["id"], op["vgs"], op["vds"]

        def out(vs: np.ndarray) -> np.ndarray:
            def nodes_at(di: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
                g = col["gate"][0] * vs + col["gate"][1] * di
                s = col["source"][0] * vs + col["source"][1] * di
                d = col["drain"][0] * vs + col["drain"][1] * di
                return vgs_q + g - s, vds_q + d - s

            di = np.zeros(np.broadcast_shapes(vs.shape, i_q.shape))
            dg_di = col["gate"][1] - col["source"][1]
            dd_di = col["drain"][1] - col["source"][1]
            for _ in range(STATIC_ITERATIONS):
                vgs, vds = nodes_at(di)
                i, gm, gds = drain_current(k_beta, vto, lam, vgs, vds)
                f = di - (i - i_q)
                slope = 1.0 - gm * dg_di - gds * dd_di  # >= 1: the network feeds the change back
                di = np.maximum(di - f / slope, -i_q)
            return col["out"][0] * vs + col["out"][1] * di

        return out

    # ---- ratings -----------------------------------------------------------------------
    def _common_ratings(self, p: Parts, c: Conditions, b: Bias) -> dict[str, np.ndarray]:
        """Resistor powers (W), the coupling capacitors' voltage (V, the rail at its maximum:
        see StageModel._ratings) and the gate resistor's."""
        op = b.op
        i_d = op["id"]
        return {
            "p_r_gate": (op["ig"] * p["r_gate"]) ** 2 / p["r_gate"],
            "p_r_source": i_d**2 * p["r_source"],
            "v_c_in": np.full_like(i_d, c.ground_rail_max),
            "v_c_out": np.full_like(i_d, c.ground_rail_max),
        }


def _junction_capacitance(c0: float, v: np.ndarray) -> np.ndarray:
    """SPICE JFET gate junction capacitance (F) at forward voltage v (V): c0/(1 - v/PB)^M,
    linearised above FC*PB (FC 0.5, PB 1 V, M 0.5)."""
    v = np.asarray(v, dtype=float)
    fc = physics.FC
    lin = c0 / (1.0 - fc) ** (1.0 + JFET_M) * (1.0 - fc * (1.0 + JFET_M) + JFET_M * v / JFET_PB)
    rev = c0 / (1.0 - np.minimum(v, fc * JFET_PB) / JFET_PB) ** JFET_M
    return np.where(v < fc * JFET_PB, rev, lin)
