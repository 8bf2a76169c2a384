"""Bill of materials and kitting of a candidate against a catalog's stock.

``kit(candidate, catalog, units, spec)`` turns a candidate record into one line per distinct
part (resistors, capacitors and the transistor(s)) a buyer can order from and an assembler
can build from: reference designators, roles, value, tolerance, rating, package, dielectric or
technology, the orientation of polarised parts, the quantity for ``units`` builds, the stock on
hand, how many are short and the prices. Roles that use the same value share one line, which
is why designs that reuse values make short kits. Stock is read as the catalog gives it: a
blank stock cell means not tracked (never short).

Designators are the netlist's (:func:`optimizer.netlist.designators`): R1.. and C1.. in the
order of the topology's netlist elements, Q1, Q2; lines are ordered resistors, capacitors,
transistors, each by its first designator. An electrolytic's ``+`` goes to the terminal at
the higher DC voltage, computed from the candidate's operating point.

Choice of catalog row for a value: the candidate's own ``part_id`` when it covers the whole
kit; otherwise the cheapest row of the same value that covers it and is no worse (tolerance
no wider, rating no lower) than the candidate's part; otherwise the candidate's part (or the
cheapest row of that value), flagged short. Capacitor rows that are class-2 ceramics are
never chosen unless the spec sets ``parts.allow_class2_coupling`` (and then the kit cautions).

Exports carry the design's identity (spec name and digest, catalog, topology, device, rank),
its basis (the candidate's ``basis`` label, "basis not stated" without one) and its
cautions: in the JSON as keys, in the CSV as leading ``#`` comment lines before the header.
"""

from __future__ import annotations

import io
import math
import numbers
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from optimizer.candidates import design_from_record
from optimizer.catalog import VALUE_RTOL, Catalog, is_class2
from optimizer.errors import MISSING, InputError, Problem
from optimizer.limits import MAX_UNITS
from optimizer.netlist import dc_node_voltages, designators, element_nodes
from optimizer.spec import Spec, spec_digest
from optimizer.topologies import get_topology
from optimizer.units import format_value

KIND_ORDER = ("resistor", "capacitor", "transistor")
COLUMNS = (
    "designators",
    "kind",
    "roles",
    "part_id",
    "value",
    "label",
    "tolerance",
    "rating",
    "package",
    "technology",
    "polarised",
    "orientation",
    "qty_per_unit",
    "qty_total",
    "stock",
    "short_by",
    "unit_price",
    "line_price",
    "note",
)
NO_BASIS = "basis not stated"
BIAS_FLOOR = 0.1  # V: below this DC across an electrolytic, the bias does not set its orientation
# What a node is, in words an assembler follows on the board.
_NODE_WORDS = {
    "src": "the input (source side)",
    "out": "the output (load side)",
    "base": "Q1's base",
    "collector": "Q1's collector",
    "emitter": "Q1's emitter",
    "e2": "the emitter resistors' junction",
    "emitter2": "Q2's emitter",
    "collector2": "Q2's collector",
    "efb": "the junction of r_emitter and c_feedback",
    "mid": "the bias divider's midpoint",
    "gate": "Q1's gate",
    "drain": "Q1's drain",
    "source": "Q1's source",
    "s2": "the source resistors' junction",
    "tap": "the junction of r_source and r_follower",
}
_RATING = {"resistor": "power_rating", "capacitor": "voltage_rating"}


@dataclass
class Kit:
    """A kit for ``units`` builds of one candidate: its lines, totals and a shortage flag."""

    lines: pd.DataFrame
    totals: dict
    short: bool
    units: int
    identity: dict = field(default_factory=dict)
    basis: str = NO_BASIS
    cautions: list[str] = field(default_factory=list)

    def comment_lines(self) -> list[str]:
        """The identity, basis and cautions as text lines (the CSV's leading comments)."""
        ident = self.identity
        spec = f'spec "{ident["spec"]}" (digest {ident["spec_digest"]})' if ident.get("spec") else "spec not given"
        rank = f", rank {ident['rank']}" if ident.get("rank") is not None else ""
        return [
            f"stagefit BOM: {spec}, catalog {ident.get('catalog')}, {ident.get('topology')} with "
            f"{ident.get('device')}{rank}, {self.units} unit(s)",
            f"basis: {self.basis}",
        ] + [f"caution: {c}" for c in self.cautions]

    def to_csv(self, comments: bool = True) -> str:
        """The lines as CSV: with ``comments`` first the identity, basis and cautions as lines
        starting with ``#``, then the header and one row per line (empty cell = unknown or
        not tracked)."""
        buffer = io.StringIO()
        if comments:
            buffer.writelines(f"# {line}\n" for line in self.comment_lines())
        self.lines.to_csv(buffer, index=False, lineterminator="\n")
        return buffer.getvalue()

    def to_dict(self) -> dict:
        """JSON-ready: {"design", "basis", "cautions", "units", "short", "totals", "lines": [...]},
        with null for unknown values."""
        return {
            "design": dict(self.identity),
            "basis": self.basis,
            "cautions": list(self.cautions),
            "units": self.units,
            "short": self.short,
            "totals": _plain(self.totals),
            "lines": [_plain(row) for row in self.lines.to_dict(orient="records")],
        }


