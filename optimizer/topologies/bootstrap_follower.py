"""bootstrap_follower: emitter follower whose bias network is bootstrapped from the emitter.

Nodes: r_top vcc-mid, r_bottom mid-gnd, r_bootstrap mid-base, c_bootstrap emitter-mid,
r_follower emitter-gnd, c_in source-base, c_out emitter-out, load out-gnd; q1's collector on
the rail. Drawn NPN on a positive rail.

In band c_bootstrap drives the divider's tap with the emitter's signal, so r_bootstrap sees
only the small difference between base and emitter and the input impedance rises to about
r_bootstrap/(1 - A) in parallel with beta times the emitter load (megohms). Below the band the
bootstrap fades: the tap is held by the divider, the input impedance falls to r_bootstrap plus
the divider, and the source's share of the signal falls with it. Where the bootstrap's own
corner meets c_in's, the response can peak before it falls; the nodal network carries
c_bootstrap with the other capacitors, so f_low, the response plot and the capacitor sizing
all include it, and the mid-band figures are taken with c_bootstrap's admittance at the band's
geometric mean (not as a short: the input impedance depends on it to first order).
"""

from __future__ import annotations

import math

import numpy as np

from optimizer import physics
from optimizer.synthesis import HandRequirements, coupling_capacitor, parallel
from optimizer.topologies.base import Conditions, Parts
from optimizer.topologies.emitter_follower import EmitterFollower, Ports, follower_hand_design


class BootstrapFollower(EmitterFollower):
    name = "bootstrap_follower"
    description = "emitter follower with the bias network bootstrapped from the emitter: megohm input"
    order = 60
    resistors = ("r_top", "r_bottom", "r_bootstrap", "r_follower")
    capacitors = ("c_in", "c_bootstrap", "c_out")
    elements = (
        ("c_in", "src", "base"),
        ("r_top", "vcc", "mid"),
        ("r_bottom", "mid", "0"),
        ("r_bootstrap", "mid", "base"),
        ("c_bootstrap", "emitter", "mid"),
        ("r_follower", "emitter", "0"),
        ("c_out", "emitter", "out"),
    )
    node_voltages = {"base": "v_base", "mid": "v_mid", "emitter": "v_emitter"}
    divider_tap = "v_mid"  # r_top and r_bottom meet at the mid node, r_bootstrap feeds the base from it
    direct_input = False  # the base is fed through r_bootstrap from the tap, not returned to ground by r_bottom
    direct_input_note = "its base is fed through r_bootstrap from the bias tap, not returned to ground by r_bottom"

    def hand_design(self, req: HandRequirements) -> dict[str, float]:
        parts = follower_hand_design(req)
        r_tap = parallel(parts["r_top"], parts["r_bottom"])
        r_load = parallel(parts["r_follower"], req.load_impedance)
        # r_bootstrap as large as the divider's own resistance (common practice); the tap's
        # capacitor for the band's low corner with the resistance it drives
        z_in = req.hfe * parallel(r_load, r_tap)
        return {
            **parts,
            "r_bootstrap": r_tap,
            "c_bootstrap": coupling_capacitor(r_tap, req.f_low),
            "c_in": coupling_capacitor(z_in + req.source_impedance, req.f_low),
        }

    def capacitor_floors(
        self, resistors: dict[str, np.ndarray], conditions: Conditions, f_low: float
    ) -> dict[str, np.ndarray]:
        # The bootstrap lifts the input impedance, which the low corner judges only where the
        # source is high: c_bootstrap keeps at least its own corner with the divider at the
        # band's low edge (common practice), so it still works there with any source.
        # On a split supply r_top is absent (0 or left out): the tap is r_bottom alone.
        r_top, r_bottom = np.broadcast_arrays(
            np.asarray(resistors.get("r_top", 0.0), dtype=float), np.asarray(resistors["r_bottom"], dtype=float)
        )
        g_top = np.divide(1.0, r_top, out=np.zeros(r_top.shape), where=r_top > 0)
        r_tap = 1.0 / (g_top + 1.0 / r_bottom)
        return {"c_bootstrap": coupling_capacitor(r_tap, f_low)}

    def _dc_ports(self, p: Parts, c: Conditions) -> Ports:
        r_t, r_b = p["r_top"], p["r_bottom"]
        r_base = r_t * r_b / (r_t + r_b) + p["r_bootstrap"]  # the divider's Thevenin and r_bootstrap
        zero = 0.0 * r_base
        return 1.0 / r_base, zero, 1.0 / p["r_follower"] + zero, c.supply * r_b / (r_t + r_b) / r_base, zero

    def _held_ports(self, p: Parts, c: Conditions, op: dict[str, np.ndarray], vs: np.ndarray) -> Ports:
        # c_bootstrap holds the tap v_h below the emitter: the tap and the emitter move as one node
        g_s = 1.0 / max(c.source_impedance, physics.R_FLOOR)
        g_t, g_b, g_bs = 1.0 / p["r_top"], 1.0 / p["r_bottom"], 1.0 / p["r_bootstrap"]
        g_l = 1.0 / c.load_impedance
        v_h = op["v_emitter"] - op["v_mid"]
        return (
            g_s + g_bs,
            -g_bs,
            g_bs + g_t + g_b + 1.0 / p["r_follower"] + g_l,
            g_s * (vs + op["v_base"]) - g_bs * v_h,
            (g_bs + g_b) * v_h + g_t * (c.supply + v_h) + g_l * op["v_emitter"] + 0.0 * vs,
        )

    def _mid_admittances(self, p: Parts, c: Conditions) -> tuple:
        w = 2.0 * math.pi * c.band_centre
        g_bs = 1.0 / p["r_bootstrap"]
        return (
            0.0 * g_bs,
            g_bs,
            1.0 / p["r_top"] + 1.0 / p["r_bottom"],
            1j * w * p["c_bootstrap"],
            1.0 / p["r_follower"],
        )

    def _divider_op(self, p: Parts, v_base: np.ndarray, ib: np.ndarray, vcc: np.ndarray | float) -> dict:
        v_mid = v_base + p["r_bootstrap"] * ib
        return {"v_mid": v_mid, "i_divider": (vcc - v_mid) / p["r_top"]}

    def _nodes(self) -> tuple[str, ...]:
        return ("in", "base", "mid", "bint", "emitter", "out")

    def _bias_network(self, net: physics.Network, p: Parts, ac: bool, rail: str | None) -> None:
        net.resistor("mid", rail, p["r_top"])
        net.resistor("mid", net.bias_ground, p["r_bottom"])
        net.resistor("mid", "base", p["r_bootstrap"])
        net.capacitor("emitter", "mid", p["c_bootstrap"], ac, True)

    def _extra_ratings(self, p: Parts, c: Conditions, op: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
        # the tap never rises above the divider's open-circuit voltage at the highest rail, and
        # at power-up the emitter side may still be at ground
        return {
            "p_r_bootstrap": (op["v_mid"] - op["v_base"]) ** 2 / p["r_bootstrap"],
            "v_c_bootstrap": c.rail_max * p["r_bottom"] / (p["r_top"] + p["r_bottom"]),
        }
