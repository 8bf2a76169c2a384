"""The stage models against ngspice (Debian package) as the reference simulator.

32 hand-method designs over the four common-emitter stages, supplies 3.3-30 V and hFE 50-500,
four of them again with a supply decoupling RC (bias, swing and supply rejection through
r_decouple/c_decouple), and 16 emitter and bootstrapped followers (sources from 50 ohm to
10 Mohm, each driving a cable) are simulated through the exported SPICE netlist; every metric
(bias, gain, impedances, usable swing by the 10 % rule, clip level, corners, white and
flicker noise, noise figure at 290 K, supply rejection at 100 Hz and mid-band, THD) must
agree within the tolerances in spice_agreement.TOLERANCES. The same checks run on PNP,
negative-rail and split-supply versions of two stages (the block at the end), and on PNP,
negative-rail (and for the followers split-supply) versions of the followers and the feedback
pair, and on 8 designs of the pair with its feedback leg AC-coupled (positive rails and split
supplies, NPN and PNP). Skipped only where ngspice is absent.
"""

from __future__ import annotations

import shutil

import numpy as np
import pytest

from optimizer.topologies import get_topology
from spice_agreement import agreement_rows, outside_tolerance
from spice_designs import (
    check_designs,
    direct_coupled_designs,
    fb_split_designs,
    later_polarity_designs,
    pair_ac_designs,
    polarity_designs,
)
from spice_harness import spice_operating_point

pytestmark = pytest.mark.skipif(
    shutil.which("ngspice") is None, reason="ngspice not installed: apt-get install ngspice"
)

DESIGNS = check_designs()
#  The polarity layer: PNP, negative-rail and split-supply versions of two stages (see below).
POLARITY_DESIGNS = polarity_designs()
#  ... and of the followers and the feedback pair (PNP on a positive rail, NPN on a negative one).
LATER_POLARITY_DESIGNS = later_polarity_designs()
#  ... and split-supply versions of the feedback pair and feedback_ce (+-12 V, +-15 V; NPN and PNP).
FB_SPLIT_DESIGNS = fb_split_designs()


#  Direct-coupled inputs on split supplies: no c_in, the source in the base's DC path (see below).
DIRECT_DESIGNS = direct_coupled_designs()
#  The feedback pair with its feedback leg AC-coupled, on positive rails and split supplies (NPN, PNP).
PAIR_AC_DESIGNS = pair_ac_designs()


ALL_DESIGNS = DESIGNS + POLARITY_DESIGNS + LATER_POLARITY_DESIGNS + FB_SPLIT_DESIGNS + DIRECT_DESIGNS + PAIR_AC_DESIGNS


@pytest.mark.parametrize("design", ALL_DESIGNS, ids=[d.name for d in ALL_DESIGNS])
def test_model_agrees_with_ngspice(design) -> None:
    outside = outside_tolerance(agreement_rows(design))
    assert not outside, "\n".join(outside)


def test_hand_method_is_further_off_than_the_model() -> None:
    """Across the set, the textbook gain estimate misses ngspice by more than the model."""
    rows = [r for d in DESIGNS[::4] for r in agreement_rows(d) if r["metric"] == "gain"]
    model_error = sum(abs(r["error"]) for r in rows) / len(rows)
    hand_error = sum(abs(r["hand_error"]) for r in rows) / len(rows)
    assert model_error < 0.03 < hand_error


