"""Transistor parameters and their temperature-dependent relations (SI units).

A :class:`Device` carries the catalog's ratings and the SPICE Gummel-Poon
parameters that the analytic models use (IS, BF, NF, VAF, RB, CJE, CJC, TF, and the
optional flicker-noise KF, AF; the others at their SPICE defaults). Temperatures are in
degrees Celsius.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, fields, replace
from typing import Any, ClassVar, Mapping, Sequence, TypeVar

import numpy as np

from optimizer.errors import MISSING, InputError, Problem

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

    kind: ClassVar[str] = "bjt"  # the device kind a topology declares it takes (Topology.device_kind)

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
                problems.append(
                    Problem(
                        f"{where}.hfe_typ",
                        values["hfe_typ"],
                        f"between hfe_min {values['hfe_min']} and hfe_max {values['hfe_max']}",
                    )
                )
        if problems:
            raise InputError(problems, title="invalid transistor")
        values["polarity"] = str(values["polarity"]).lower()
        return cls(**values)

    @classmethod
    def from_record(cls, transistor: Mapping) -> "Device":
        """Rebuild a device from a candidate record's "transistor" block (id, polarity, hfe_min,
        hfe_typ, hfe_max, vce_sat, vceo_max, p_max and model{IS..TF, optional KF, AF}), without the catalog."""
        if not isinstance(transistor, Mapping):
            raise InputError.single(
                "transistor", transistor, "a mapping (the candidate's transistor block)", title="incomplete candidate"
            )
        model = transistor.get("model")
        if not isinstance(model, Mapping):
            raise InputError.single(
                "transistor.model", model, "a mapping with " + ", ".join(SPICE_KEYS), title="incomplete candidate"
            )
        top = [f.name for f in fields(cls) if f.name not in SPICE_KEYS + FLICKER_KEYS]
        missing = [Problem(f"transistor.{k}", MISSING, "a value is required") for k in top if k not in transistor]
        missing += [
            Problem(f"transistor.model.{k}", MISSING, "a value is required") for k in SPICE_KEYS if k not in model
        ]
        if missing:
            raise InputError(missing, title="incomplete candidate")
        return cls.from_row(
            {**{k: transistor[k] for k in top}, **{k: model[k] for k in SPICE_KEYS + FLICKER_KEYS if k in model}}
        )

    def record(self) -> dict:
        """The candidate record's "transistor" block (what from_record reads back)."""
        top = {f.name: getattr(self, f.name) for f in fields(self) if f.name not in SPICE_KEYS}
        return {**top, "model": self.spice_model()}

    def spice_model(self) -> dict[str, float]:
        """SPICE .model parameters (keys IS BF NF VAF RB CJE CJC TF KF AF)."""
        return {k: float(getattr(self, k)) for k in SPICE_KEYS + FLICKER_KEYS}

    @property
    def inv_vaf(self) -> float | np.ndarray:
        """1/VAF in 1/V (0 when VAF is 0 or infinite, as in SPICE; per candidate for a :func:`stack_devices`)."""
        if np.ndim(self.VAF):
            vaf = np.asarray(self.VAF)
            with np.errstate(divide="ignore"):
                return np.where((vaf <= 0) | np.isinf(vaf), 0.0, 1.0 / vaf)
        return 0.0 if self.VAF <= 0 or math.isinf(self.VAF) else 1.0 / self.VAF

    # ---- the device's own spread (tolerance.py draws it; the models take it as ``hfe``) ----
    @property
    def spread_typ(self) -> float:
        """The spread variable at the typical device: hFE typ."""
        return self.hfe_typ

    def spread_edges(self, temp_c: float) -> tuple[float, float]:
        """The spread variable at its two worst-case corners at temp_c (degC): hFE min and max."""
        factor = float(hfe_temperature_factor(temp_c))
        return self.hfe_min * factor, self.hfe_max * factor

    def spread_draw(self, position: np.ndarray, temp_c: np.ndarray) -> np.ndarray:
        """The spread variable of Monte Carlo builds at positions in [0, 1]: hFE log-uniform
        between min and max, times its rise with temperature (degC)."""
        log_hfe = np.log(self.hfe_min) + position * np.log(self.hfe_max / self.hfe_min)
        return np.exp(log_hfe) * hfe_temperature_factor(temp_c)


