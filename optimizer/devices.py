"""Transistor parameters and their temperature-dependent relations (SI units).

A :class:`Device` carries the catalog's ratings and the SPICE Gummel-Poon
parameters that the analytic models use (IS, BF, NF, VAF, RB, CJE, CJC, TF, and the
optional flicker-noise KF, AF; the others at their SPICE defaults). Temperatures are in
degrees Celsius.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, fields
from typing import Any, Mapping

import numpy as np

from optimizer.errors import InputError, Problem

BOLTZMANN = 1.380649e-23  # J/K
ELEMENTARY_CHARGE = 1.602176634e-19  # C
KELVIN_OFFSET = 273.15
SPICE_TNOM_C = 27.0  # SPICE nominal temperature
SPICE_XTI = 3.0  # SPICE default saturation-current temperature exponent
SPICE_EG = 1.11  # eV, SPICE default energy gap
HFE_TEMPCO = 0.005  # per kelvin, common-practice rise of hFE with temperature

SPICE_KEYS = ("IS", "BF", "NF", "VAF", "RB", "CJE", "CJC", "TF")
FLICKER_KEYS = ("KF", "AF")  # optional SPICE flicker-noise parameters (KF 0 = no flicker noise)


@dataclass(frozen=True)
class Device:
    """One transistor type: ratings, hFE spread and SPICE model parameters (SI units).

    ``polarity`` "npn" or "pnp"; a PNP's parameters are magnitudes (IS, VAF, vce_sat and the
    ratings as for its NPN mirror image), as in a SPICE .model PNP card."""

    id: str
    polarity: str
    hfe_min: float
    hfe_typ: float
    hfe_max: float
    IS: float  # A
    BF: float
    NF: float
    VAF: float  # V; 0 or inf means no Early effect (SPICE convention)
    RB: float  # ohm
    CJE: float  # F
    CJC: float  # F
    TF: float  # s
    vce_sat: float  # V
    vceo_max: float  # V
    p_max: float  # W
    KF: float = 0.0  # SPICE flicker-noise coefficient: base-current PSD KF*Ib^AF/f (A^2/Hz); 0 = none
    AF: float = 1.0  # SPICE flicker-noise exponent

    @classmethod
    def from_row(cls, row: Mapping) -> "Device":
        """Build a device from a catalog row whose keys are the field names."""
        problems: list[Problem] = []
        values: dict[str, Any] = {}  # str for id and polarity, float for the rest
        where = f"transistor {row.get('id', '?')!s}"
        for f in fields(cls):
            if f.name not in row or row[f.name] is None or (isinstance(row[f.name], float) and math.isnan(row[f.name])):
                if f.name not in FLICKER_KEYS:  # those keep their defaults (no flicker noise)
                    problems.append(Problem(f"{where}.{f.name}", row.get(f.name), "a value is required"))
                continue
            if f.name in ("id", "polarity"):
                values[f.name] = str(row[f.name]).strip()
                continue
            try:
                values[f.name] = float(row[f.name])
            except (TypeError, ValueError):
                problems.append(Problem(f"{where}.{f.name}", row[f.name], "a number in SI units"))
        if not problems:
            if str(values["polarity"]).lower() not in ("npn", "pnp"):
                problems.append(Problem(f"{where}.polarity", values["polarity"], "'npn' or 'pnp'"))
            for name in ("hfe_min", "hfe_typ", "hfe_max", "IS", "BF", "NF", "vceo_max", "p_max"):
                if not values[name] > 0:
                    problems.append(Problem(f"{where}.{name}", values[name], "a positive number"))
            for name in ("RB", "CJE", "CJC", "TF", "vce_sat", "VAF", *(k for k in FLICKER_KEYS if k in values)):
                if values[name] < 0:
                    problems.append(Problem(f"{where}.{name}", values[name], "zero or a positive number"))
            if not problems and not values["hfe_min"] <= values["hfe_typ"] <= values["hfe_max"]:
                problems.append(Problem(f"{where}.hfe_typ", values["hfe_typ"],
                                        f"between hfe_min {values['hfe_min']} and hfe_max {values['hfe_max']}"))
        if problems:
            raise InputError(problems, title="invalid transistor")
        values["polarity"] = str(values["polarity"]).lower()
        return cls(**values)

    @classmethod
    def from_record(cls, transistor: Mapping) -> "Device":
        """Rebuild a device from a candidate record's "transistor" block (id, polarity, hfe_min,
        hfe_typ, hfe_max, vce_sat, vceo_max, p_max and model{IS..TF, optional KF, AF}), without the catalog."""
        if not isinstance(transistor, Mapping):
            raise InputError.single("transistor", transistor, "a mapping (the candidate's transistor block)",
                                    title="incomplete candidate")
        model = transistor.get("model")
        if not isinstance(model, Mapping):
            raise InputError.single("transistor.model", model, "a mapping with " + ", ".join(SPICE_KEYS),
                                    title="incomplete candidate")
        top = [f.name for f in fields(cls) if f.name not in SPICE_KEYS + FLICKER_KEYS]
        missing = [Problem(f"transistor.{k}", None, "a value is required") for k in top if k not in transistor]
        missing += [Problem(f"transistor.model.{k}", None, "a value is required")
                    for k in SPICE_KEYS if k not in model]
        if missing:
            raise InputError(missing, title="incomplete candidate")
        return cls.from_row({**{k: transistor[k] for k in top},
                             **{k: model[k] for k in SPICE_KEYS + FLICKER_KEYS if k in model}})

    def record(self) -> dict:
        """The candidate record's "transistor" block (what from_record reads back)."""
        top = {f.name: getattr(self, f.name) for f in fields(self) if f.name not in SPICE_KEYS}
        return {**top, "model": self.spice_model()}

    def spice_model(self) -> dict[str, float]:
        """SPICE .model parameters (keys IS BF NF VAF RB CJE CJC TF KF AF)."""
        return {k: float(getattr(self, k)) for k in SPICE_KEYS + FLICKER_KEYS}

    @property
    def inv_vaf(self) -> float:
        """1/VAF in 1/V (0 when VAF is 0 or infinite, as in SPICE)."""
        return 0.0 if self.VAF <= 0 or math.isinf(self.VAF) else 1.0 / self.VAF


def thermal_voltage(temp_c: float | np.ndarray) -> float | np.ndarray:
    """kT/q in V at a temperature in degrees Celsius."""
    return BOLTZMANN * (np.asarray(temp_c, dtype=float) + KELVIN_OFFSET) / ELEMENTARY_CHARGE


def saturation_current(IS: float, temp_c: float | np.ndarray) -> float | np.ndarray:
    """SPICE IS(T) in A: IS*(T/Tnom)^XTI*exp(EG/VT(T)*(T/Tnom-1)), XTI=3, EG=1.11 eV, Tnom=27 C."""
    t = np.asarray(temp_c, dtype=float) + KELVIN_OFFSET
    t_nom = SPICE_TNOM_C + KELVIN_OFFSET
    ratio = t / t_nom
    return IS * np.exp((ratio - 1.0) * SPICE_EG / thermal_voltage(temp_c) + SPICE_XTI * np.log(ratio))


def hfe_temperature_factor(temp_c: float | np.ndarray, ref_c: float = SPICE_TNOM_C) -> float | np.ndarray:
    """Multiplier of hFE at temp_c relative to ref_c (common practice: about +0.5 %/K)."""
    return (1.0 + HFE_TEMPCO) ** (np.asarray(temp_c, dtype=float) - ref_c)
