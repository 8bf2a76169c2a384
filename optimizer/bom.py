"""Bill of materials and kitting of a candidate against a catalog's stock.

``kit(candidate, catalog, units)`` turns a candidate record into one line per distinct part
(resistors, capacitors and the transistor(s)), with the quantity for ``units`` builds, the
stock on hand, how many are short and the prices. Roles that use the same value share one
line, which is why designs that reuse values make short kits. Stock is read as the catalog
gives it: a blank stock cell means not tracked (never short).

Choice of catalog row for a value: the candidate's own ``part_id`` when it covers the whole
kit; otherwise the cheapest row of the same value that covers it and is no worse (tolerance
no wider, rating no lower) than the candidate's part; otherwise the candidate's part (or the
cheapest row of that value), flagged short.
"""
from __future__ import annotations

import io
import math
import numbers
from dataclasses import dataclass

import numpy as np
import pandas as pd

from optimizer.catalog import Catalog
from optimizer.errors import InputError, Problem
from optimizer.topologies import get_topology
from optimizer.units import format_value

MAX_UNITS = 100_000
VALUE_RTOL = 1e-6  # two values closer than this (relative) are the same value
KIND_ORDER = ("resistor", "capacitor", "transistor")
COLUMNS = ("part_id", "kind", "value", "label", "roles", "qty_per_unit", "qty_total", "stock",
           "short_by", "unit_price", "line_price", "note")
_RATING = {"resistor": "power_rating", "capacitor": "voltage_rating"}


@dataclass
class Kit:
    """A kit for ``units`` builds of one candidate: its lines, totals and a shortage flag."""

    lines: pd.DataFrame
    totals: dict
    short: bool
    units: int

    def to_csv(self) -> str:
        """The lines as CSV (header + one row per line; empty cell = unknown / not tracked)."""
        buffer = io.StringIO()
        self.lines.to_csv(buffer, index=False, lineterminator="\n")
        return buffer.getvalue()

    def to_dict(self) -> dict:
        """JSON-ready: {"units", "short", "totals", "lines": [...]}, with null for unknown values."""
        return {"units": self.units, "short": self.short, "totals": _plain(self.totals),
                "lines": [_plain(row) for row in self.lines.to_dict(orient="records")]}


def _plain(mapping: dict) -> dict:
    """Numpy / pandas scalars as Python values; NaN and pandas NA as None."""
    out = {}
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
        value = int(units)
    elif isinstance(units, str) and units.strip().isdigit():
        value = int(units.strip())
    if value is None or not 1 <= value <= MAX_UNITS:
        raise InputError.single("units", units, expected, title="invalid kit size")
    return value


def unique_values_array(parts: dict[str, np.ndarray]) -> np.ndarray:
    """Distinct resistor and capacitor values per candidate (vectorised over a leading axis).

    Roles starting with ``c_`` are capacitors, other non-``q`` roles resistors; a value of 0
    (an optional part left out) is not a part and does not count.
    """
    groups: dict[str, list[np.ndarray]] = {"r": [], "c": []}
    for role, values in parts.items():
        if role.startswith("q"):
            continue
        groups["c" if role.startswith("c_") else "r"].append(np.atleast_1d(np.asarray(values, dtype=float)))
    count: np.ndarray | int = 0
    for arrays in groups.values():
        if not arrays:
            continue
        v = np.sort(np.stack(np.broadcast_arrays(*arrays), axis=-1), axis=-1)
        present = v > 0
        new = np.ones_like(present)
        new[..., 1:] = ~np.isclose(v[..., 1:], v[..., :-1], rtol=VALUE_RTOL, atol=0)
        count = count + (present & new).sum(axis=-1)
    return np.asarray(count)


def unique_values(parts: dict[str, float]) -> int:
    """Distinct resistor and capacitor values of one design (0 = absent part, not counted)."""
    return int(unique_values_array({k: np.array([v], dtype=float) for k, v in parts.items()})[0])


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
        ["unit_price", "_stock", "part_id"], ascending=[True, False, True])
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