# ---- polarity layer: PNP stages, negative rails, split supplies -----------------------------
# divider_ce and divider_ce_split, drawn as NPN on a positive rail, evaluated through the
# polarity layer of optimizer/topologies/base.py as PNP stages (on a positive and on a negative
# rail: mirrored, and mirrored and shifted), as NPN stages on a negative rail (shifted) and on
# split supplies with a ground-referenced base (r_top absent; NPN and PNP), 48 designs in all
# (tests/spice_designs.polarity_designs). Each is simulated through the exported netlist, with a
# PNP model card and the true rails (Vcc, Vee against ground), and every metric of the agreement
# set (bias, gain, impedances, usable swing, clip level, corners, white and flicker noise, noise
# figure, THD, and supply rejection with the ripple on each rail that carries it, the worse of
# two on a split supply) must agree within spice_agreement.TOLERANCES. The operating point is
# compared in true volts: node voltages with their sign. The followers and the feedback pair
# run the same checks on 20 designs of their own (spice_designs.later_polarity_designs), and the
# feedback pair and feedback_ce on split supplies (+-12 V and +-15 V, NPN and PNP) on 16 more
# (spice_designs.fb_split_designs: the pair's base ground-referenced, feedback_ce across the rails).


NODE_DESIGNS = POLARITY_DESIGNS[::6] + LATER_POLARITY_DESIGNS + FB_SPLIT_DESIGNS + DIRECT_DESIGNS + PAIR_AC_DESIGNS[4:]


@pytest.mark.parametrize("design", NODE_DESIGNS, ids=[d.name for d in NODE_DESIGNS])
def test_node_voltages_are_true_volts_with_their_sign(design) -> None:
    # ngspice's .op of the netlist with its true rails (ground at 0 V) against the model's
    # reported operating point: within 20 mV or 1 % of the span at base, collector and emitter
    op = get_topology(design.topology).operating_point(
        {k: np.array([v]) for k, v in design.parts.items()}, design.device, design.conditions
    )
    simulated = spice_operating_point(
        design.topology,
        design.parts,
        {**design.device.spice_model(), "polarity": design.device.polarity},
        design.conditions,
    )
    for key in [k for k in ("v_base", "v_collector", "v_emitter") if k in simulated]:  # a follower has no collector
        assert float(op[key][0]) == pytest.approx(simulated[key], abs=max(0.02, 0.01 * design.conditions.supply)), key


# ---- direct-coupled inputs on split supplies -------------------------------------------------
# A ground-referenced source wired to the base (c_in 0): 12 designs of divider_ce,
# divider_ce_split and emitter_follower on +-12/+-15 V (divider_ce on +12/-2.5 and +15/-3 V),
# NPN and PNP, run through every check above (spice_designs.direct_coupled_designs). Here: the
# source's resistance really is in the bias path. ngspice (Debian) is the reference.


@pytest.mark.parametrize("index", [2, 10], ids=["divider_ce-rs10k", "emitter_follower-rs10k"])
def test_direct_coupled_bias_carries_the_base_current_through_the_source(index) -> None:
    design = DIRECT_DESIGNS[index]
    topology = get_topology(design.topology)
    parts = {k: np.array([v]) for k, v in design.parts.items()}
    model_card = {**design.device.spice_model(), "polarity": design.device.polarity}
    simulated = spice_operating_point(design.topology, design.parts, model_card, design.conditions)
    direct = topology.operating_point(parts, design.device, design.conditions)
    # the same parts with a coupling capacitor: the source's DC path gone, the base current all in r_bottom
    coupled = topology.operating_point({**parts, "c_in": np.array([1e-6])}, design.device, design.conditions)
    base_shift = abs(float(coupled["v_base"][0]) - simulated["v_base"])
    assert base_shift > 0.02  # V: the source's 10 k beside r_bottom moves the base visibly
    assert float(direct["v_base"][0]) == pytest.approx(simulated["v_base"], abs=0.02 * base_shift)
    assert float(direct["ic"][0]) == pytest.approx(simulated["ic"], rel=0.003)
    # the DC the base draws through the source: (0 V - v_base) / R_source, by ngspice's base voltage
    i_source = float(direct["i_source"][0])
    sign = -1.0 if design.device.polarity == "pnp" else 1.0
    assert i_source == pytest.approx(sign * -simulated["v_base"] / design.conditions.source_impedance, rel=0.01)