def thermal_voltage(temp_c: float | np.ndarray) -> float | np.ndarray:
    """kT/q in V at a temperature in degrees Celsius: a float for a scalar temperature, an array
    of its shape for an array (a temperature per element: the Monte Carlo builds)."""
    vt = BOLTZMANN * (np.asarray(temp_c, dtype=float) + KELVIN_OFFSET) / ELEMENTARY_CHARGE
    return float(vt) if vt.ndim == 0 else vt


def saturation_current(IS: float, temp_c: float | np.ndarray) -> float | np.ndarray:
    """SPICE IS(T) in A: IS*(T/Tnom)^XTI*exp(EG/VT(T)*(T/Tnom-1)), XTI=3, EG=1.11 eV, Tnom=27 C;
    a float for a scalar temperature, an array of its shape for an array."""
    t = np.asarray(temp_c, dtype=float) + KELVIN_OFFSET
    t_nom = SPICE_TNOM_C + KELVIN_OFFSET
    ratio = t / t_nom
    i_s = IS * np.exp((ratio - 1.0) * SPICE_EG / thermal_voltage(temp_c) + SPICE_XTI * np.log(ratio))
    return float(i_s) if i_s.ndim == 0 else i_s


def hfe_temperature_factor(temp_c: float | np.ndarray, ref_c: float = SPICE_TNOM_C) -> float | np.ndarray:
    """Multiplier of hFE at temp_c relative to ref_c (common practice: about +0.5 %/K)."""
    return (1.0 + HFE_TEMPCO) ** (np.asarray(temp_c, dtype=float) - ref_c)


# ----------------------------------------------------------------------------- JFETs

JFET_SPICE_KEYS = ("BETA", "VTO", "LAMBDA", "CGS", "CGD", "IS", "KF", "AF", "TCV", "BEX")
JFET_PB = 1.0  # V, SPICE default gate junction potential (PB)
JFET_M = 0.5  # grading of the gate junction capacitances (SPICE JFET level 1: square root)