def _line(kind: str, value: float | None, label: str, roles: list[str], per_unit: int, units: int,
          row: pd.Series | None, catalog: Catalog, note: str) -> dict:
    total = per_unit * units
    stock = _stock(row)
    short_by = 0 if stock is None else max(0, total - int(stock))
    unit_price = None if row is None else float(row["unit_price"])
    if row is None:
        note = f"not in catalog {catalog.name}"
    elif short_by:
        note = "; ".join(n for n in (note, f"short by {short_by} (stock {int(stock)})") if n)
    return {"part_id": None if row is None else str(row[("id" if kind == "transistor" else "part_id")]),
            "kind": kind, "value": value, "label": label, "roles": ",".join(roles),
            "qty_per_unit": per_unit, "qty_total": total, "stock": stock, "short_by": short_by,
            "unit_price": unit_price, "line_price": None if unit_price is None else round(unit_price * total, 6),
            "note": note}


def _candidate_parts(candidate: dict) -> tuple[list[tuple[str, str, float, str | None]], dict, int]:
    """(role, kind, value, part_id) of every present passive, the transistor block and its count."""
    problems: list[Problem] = []
    if not isinstance(candidate, dict):
        raise InputError.single("candidate", type(candidate).__name__, "a candidate record (a mapping)",
                                title="incomplete candidate record")
    parts, transistor = candidate.get("parts"), candidate.get("transistor")
    if not isinstance(parts, dict):
        problems.append(Problem("parts", parts, "a mapping role -> {value, label, part_id}"))
    if not isinstance(transistor, dict) or not transistor.get("id"):
        problems.append(Problem("transistor.id", None if not isinstance(transistor, dict) else transistor.get("id"),
                                "the transistor id"))
    if "topology" not in candidate:
        problems.append(Problem("topology", None, "a topology name"))
    if problems:
        raise InputError(problems, title="incomplete candidate record")
    topology = get_topology(candidate["topology"])
    out = []
    for role, entry in parts.items():
        value = entry.get("value") if isinstance(entry, dict) else None
        try:
            value = float(value)
        except (TypeError, ValueError):
            raise InputError.single(f"parts.{role}.value", value, "a number (ohm or F)",
                                    title="incomplete candidate record") from None
        if value > 0:  # 0 = an optional part left out
            out.append((role, "capacitor" if role.startswith("c_") else "resistor", value, entry.get("part_id")))
    return out, transistor, topology.transistors


def kit(candidate: dict, catalog: Catalog, units: int) -> Kit:
    """The kit for ``units`` builds of ``candidate`` against ``catalog``'s stock."""
    units = check_units(units)
    passives, transistor, n_q = _candidate_parts(candidate)
    frames = {"resistor": catalog.resistors, "capacitor": catalog.capacitors}
    groups: dict[tuple[str, float], list[tuple[str, str | None]]] = {}
    for role, kind, value, part_id in passives:
        key = next((k for k in groups if k[0] == kind and math.isclose(k[1], value, rel_tol=VALUE_RTOL)),
                   (kind, value))
        groups.setdefault(key, []).append((role, part_id))
    lines = []
    for (kind, value), members in groups.items():
        roles = [role for role, _ in members]
        wanted = next((pid for _, pid in members if pid), None)
        row, note = _choose_row(_same_value(frames[kind], value), wanted, kind, len(roles) * units)
        label = format_value(value, "F" if kind == "capacitor" else "")
        lines.append(_line(kind, value, label, roles, len(roles), units, row, catalog, note))
    rows = catalog.transistors[catalog.transistors["id"] == transistor["id"]]
    roles = [f"q{i + 1}" for i in range(n_q)]
    lines.append(_line("transistor", None, str(transistor["id"]), roles, n_q, units,
                       None if rows.empty else rows.iloc[0], catalog, ""))
    frame = pd.DataFrame.from_records(lines, columns=list(COLUMNS))
    frame["_kind"] = frame["kind"].map(KIND_ORDER.index)
    frame = frame.sort_values(["_kind", "value"], kind="stable").drop(columns="_kind").reset_index(drop=True)
    frame = frame.astype({"value": "float64", "stock": "Int64", "unit_price": "float64",
                          "line_price": "float64"})
    short_lines = int((frame["short_by"] > 0).sum())
    priced = frame["line_price"].notna()
    totals = {"parts_per_unit": int(frame["qty_per_unit"].sum()), "parts_total": int(frame["qty_total"].sum()),
              "cost_per_unit": round(float((frame["unit_price"] * frame["qty_per_unit"])[priced].sum()), 6),
              "cost_total": round(float(frame["line_price"][priced].sum()), 6),
              "currency": catalog.currency, "lines": len(frame), "lines_short": short_lines,
              "lines_unpriced": int((~priced).sum()), "catalog": catalog.name}
    return Kit(lines=frame, totals=totals, short=short_lines > 0, units=units)