def _plain(mapping: dict) -> dict:
    """Numpy / pandas scalars as Python values; NaN and pandas NA as None."""
    out: dict = {}
    for key, value in mapping.items():
        if value is None or value is pd.NA or (isinstance(value, float) and math.isnan(value)):
            out[key] = None
        elif isinstance(value, np.generic):
            item = value.item()
            out[key] = None if isinstance(item, float) and math.isnan(item) else item
        else:
            out[key] = value
    return out


def check_units(units: object) -> int:
    """``units`` as an int in 1..MAX_UNITS (ints, integral floats and digit strings accepted)."""
    expected = f"a whole number of builds from 1 to {MAX_UNITS}"
    value: int | None = None
    if isinstance(units, bool):
        value = None
    elif isinstance(units, numbers.Integral):
        value = int(units)
    elif isinstance(units, numbers.Real) and float(units).is_integer():
        value = int(float(units))
    elif isinstance(units, str) and units.strip().isdigit():
        value = int(units.strip())
    if value is None or not 1 <= value <= MAX_UNITS:
        raise InputError.single("units", units, expected, title="invalid kit size")
    return value


# ---- kitting ----------------------------------------------------------------------------


def _same_value(frame: pd.DataFrame, value: float) -> pd.DataFrame:
    return frame[np.isclose(frame["value"].to_numpy(dtype=float), value, rtol=VALUE_RTOL, atol=0)]


def _covers(row: pd.Series, qty: int) -> bool:
    return pd.isna(row["stock_qty"]) or int(row["stock_qty"]) >= qty


def _choose_row(rows: pd.DataFrame, wanted_id: str | None, kind: str, qty: int) -> tuple[pd.Series | None, str]:
    """The catalog row for a kit line among ``rows`` (all of one value) and a note."""
    if rows.empty:
        return None, ""
    wanted = rows[rows["part_id"] == wanted_id] if wanted_id else rows.iloc[:0]
    if not wanted.empty and _covers(wanted.iloc[0], qty):
        return wanted.iloc[0], ""
    ok = rows
    if not wanted.empty:  # a substitute must be no worse than the candidate's part
        ref = wanted.iloc[0]
        ok = rows[(rows["tolerance"] <= ref["tolerance"]) & (rows[_RATING[kind]] >= ref[_RATING[kind]])]
    ranked = ok.assign(_stock=ok["stock_qty"].astype("Float64").fillna(np.inf)).sort_values(
        ["unit_price", "_stock", "part_id"], ascending=[True, False, True]
    )
    covering = [row for _, row in ranked.iterrows() if _covers(row, qty)]
    if covering:
        chosen = covering[0].drop("_stock")
        note = f"{chosen['part_id']} instead of {wanted_id}, which is short" if not wanted.empty else ""
        return chosen, note
    if not wanted.empty:
        return wanted.iloc[0], ""
    return ranked.iloc[0].drop("_stock"), ""


def _stock(row: pd.Series | None) -> int | None:
    if row is None:
        return 0
    return None if pd.isna(row["stock_qty"]) else int(row["stock_qty"])


def _describe(kind: str, row: pd.Series | None) -> dict:
    """Tolerance, rating, package and technology of a catalog row, as labels with units."""
    if row is None:
        return {"tolerance": "", "rating": "", "package": "", "technology": "", "polarised": False}
    if kind == "transistor" and str(row["polarity"]).lower() == "njf":
        return {
            "tolerance": f"IDSS {format_value(float(row['idss_min']), 'A')}..{format_value(float(row['idss_max']), 'A')}, "
            f"VP {format_value(float(row['vp_min']), 'V')}..{format_value(float(row['vp_max']), 'V')}",
            "rating": f"Vds {format_value(float(row['vds_max']), 'V')}, {format_value(float(row['p_max']), 'W')}",
            "package": "",
            "technology": "N-channel JFET",
            "polarised": True,
        }
    if kind == "transistor":
        return {
            "tolerance": f"hFE {row['hfe_min']:g}..{row['hfe_max']:g}",
            "rating": f"Vceo {format_value(float(row['vceo_max']), 'V')}, {format_value(float(row['p_max']), 'W')}",
            "package": "",
            "technology": f"{str(row['polarity']).upper()} bipolar transistor",
            "polarised": True,
        }
    tolerance = f"{100 * float(row['tolerance']):g} %"
    if kind == "resistor":
        return {
            "tolerance": tolerance,
            "rating": format_value(float(row["power_rating"]), "W"),
            "package": str(row["package"]),
            "technology": "",
            "polarised": False,
        }
    return {
        "tolerance": tolerance,
        "rating": format_value(float(row["voltage_rating"]), "V"),
        "package": "",
        "technology": str(row["dielectric"]),
        "polarised": bool(row["polarised"]),
    }