@dataclass(frozen=True)
class JFET:
    """One n-channel JFET type: IDSS and pinch-off (VP) spread, ratings and SPICE JFET
    level-1 parameters (SI units).

    Square law in saturation: Id = BETA*(Vgs - VTO)^2*(1 + LAMBDA*Vds), so the typical
    IDSS = BETA*VTO^2 and VP = -VTO. The spread runs along the trade's line: a part of high
    IDSS has a high |VP| (both fall out of the same channel doping and width), so one
    position u in [0, 1] places a part, log-linearly from (idss_min, vp_min) at u = 0
    through the typical (BETA, VTO) at u = 0.5 to (idss_max, vp_max) at u = 1. Temperature
    as in SPICE: VTO(T) = VTO - TCV*(T - Tnom), BETA(T) = BETA*(T/Tnom)^BEX; the gate leakage
    is the two reverse-biased gate junctions, 2*IS(T), IS(T) = IS*exp((T/Tnom - 1)*EG/VT(T))
    (measured against ngspice's JFET: its gate current at 27 and 77 degC).
    """

    kind: ClassVar[str] = "jfet"
    NF: ClassVar[float] = 1.0  # gate junction emission coefficient (SPICE JFET level 1: 1)
    vce_sat: ClassVar[float] = 0.0  # no fixed saturation voltage: the stages judge Vds against Vgs - VTO

    id: str
    polarity: str
    idss_min: float  # A
    idss_max: float  # A
    vp_min: float  # V, pinch-off magnitude
    vp_max: float  # V
    vds_max: float  # V, drain-source (and gate-drain breakdown BVgss) rating
    p_max: float  # W
    BETA: float  # A/V^2
    VTO: float  # V, negative (n-channel)
    LAMBDA: float  # 1/V
    CGS: float  # F, zero-bias gate-source capacitance
    CGD: float  # F, zero-bias gate-drain capacitance
    IS: float  # A, gate junction saturation current
    KF: float = 0.0  # flicker noise: drain-current PSD KF*Id^AF/f (A^2/Hz); 0 = none
    AF: float = 1.0
    TCV: float = 0.0  # V/K
    BEX: float = 0.0

    _NUMBERS = ("idss_min", "idss_max", "vp_min", "vp_max", "vds_max", "p_max", *JFET_SPICE_KEYS)

    @classmethod
    def from_row(cls, row: Mapping) -> "JFET":
        """Build a JFET from a catalog row (or a record's flattened block); InputError naming each bad field."""
        where = f"jfet {row.get('id', '?')!s}"
        problems: list[Problem] = []
        values: dict[str, Any] = {
            "id": str(row.get("id", "")).strip(),
            "polarity": str(row.get("polarity", "")).strip().lower(),
        }
        optional = {"KF": 0.0, "AF": 1.0, "TCV": 0.0, "BEX": 0.0}
        for name in cls._NUMBERS:
            raw = row.get(name)
            if raw is None or (isinstance(raw, float) and math.isnan(raw)):
                if name in optional:
                    values[name] = optional[name]
                else:
                    problems.append(Problem(f"{where}.{name}", raw, "a value is required"))
                continue
            try:
                values[name] = float(raw)
            except (TypeError, ValueError):
                problems.append(Problem(f"{where}.{name}", raw, "a number in SI units"))
        if values["polarity"] != "njf":
            problems.append(Problem(f"{where}.polarity", values["polarity"], "'njf' (the JFET stages are n-channel)"))
        if not problems:
            for name in ("idss_min", "idss_max", "vp_min", "vp_max", "vds_max", "p_max", "BETA", "IS", "AF"):
                if not values[name] > 0:
                    problems.append(Problem(f"{where}.{name}", values[name], "a positive number"))
            for name in ("LAMBDA", "CGS", "CGD", "KF"):
                if values[name] < 0:
                    problems.append(Problem(f"{where}.{name}", values[name], "zero or a positive number"))
            if not values["VTO"] < 0:
                problems.append(Problem(f"{where}.VTO", values["VTO"], "a negative pinch-off voltage (n-channel)"))
        if not problems:
            idss, vp = values["BETA"] * values["VTO"] ** 2, -values["VTO"]
            if not values["idss_min"] <= idss <= values["idss_max"]:
                problems.append(
                    Problem(
                        f"{where}.BETA",
                        values["BETA"],
                        f"BETA*VTO^2 (the typical IDSS, now {idss:.4g} A) between idss_min "
                        f"{values['idss_min']} and idss_max {values['idss_max']}",
                    )
                )
            if not values["vp_min"] <= vp <= values["vp_max"]:
                problems.append(
                    Problem(
                        f"{where}.VTO",
                        values["VTO"],
                        f"-VTO between vp_min {values['vp_min']} and vp_max {values['vp_max']}",
                    )
                )
        if problems:
            raise InputError(problems, title="invalid jfet")
        return cls(**values)

    @classmethod
    def from_record(cls, transistor: Mapping) -> "JFET":
        """Rebuild from a candidate record's "transistor" block (ratings, ranges and model{BETA..BEX})."""
        model = transistor.get("model")
        if not isinstance(model, Mapping):
            raise InputError.single(
                "transistor.model", model, "a mapping with " + ", ".join(JFET_SPICE_KEYS), title="incomplete candidate"
            )
        return cls.from_row({**{k: v for k, v in transistor.items() if k != "model"}, **model})

    def record(self) -> dict:
        """The candidate record's "transistor" block: ratings, ranges, the derived datasheet
        figures (idss_typ, vp_typ, gfs, ciss, crss in SI units) and the SPICE model."""
        top = {
            k: getattr(self, k)
            for k in ("id", "polarity", "idss_min", "idss_max", "vp_min", "vp_max", "vds_max", "p_max")
        }
        return {
            **top,
            "kind": self.kind,
            "idss_typ": self.idss_typ,
            "vp_typ": -self.VTO,
            "gfs": self.gfs,
            "ciss": self.CGS + self.CGD,
            "crss": self.CGD,
            "model": self.spice_model(),
        }

    def spice_model(self) -> dict[str, float]:
        """SPICE NJF .model parameters (JFET_SPICE_KEYS)."""
        return {k: float(getattr(self, k)) for k in JFET_SPICE_KEYS}

    @property
    def idss_typ(self) -> float:
        """Typical IDSS (A): BETA*VTO^2."""
        return self.BETA * self.VTO**2

    @property
    def gfs(self) -> float:
        """Typical forward transconductance at IDSS (S): 2*BETA*|VTO| = 2*IDSS/VP."""
        return 2.0 * self.BETA * abs(self.VTO)

    @property
    def vceo_max(self) -> float:
        """The voltage rating the ratings table reads (V): here the drain-source rating."""
        return self.vds_max

    # ---- the device's own spread: u in [0, 1] along the IDSS/VP line, typical at 0.5 ----
    spread_typ: ClassVar[float] = 0.5

    def spread_edges(self, temp_c: float) -> tuple[float, float]:
        """The worst-case corners of the spread: the line's ends (lowest IDSS and VP, highest)."""
        return 0.0, 1.0

    def spread_draw(self, position: np.ndarray, temp_c: np.ndarray) -> np.ndarray:
        """Monte Carlo builds: the position itself (uniform along the line)."""
        return np.asarray(position, dtype=float)

    def params(self, u: np.ndarray, temp_c: float | np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(BETA (A/V^2), VTO (V)) of parts at positions u, at temp_c (degC)."""
        u = np.asarray(u, dtype=float)
        lo = u <= 0.5
        w = np.where(lo, 2.0 * u, 2.0 * u - 1.0)
        idss_a, idss_b = np.where(lo, self.idss_min, self.idss_typ), np.where(lo, self.idss_typ, self.idss_max)
        vp_a, vp_b = np.where(lo, self.vp_min, -self.VTO), np.where(lo, -self.VTO, self.vp_max)
        idss = idss_a * (idss_b / idss_a) ** w
        vp = vp_a * (vp_b / vp_a) ** w
        t, t_nom = np.asarray(temp_c, dtype=float) + KELVIN_OFFSET, SPICE_TNOM_C + KELVIN_OFFSET
        beta = idss / vp**2 * (t / t_nom) ** self.BEX
        vto = -vp - self.TCV * (t - t_nom)
        return beta, vto

    def gate_leakage(self, temp_c: float | np.ndarray) -> np.ndarray:
        """Gate current (A, out of the gate) of the two reverse-biased gate junctions: 2*IS(T)."""
        t, t_nom = np.asarray(temp_c, dtype=float) + KELVIN_OFFSET, SPICE_TNOM_C + KELVIN_OFFSET
        return 2.0 * self.IS * np.exp((t / t_nom - 1.0) * SPICE_EG / thermal_voltage(temp_c))


AnyDevice = Device | JFET
D = TypeVar("D", bound=AnyDevice)  # one kind of device, kept through stacking and slicing


def _numbers(device: AnyDevice) -> list[str]:
    """The device's numeric fields (every field but id and polarity)."""
    return [f.name for f in fields(device) if f.name not in ("id", "polarity")]


def stack_key(device: AnyDevice) -> tuple[str, str, bool]:
    """What devices that share a model call (:func:`stack_devices`) have in common: kind,
    polarity and whether they have flicker noise (a network with a flicker source integrates
    its noise on a denser grid, for every candidate of the call)."""
    return device.kind, device.polarity, bool(device.KF > 0)


def stack_devices(devices: Sequence[D], which: np.ndarray) -> D:
    """One device whose every numeric field is an array over candidates: candidate k takes
    ``devices[which[k]]``'s value. The models work on it as on one device (their arrays run
    along the candidates), so candidates of several devices of one :func:`stack_key` are one
    model call with the figures of a call per device. Its id is the devices' ids joined by '+'."""
    first = devices[0]
    if any(stack_key(d) != stack_key(first) for d in devices):
        raise ValueError("stack_devices takes devices of one kind, polarity and flicker noise (stack_key)")
    which = np.asarray(which)
    values = {name: np.array([getattr(d, name) for d in devices], dtype=float)[which] for name in _numbers(first)}
    return replace(first, id="+".join(d.id for d in devices), **values)


def is_stacked(device: AnyDevice) -> bool:
    """Whether ``device`` carries a value per candidate (:func:`stack_devices`)."""
    return bool(np.ndim(device.p_max))


def device_rows(device: D, rows: np.ndarray | slice) -> D:
    """A stacked device's candidates at ``rows`` (the device itself when it is not stacked)."""
    if not is_stacked(device):
        return device
    return replace(device, **{name: getattr(device, name)[rows] for name in _numbers(device)})


def device_columns(device: D) -> D:
    """A stacked device's values as columns (candidates, 1), beside parts made columns (the
    static transfer's samples run along the second axis); the device itself when it is not stacked."""
    if not is_stacked(device):
        return device
    return replace(device, **{name: getattr(device, name)[:, None] for name in _numbers(device)})


def device_from_row(row: Mapping) -> AnyDevice:
    """The device of a catalog row: a JFET for polarity njf, else a bipolar transistor."""
    return JFET.from_row(row) if str(row.get("polarity", "")).strip().lower() == "njf" else Device.from_row(row)


def device_from_record(transistor: Mapping) -> AnyDevice:
    """The device of a candidate record's "transistor" block (see :func:`device_from_row`)."""
    if isinstance(transistor, Mapping) and str(transistor.get("polarity", "")).strip().lower() == "njf":
        return JFET.from_record(transistor)
    return Device.from_record(transistor)
