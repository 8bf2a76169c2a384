"""The stage models against ngspice (Debian package) as the reference simulator.

32 hand-method designs over the four common-emitter stages, supplies 3.3-30 V and hFE 50-500,
four of them again with a supply decoupling RC (bias, swing and supply rejection through
r_decouple/c_decouple), and 16 emitter and bootstrapped followers (sources from 50 ohm to
10 Mohm, each driving a cable) are simulated through the exported SPICE netlist; every metric
(bias, gain, impedances, usable swing by the 10 % rule, clip level, corners, white and
flicker noise, noise figure at 290 K, supply rejection at 100 Hz and mid-band, THD) must
agree within the tolerances in spice_agreement.TOLERANCES. Skipped only where ngspice is absent.
"""
from __future__ import annotations

import shutil

import pytest

from spice_agreement import agreement_rows
from spice_designs import check_designs

pytestmark = pytest.mark.skipif(shutil.which("ngspice") is None,
                                reason="ngspice not installed: apt-get install ngspice")

DESIGNS = check_designs()


@pytest.mark.parametrize("design", DESIGNS, ids=[d.name for d in DESIGNS])
def test_model_agrees_with_ngspice(design) -> None:
    rows = agreement_rows(design)
    outside = [f"{r['metric']}: model {r['model']:.4g}, ngspice {r['simulator']:.4g}, "
               f"error {r['error']:+.3g} (tolerance {r['tolerance']:g} {r['kind']})"
               for r in rows if not r["within"]]
    assert not outside, "\n".join(outside)


def test_hand_method_is_further_off_than_the_model() -> None:
    """Across the set, the textbook gain estimate misses ngspice by more than the model."""
    rows = [r for d in DESIGNS[::4] for r in agreement_rows(d) if r["metric"] == "gain"]
    model_error = sum(abs(r["error"]) for r in rows) / len(rows)
    hand_error = sum(abs(r["hand_error"]) for r in rows) / len(rows)
    assert model_error < 0.03 < hand_error
