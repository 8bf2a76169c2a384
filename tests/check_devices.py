"""The small-signal NPN the model tests are written against (SPICE parameters beside the
trade figures, so a test can simulate the same part in ngspice): one definition, each test
giving its own id and whatever it changes."""

from __future__ import annotations

from optimizer.devices import Device


def check_npn(id: str, **changes: float) -> Device:
    """A general-purpose NPN (hFE 100..300, 40 V, 0.5 W), with ``changes`` applied."""
    fields = dict(
        polarity="npn",
        hfe_min=100,
        hfe_typ=200,
        hfe_max=300,
        IS=1e-14,
        BF=200,
        NF=1.0,
        VAF=100.0,
        RB=10.0,
        CJE=8e-12,
        CJC=4e-12,
        TF=4e-10,
        vce_sat=0.2,
        vceo_max=40.0,
        p_max=0.5,
    )
    return Device(id=id, **{**fields, **changes})