def _orientation(
    roles: list[str], nodes: dict[str, tuple[str, ...]], volts: dict[str, float], names: dict[str, str]
) -> str:
    """Which way round a polarised capacitor goes, from the DC voltage at its two nodes. The
    template's rails (``vcc`` and ``0``, the stage drawn as NPN on a positive rail) are named by
    their true voltage: ground, the positive rail or the negative rail."""
    words = {**_NODE_WORDS, **{rail: _rail_word(volts[rail]) for rail in ("vcc", "0")}}
    out = []
    for role in roles:
        a, b = nodes[role][:2]
        high, low = (a, b) if volts[a] >= volts[b] else (b, a)
        drop = volts[high] - volts[low]
        if drop < BIAS_FLOOR:
            out.append(
                f"{names[role]}: {drop:.2f} V DC across it, no bias to set its polarity: "
                "use a bipolar (non-polarised) part"
            )
        else:
            out.append(
                f"{names[role]}: + toward {words.get(high, high)} ({volts[high]:.2f} V DC), "
                f"- toward {words.get(low, low)} ({volts[low]:.2f} V DC)"
            )
    return "; ".join(out)


def _rail_word(volts: float) -> str:
    """A rail as an assembler names it, from its true DC voltage (V)."""
    return "ground" if volts == 0 else "the positive rail" if volts > 0 else "the negative rail"


def _line(
    kind: str,
    value: float | None,
    label: str,
    roles: list[str],
    names: dict[str, str],
    per_unit: int,
    units: int,
    row: pd.Series | None,
    catalog: Catalog,
    note: str,
    orientation: str = "",
) -> dict:
    total = per_unit * units
    stock = _stock(row)
    short_by = 0 if stock is None else max(0, total - int(stock))
    unit_price = None if row is None else float(row["unit_price"])
    if row is None:
        note = f"not in catalog {catalog.name}"
    elif short_by:
        note = "; ".join(n for n in (note, f"short by {short_by} (stock {stock})") if n)
    described = _describe(kind, row)
    return {
        "designators": ",".join(names[r] for r in roles),
        "kind": kind,
        "roles": ",".join(roles),
        "part_id": None if row is None else str(row[("id" if kind == "transistor" else "part_id")]),
        "value": value,
        "label": label,
        **described,
        "orientation": orientation if described["polarised"] and kind == "capacitor" else "",
        "qty_per_unit": per_unit,
        "qty_total": total,
        "stock": stock,
        "short_by": short_by,
        "unit_price": unit_price,
        "line_price": None if unit_price is None else round(unit_price * total, 6),
        "note": note,
    }


def _candidate_parts(candidate: dict) -> tuple[list[tuple[str, str, float, str | None]], dict, int]:
    """(role, kind, value, part_id) of every present passive, the transistor block and its count."""
    problems: list[Problem] = []
    if not isinstance(candidate, dict):
        raise InputError.single(
            "candidate", type(candidate).__name__, "a candidate record (a mapping)", title="incomplete candidate record"
        )
    parts, transistor = candidate.get("parts"), candidate.get("transistor")
    if not isinstance(parts, dict):
        problems.append(Problem("parts", parts, "a mapping role -> {value, label, part_id}"))
    if not isinstance(transistor, dict) or not transistor.get("id"):
        problems.append(
            Problem(
                "transistor.id", None if not isinstance(transistor, dict) else transistor.get("id"), "the transistor id"
            )
        )
    if "topology" not in candidate:
        problems.append(Problem("topology", MISSING, "a topology name"))
    if problems or not isinstance(parts, dict) or not isinstance(transistor, dict):
        raise InputError(problems, title="incomplete candidate record")
    topology = get_topology(candidate["topology"])
    out = []
    for role, entry in parts.items():
        given: Any = entry.get("value") if isinstance(entry, dict) else None  # checked by float() below
        try:
            value = float(given)
        except (TypeError, ValueError):
            raise InputError.single(
                f"parts.{role}.value", given, "a number (ohm or F)", title="incomplete candidate record"
            ) from None
        if value > 0:  # 0 = an optional part left out
            out.append((role, "capacitor" if role.startswith("c_") else "resistor", value, entry.get("part_id")))
    return out, transistor, topology.transistors


