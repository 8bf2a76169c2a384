"""feedback_pair_ac: the feedback pair with its feedback network's shunt leg AC-coupled.

As feedback_pair, but q1's emitter returns to the rail through r_emitter_dc alone at DC, and
to AC ground through r_emitter in series with c_feedback as well. The bias then sees the small
DC gain 1 + r_feedback/r_emitter_dc, and the signal the gain 1 + r_feedback/(r_emitter ||
r_emitter_dc). On a split supply, where q1's base sits at ground and r_emitter_dc carries q1's
emitter down the whole negative rail, this keeps r_feedback small, and with it the loop gain
high, at gains the plain pair cannot reach there.

Nodes: as feedback_pair, with r_emitter_dc emitter-gnd, r_emitter emitter-efb and c_feedback
efb-gnd.
"""

from __future__ import annotations

import numpy as np

from optimizer import physics
from optimizer.devices import Device
from optimizer.errors import InputError
from optimizer.synthesis import HandRequirements, coupling_capacitor, parallel
from optimizer.topologies.base import Bias, Conditions, Parts
from optimizer.topologies.feedback_pair import SPLIT_CURRENT_SHARE, VT_HAND, FeedbackPair

DC_GAIN = 3.0  # the hand rule's DC gain, 1 + r_feedback/r_emitter_dc (the plain pair's rule places the bias)


class FeedbackPairAC(FeedbackPair):
    name = "feedback_pair_ac"
    description = (
        "series-shunt feedback pair with its feedback leg AC-coupled: gain 1 + r_feedback/(r_emitter || "
        "r_emitter_dc), the bias at the DC gain 1 + r_feedback/r_emitter_dc"
    )
    order = 55
    resistors = (
        "r_top",
        "r_bottom",
        "r_collector",
        "r_emitter_dc",
        "r_emitter",
        "r_emitter2",
        "r_collector2",
        "r_feedback",
    )
    capacitors = ("c_in", "c_feedback", "c_emitter2", "c_out")
    elements = (
        ("c_in", "src", "base"),
        ("r_top", "vcc", "base"),
        ("r_bottom", "base", "0"),
        ("r_collector", "vcc", "collector"),
        ("r_emitter_dc", "emitter", "0"),
        ("r_emitter", "emitter", "efb"),
        ("c_feedback", "efb", "0"),
        ("r_emitter2", "emitter2", "0"),
        ("c_emitter2", "emitter2", "0"),
        ("r_collector2", "vcc", "collector2"),
        ("r_feedback", "collector2", "emitter"),
        ("c_out", "collector2", "out"),
    )
    node_voltages = {**FeedbackPair.node_voltages, "efb": "v_efb"}
    gain_bound_roles = ("r_feedback", "r_emitter", "r_emitter_dc")

    def gain_bound(self, resistors: dict[str, np.ndarray], load: float) -> np.ndarray:
        # the plain pair's bound with the shunt leg at mid-band
        return 1.0 + resistors["r_feedback"] / physics.parallel(resistors["r_emitter"], resistors["r_emitter_dc"])

    def hand_design(self, req: HandRequirements) -> dict[str, float]:
        """The plain pair's textbook bias at DC_GAIN (its r_emitter as r_emitter_dc), then the
        AC leg for the gain (:meth:`_ac_leg`)."""
        return self._ac_leg(super().hand_design(_at_dc_gain(req)), req, req.collector_current)

    def split_hand_design(self, req: HandRequirements, ground: float) -> dict[str, float]:
        """The plain pair's split rule at DC_GAIN, then the AC leg for the gain (:meth:`_ac_leg`)."""
        return self._ac_leg(
            super().split_hand_design(_at_dc_gain(req), ground), req, SPLIT_CURRENT_SHARE * req.collector_current
        )

    @staticmethod
    def _ac_leg(dc: dict[str, float], req: HandRequirements, ic2: float) -> dict[str, float]:
        """r_emitter in parallel with r_emitter_dc giving the gain with the hand loop gain T =
        gm2*(r_collector2 || load)*(r_collector || r_pi2)/r_feedback (q2 at ``ic2`` A, q1's emitter
        a virtual ground, as the plain pair's split rule): A = (1 + r_feedback/leg)*T/(1 + T); and
        c_feedback for the band's low edge across r_emitter (ohm, F). InputError for a gain not
        above DC_GAIN (the plain pair serves it)."""
        r_dc, r_feedback = dc["r_emitter"], dc["r_feedback"]
        gm2 = ic2 / VT_HAND
        k = gm2 * parallel(dc["r_collector2"], req.load_impedance) * parallel(dc["r_collector"], req.hfe / gm2)
        loop = k / r_feedback
        leg = r_feedback / (req.gain * (1.0 + 1.0 / loop) - 1.0) if req.gain > 1.0 else np.inf
        if not leg < r_dc:
            raise InputError.single(
                "gain.target",
                req.gain,
                f"a gain above {DC_GAIN:g} V/V for the AC-coupled pair's hand method (feedback_pair serves lower gains)",
                title="hand method has no solution",
            )
        r_emitter = 1.0 / (1.0 / leg - 1.0 / r_dc)
        return {
            **dc,
            "r_emitter_dc": r_dc,
            "r_emitter": r_emitter,
            "c_feedback": coupling_capacitor(r_emitter, req.f_low),
        }

    def _re_dc(self, p: Parts) -> np.ndarray:
        return p["r_emitter_dc"]

    def _re_ac(self, p: Parts) -> np.ndarray:
        return physics.parallel(p["r_emitter"], p["r_emitter_dc"])

    def _nodes(self) -> tuple[str, ...]:
        return (*super()._nodes(), "efb")

    def _emitter_leg(self, net: physics.Network, p: Parts, ac: bool) -> None:
        net.resistor("emitter", None, p["r_emitter_dc"])
        net.resistor("emitter", "efb", p["r_emitter"])
        net.capacitor("efb", None, p["c_feedback"], ac, True)

    def _emitter_hold(self, p: Parts, op: dict[str, np.ndarray]) -> tuple[np.ndarray, np.ndarray | float]:
        # c_feedback holds q1's quiescent emitter voltage: r_emitter is a branch to that voltage
        return self._re_ac(p), op["v_emitter"] / p["r_emitter"]

    def _bias(self, p: Parts, device: Device, c: Conditions, beta: np.ndarray, nvt: float, i_s: float) -> Bias:
        bias = super()._bias(p, device, c, beta, nvt, i_s)
        bias.op["v_efb"] = bias.op["v_emitter"]  # no DC flows in the AC-coupled leg
        return bias

    def _ratings(self, p: Parts, c: Conditions, b: Bias) -> dict[str, np.ndarray]:
        op = b.op
        return {
            **super()._ratings(p, c, b),
            "p_r_emitter_dc": op["v_emitter"] ** 2 / p["r_emitter_dc"],
            "p_r_emitter": np.zeros_like(op["ic"]),  # no DC in the AC-coupled leg
            # q1's emitter: its quiescent voltage at the highest rail, or, with q1 off, what r_feedback
            # passes from a collector2 at that rail
            "v_c_feedback": c.rail_max
            * np.maximum(op["v_emitter"] / c.supply, p["r_emitter_dc"] / (p["r_emitter_dc"] + p["r_feedback"])),
        }


def _at_dc_gain(req: HandRequirements) -> HandRequirements:
    """``req`` at the hand rule's DC gain (the plain pair's rules then place the bias)."""
    return HandRequirements(**{**req.__dict__, "gain": DC_GAIN})