def _node_volts(candidate: dict) -> dict[str, float]:
    """DC voltage of every node of the candidate's stage, from its nominal operating point."""
    topology, parts, device, conditions = design_from_record(candidate)
    op = topology.operating_point(parts, device, conditions)
    return dc_node_voltages(
        topology.name,
        {k: float(np.asarray(v).reshape(-1)[0]) for k, v in op.items()},
        conditions.supply,
        device.polarity,
        conditions.below_ground,
    )


def _class2_cautions(frame: pd.DataFrame) -> list[str]:
    rows = frame[(frame["kind"] == "capacitor") & frame["technology"].map(is_class2).astype(bool)]
    return [
        f"{r.designators} ({r.roles}) is a class-2 ceramic ({r.technology}) in the signal path, allowed by "
        "parts.allow_class2_coupling: its capacitance falls with DC bias and it adds distortion; "
        "film or C0G is the usual choice"
        for r in rows.itertuples()
    ]


def kit(candidate: dict, catalog: Catalog, units: int, spec: Spec | None = None) -> Kit:
    """The kit for ``units`` builds of ``candidate`` against ``catalog``'s stock; ``spec``
    (the spec it was designed for) names the kit and says whether class-2 ceramics may
    stand in the signal path (``parts.allow_class2_coupling``; without a spec, never)."""
    units = check_units(units)
    passives, transistor, n_q = _candidate_parts(candidate)
    allow_class2 = bool(spec is not None and spec.parts.allow_class2_coupling)
    frames = {"resistor": catalog.resistors.frame(), "capacitor": catalog.signal_capacitors(allow_class2).frame()}
    values = {role: value for role, _, value, _ in passives}
    names = designators(candidate["topology"], values)
    nodes = element_nodes(candidate["topology"])
    volts: dict[str, float] | None = None
    groups: dict[tuple[str, float], list[tuple[str, str | None]]] = {}
    for role, kind, value, part_id in passives:
        key = next((k for k in groups if k[0] == kind and math.isclose(k[1], value, rel_tol=VALUE_RTOL)), (kind, value))
        groups.setdefault(key, []).append((role, part_id))
    lines = []
    for (kind, value), members in groups.items():
        roles = sorted((role for role, _ in members), key=lambda r: int(names[r][1:]))
        wanted = next((pid for _, pid in members if pid), None)
        row, note = _choose_row(_same_value(frames[kind], value), wanted, kind, len(roles) * units)
        label = format_value(value, "F" if kind == "capacitor" else "")
        orientation = ""
        if row is not None and kind == "capacitor" and bool(row["polarised"]):
            volts = volts or _node_volts(candidate)
            orientation = _orientation(roles, nodes, volts, names)
        lines.append(_line(kind, value, label, roles, names, len(roles), units, row, catalog, note, orientation))
    transistors = catalog.transistors.frame()
    rows = transistors[transistors["id"] == transistor["id"]]
    roles = [f"q{i + 1}" for i in range(n_q)]
    lines.append(
        _line(
            "transistor",
            None,
            str(transistor["id"]),
            roles,
            names,
            n_q,
            units,
            None if rows.empty else rows.iloc[0],
            catalog,
            "",
        )
    )
    frame = pd.DataFrame.from_records(lines, columns=list(COLUMNS))
    frame["_kind"] = frame["kind"].map(KIND_ORDER.index)
    frame["_first"] = frame["designators"].map(lambda d: int(d.split(",")[0][1:]))
    frame = frame.sort_values(["_kind", "_first"], kind="stable").drop(columns=["_kind", "_first"])
    frame = frame.reset_index(drop=True).astype(
        {"value": "float64", "stock": "Int64", "unit_price": "float64", "line_price": "float64"}
    )
    short_lines = int((frame["short_by"] > 0).sum())
    priced = frame["line_price"].notna()
    totals = {
        "parts_per_unit": int(frame["qty_per_unit"].sum()),
        "parts_total": int(frame["qty_total"].sum()),
        "cost_per_unit": round(float((frame["unit_price"] * frame["qty_per_unit"])[priced].sum()), 6),
        "cost_total": round(float(frame["line_price"][priced].sum()), 6),
        "currency": catalog.currency,
        "lines": len(frame),
        "lines_short": short_lines,
        "lines_unpriced": int((~priced).sum()),
        "catalog": catalog.name,
    }
    identity = {
        "spec": None if spec is None else spec.name,
        "spec_digest": None if spec is None else spec_digest(spec),
        "catalog": catalog.name,
        "topology": candidate["topology"],
        "device": transistor["id"],
        "rank": candidate.get("rank"),
    }
    basis = (candidate.get("basis") or {}).get("label") or NO_BASIS
    cautions = [str(c) for c in candidate.get("cautions", [])] + _class2_cautions(frame)
    return Kit(
        lines=frame,
        totals=totals,
        short=short_lines > 0,
        units=units,
        identity=identity,
        basis=basis,
        cautions=cautions,
    )
