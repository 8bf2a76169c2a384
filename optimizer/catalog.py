"""Parts catalogs: resistors, capacitors and transistors with stock, read from CSV.

A catalog is a directory ``parts_catalogs/<name>/`` holding ``resistors.csv``,
``capacitors.csv``, ``transistors.csv`` and ``catalog.yaml``; the columns and their
units are documented in ``parts_catalogs/README.md``. Values are SI without prefixes
(ohm, F, V, W, A, s); a value cell may use engineering notation ("4k7", "100n").
Every malformed cell of a file is reported at once, each with file, line and column.

The files are read with the stdlib csv module into :class:`Table` (numpy columns), so a
search does not import pandas; :meth:`Table.frame` gives a table as a pandas DataFrame for
the tools that want one (the BOM, the REST service's catalog listing).
"""

from __future__ import annotations

import bisect
import csv
import functools
import math
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import TYPE_CHECKING, Callable, Iterable

import numpy as np
import yaml

from optimizer import eseries
from optimizer.bundled import catalog_dir
from optimizer.devices import JFET
from optimizer.errors import MISSING, InputError, Problem
from optimizer.units import parse_quantity

if TYPE_CHECKING:  # pandas is imported by Table.frame only
    import pandas as pd

CATALOG_DIR: Path = catalog_dir()  # the checkout's parts_catalogs/ or the installed package's

VALUE_RTOL = 1e-6  # two part values closer than this (relative) are the same value

#: Continuous rating (W at 70 °C) of a thick-film chip resistor by package (common practice);
#: a resistor row with a blank power_rating takes its package's, and may not claim more.
PACKAGE_POWER: dict[str, float] = {
    "0201": 0.05,
    "0402": 0.063,
    "0603": 0.1,
    "0805": 0.125,
    "1206": 0.25,
    "1210": 0.5,
    "2010": 0.75,
    "2512": 1.0,
}
#: Class-2 ceramic dielectrics (EIA RS-198): capacitance moves with DC bias, temperature and age
#: and the part adds distortion, so by default none sits where the signal develops voltage.
CLASS2_DIELECTRICS: frozenset[str] = frozenset({"x5r", "x6s", "x7r", "x7s", "x8r", "y5v", "z5u"})


def is_class2(dielectric: object) -> bool:
    """True for a class-2 ceramic dielectric name (X7R, X5R, Y5V, ...; case ignored)."""
    return str(dielectric).strip().lower() in CLASS2_DIELECTRICS


def _cell_quantity(unit: str | None, *, positive: bool = True) -> Callable[[str, str], float]:
    """Parser for a required physical quantity in ``unit`` (SI, no prefix)."""

    def parse(text: str, where: str) -> float:
        value = parse_quantity(text, unit, where=where)
        if positive and not value > 0:
            raise InputError.single(where, text, f"a value above zero, in {unit}")
        return value

    return parse


def _cell_optional_quantity(unit: str | None, *, positive: bool = False) -> Callable[[str, str], float]:
    """Parser for an optional quantity in ``unit`` (SI, no prefix), >= 0 (> 0 with ``positive``);
    an empty cell is NaN (not given)."""
    required = _cell_quantity(unit, positive=False)

    def parse(text: str, where: str) -> float:
        if not text.strip():
            return math.nan
        value = required(text, where)
        if value < 0 or (positive and value == 0):
            raise InputError.single(
                where, text, f"{'a positive value' if positive else 'zero or a positive value'}, in {unit}, or empty"
            )
        return value

    return parse


def _cell_tolerance(text: str, where: str) -> float:
    """Fraction in (0, 0.5]; "1%" is read as 0.01."""
    expected = "a fraction in (0, 0.5], e.g. 0.05 or 5%"
    stripped = text.strip()
    try:
        value = float(stripped[:-1]) / 100 if stripped.endswith("%") else float(stripped)
    except ValueError:
        raise InputError.single(where, text, expected) from None
    if not 0 < value <= 0.5:
        raise InputError.single(where, text, expected)
    return value


def _cell_stock(text: str, where: str) -> int | None:
    """Integer count >= 0; blank means not tracked (unlimited)."""
    if not text.strip():
        return None
    try:
        value = int(text.strip())
    except ValueError:
        value = -1
    if value < 0:
        raise InputError.single(where, text, "a whole number >= 0, or blank for not tracked")
    return value


def _cell_text(text: str, where: str) -> str:
    if not text.strip():
        raise InputError.single(where, text, "a non-empty text")
    return text.strip()


def _cell_optional_text(text: str, where: str) -> str:
    return text.strip()


def _cell_series(text: str, where: str) -> str:
    name = text.strip().upper()
    try:
        eseries.base_values(name)
    except (KeyError, ValueError):
        raise InputError.single(where, text, "an E-series name: E3, E6, E12, E24, E48, E96 or E192") from None
    return name


def _cell_choice(*choices: str) -> Callable[[str, str], str]:
    def parse(text: str, where: str) -> str:
        value = text.strip().lower()
        if value not in choices:
            raise InputError.single(where, text, "one of " + ", ".join(choices))
        return value

    return parse


def _cell_bool(text: str, where: str) -> bool:
    value = text.strip().lower()
    if value not in ("true", "false"):
        raise InputError.single(where, text, "true or false")
    return value == "true"


_RESISTOR_COLUMNS: dict[str, Callable] = {
    "part_id": _cell_text,
    "value": _cell_quantity("ohm"),
    "series": _cell_series,
    "tolerance": _cell_tolerance,
    "power_rating": _cell_optional_quantity("W", positive=True),
    "package": _cell_text,
    "unit_price": _cell_quantity(None, positive=False),
    "stock_qty": _cell_stock,
}
_CAPACITOR_COLUMNS: dict[str, Callable] = {
    "part_id": _cell_text,
    "value": _cell_quantity("F"),
    "tolerance": _cell_tolerance,
    "voltage_rating": _cell_quantity("V"),
    "dielectric": _cell_text,
    "polarised": _cell_bool,
    "unit_price": _cell_quantity(None, positive=False),
    "stock_qty": _cell_stock,
}
_TRANSISTOR_COLUMNS: dict[str, Callable] = {
    "id": _cell_text,
    "polarity": _cell_choice("npn", "pnp"),
    "hfe_min": _cell_quantity(""),
    "hfe_typ": _cell_quantity(""),
    "hfe_max": _cell_quantity(""),
    "IS": _cell_quantity("A"),
    "BF": _cell_quantity(""),
    "NF": _cell_quantity(""),
    "VAF": _cell_quantity("V"),
    "RB": _cell_quantity("ohm", positive=False),
    "CJE": _cell_quantity("F", positive=False),
    "CJC": _cell_quantity("F", positive=False),
    "TF": _cell_quantity("s", positive=False),
    "vce_sat": _cell_quantity("V"),
    "vceo_max": _cell_quantity("V"),
    "p_max": _cell_quantity("W"),
    "KF": _cell_optional_quantity(""),  # SPICE flicker-noise coefficient (empty or 0: none)
    "AF": _cell_optional_quantity(""),  # SPICE flicker-noise exponent (empty: 1)
    "description": _cell_optional_text,
    "unit_price": _cell_quantity(None, positive=False),
    "stock_qty": _cell_stock,
}


def _cell_signed(unit: str) -> Callable[[str, str], float]:
    """Parser for a plain signed number in ``unit`` (SI, no prefix), e.g. a pinch-off voltage -0.9."""

    def parse(text: str, where: str) -> float:
        try:
            value = float(text.strip())
        except ValueError:
            raise InputError.single(where, text, f"a signed number in {unit or 'plain units'}, e.g. -0.9") from None
        if not math.isfinite(value):
            raise InputError.single(where, text, f"a finite signed number in {unit or 'plain units'}")
        return value

    return parse


#: jfets.csv (optional file): n-channel JFETs, IDSS/VP ranges, ratings and SPICE JFET level-1
#: parameters (devices.JFET); its rows join the transistors table (polarity njf, the BJT
#: columns empty there), so a spec names a JFET in ``devices`` like any transistor.
_JFET_COLUMNS: dict[str, Callable] = {
    "id": _cell_text,
    "polarity": _cell_choice("njf"),
    "idss_min": _cell_quantity("A"),
    "idss_max": _cell_quantity("A"),
    "vp_min": _cell_quantity("V"),
    "vp_max": _cell_quantity("V"),
    "BETA": _cell_quantity("A/V^2"),
    "VTO": _cell_signed("V"),
    "LAMBDA": _cell_quantity("1/V", positive=False),
    "CGS": _cell_quantity("F", positive=False),
    "CGD": _cell_quantity("F", positive=False),
    "IS": _cell_quantity("A"),
    "KF": _cell_optional_quantity(""),
    "AF": _cell_optional_quantity(""),
    "TCV": _cell_quantity("V/K", positive=False),
    "BEX": _cell_signed(""),
    "vds_max": _cell_quantity("V"),
    "p_max": _cell_quantity("W"),
    "description": _cell_optional_text,
    "unit_price": _cell_quantity(None, positive=False),
    "stock_qty": _cell_stock,
}
_META_KEYS = ("name", "description", "currency", "stock_tracked")
_OPTIONAL_COLUMNS = frozenset({"KF", "AF"})  # may be left out of the header


@dataclass(frozen=True)
class Table:
    """The rows of one catalog file, column by column, in file order: a numpy array per
    column, float64 for a quantity (NaN where blank or absent) and object for text, flags
    and stock counts (None where blank: stock not tracked). Shared through the catalog
    cache: do not modify the arrays."""

    columns: dict[str, np.ndarray]

    @classmethod
    def from_records(cls, records: list[dict], names: Iterable[str]) -> "Table":
        """A table of ``records`` (dicts of parsed cells; a key left out is a blank cell) with
        the columns ``names`` in that order; a column is float64 when it has cells given and
        every one is a float (an all-blank column, such as untracked stock, is object)."""
        columns = {}
        for name in names:
            cells = [r.get(name) for r in records]
            given = [c for c in cells if c is not None]
            if given and all(isinstance(c, float) for c in given):
                columns[name] = np.array([math.nan if c is None else c for c in cells], dtype=float)
            else:
                column = np.empty(len(cells), dtype=object)
                column[:] = cells
                columns[name] = column
        return cls(columns)

    def __getitem__(self, name: str) -> np.ndarray:
        return self.columns[name]

    def __len__(self) -> int:
        return next(iter(self.columns.values())).size if self.columns else 0

    def where(self, mask: np.ndarray) -> "Table":
        """The rows where the boolean ``mask`` holds, in order."""
        return Table({name: column[mask] for name, column in self.columns.items()})

    def take(self, index: np.ndarray) -> "Table":
        """The rows at ``index`` (a negative index: a row with every cell blank)."""
        index = np.asarray(index, dtype=int)
        missing = index < 0
        out = {}
        for name, column in self.columns.items():
            picked = column[np.where(missing, 0, index)] if column.size else np.empty(index.size, column.dtype)
            picked[missing] = math.nan if column.dtype == float else None
            out[name] = picked
        return Table(out)

    def row(self, i: int) -> dict:
        """Row ``i`` as plain Python values, a blank cell as None."""
        out: dict[str, object] = {}
        for name, column in self.columns.items():
            value = column[i]
            if value is None or (isinstance(value, float) and math.isnan(value)):
                out[name] = None
            else:
                out[name] = value.item() if isinstance(value, np.generic) else value
        return out

    def rows(self) -> list[dict]:
        """Every row as :meth:`row` gives it."""
        return [self.row(i) for i in range(len(self))]

    def joined(self, other: "Table") -> "Table":
        """This table's rows, then ``other``'s; the columns of both (this one's first), a
        column one of them lacks blank in its rows."""
        names = list(self.columns) + [n for n in other.columns if n not in self.columns]
        return Table.from_records(self.rows() + other.rows(), names)

    def frame(self) -> "pd.DataFrame":
        """The table as a pandas DataFrame (imports pandas): stock_qty as nullable Int64."""
        import pandas as pd

        frame = pd.DataFrame.from_records(self.rows(), columns=list(self.columns))
        if "stock_qty" in frame:
            frame["stock_qty"] = frame["stock_qty"].astype("Int64")
        return frame


def _read_table(path: Path, label: str, columns: dict[str, Callable], key: str) -> tuple[Table, list[Problem]]:
    """Read one CSV file; return its rows as a :class:`Table` and every problem found."""
    problems: list[Problem] = []
    with path.open(newline="", encoding="utf-8") as handle:
        reader = csv.reader(handle)
        header = [h.strip() for h in next(reader, [])]
        for name in header:
            if name not in columns:
                problems.append(
                    Problem(f"{label} line 1, column {name}", name, "a known column: " + ", ".join(columns))
                )
        for name in columns:
            if name not in header and name not in _OPTIONAL_COLUMNS:
                problems.append(
                    Problem(
                        f"{label} line 1, column {name}",
                        None,
                        f"a column named {name!r} (required: {', '.join(columns)})",
                    )
                )
        records: list[dict] = []
        first_line: dict[str, int] = {}
        for cells in reader:
            line = reader.line_num
            if not any(c.strip() for c in cells):
                continue
            if len(cells) != len(header):
                problems.append(Problem(f"{label} line {line}", len(cells), f"{len(header)} fields, as in the header"))
                continue
            record: dict = {}
            for name, text in zip(header, cells):
                if name not in columns:
                    continue
                try:
                    record[name] = columns[name](text, f"{label} line {line}, column {name}")
                except InputError as err:
                    problems.extend(err.problems)
            if key in record:
                if record[key] in first_line:
                    problems.append(
                        Problem(
                            f"{label} line {line}, column {key}",
                            record[key],
                            f"a {key} not used before (already on line {first_line[record[key]]})",
                        )
                    )
                else:
                    first_line[record[key]] = line
            if {"hfe_min", "hfe_typ", "hfe_max"} <= record.keys():
                lo, typ, hi = record["hfe_min"], record["hfe_typ"], record["hfe_max"]
                if lo > hi:
                    problems.append(Problem(f"{label} line {line}, column hfe_max", hi, f"hfe_max >= hfe_min ({lo:g})"))
                elif not lo <= typ <= hi:
                    problems.append(
                        Problem(
                            f"{label} line {line}, column hfe_typ",
                            typ,
                            f"hfe_typ between hfe_min ({lo:g}) and hfe_max ({hi:g})",
                        )
                    )
            if "series" in record and "value" in record and not _value_in_series(record["value"], record["series"]):
                problems.append(
                    Problem(
                        f"{label} line {line}, column value", record["value"], f"a value of series {record['series']}"
                    )
                )
            if "package" in record and "power_rating" in columns:
                problems += _package_power(record, f"{label} line {line}, column power_rating")
            records.append(record)
    return Table.from_records(records, columns), problems


def _package_power(record: dict, where: str) -> list[Problem]:
    """Fill a blank power_rating from the package; refuse a rating above the package's."""
    customary = PACKAGE_POWER.get(str(record["package"]).strip().lower())
    given = record.get("power_rating")
    if given is None or math.isnan(given):
        if customary is None:
            return [
                Problem(
                    where,
                    "",
                    f"a power rating in W: package {record['package']!r} has no customary "
                    f"rating (known: {', '.join(PACKAGE_POWER)})",
                )
            ]
        record["power_rating"] = customary
    elif customary is not None and given > customary * (1 + VALUE_RTOL):
        return [
            Problem(
                where,
                given,
                f"at most {customary:g} W, the customary rating of a {record['package']} "
                "chip resistor (common practice); leave it blank to use that",
            )
        ]
    return []


@functools.lru_cache(maxsize=None)
def _series_members(series: str) -> list[float]:
    """Every value of E-series ``series`` from 1e-15 to 1e15 (SI), ascending: computed once,
    since a catalog checks each row's value against its series."""
    return eseries.series_values(series, 1e-15, 1e15).tolist()


def _value_in_series(value: float, series: str) -> bool:
    """Whether ``value`` is a member of E-series ``series``: within VALUE_RTOL of one (as
    np.isclose with atol 0); only the two members around it can be."""
    members = _series_members(series)
    at = bisect.bisect_left(members, value)
    return any(abs(value - m) <= VALUE_RTOL * m for m in members[max(at - 1, 0) : at + 1])


def _in_series(values: np.ndarray, series: str) -> np.ndarray:
    """Boolean mask: which ``values`` are members of E-series ``series``."""
    return np.array([_value_in_series(float(v), series) for v in values], dtype=bool)


@dataclass(frozen=True)
class Catalog:
    """A loaded parts catalog. Shared through a cache: do not modify the tables."""

    name: str
    description: str
    resistors: Table
    capacitors: Table
    transistors: Table
    currency: str = "EUR"
    stock_tracked: bool = False
    _picks: dict = field(default_factory=dict, compare=False, repr=False)

    def _values(
        self, table: Table, series: str | None, low: float | None, high: float | None, in_stock_only: bool
    ) -> np.ndarray:
        rows = table.where(_in_stock(table)) if in_stock_only else table
        values = np.unique(rows["value"])
        if low is not None:
            values = values[values >= low * (1 - VALUE_RTOL)]
        if high is not None:
            values = values[values <= high * (1 + VALUE_RTOL)]
        if series is not None:
            values = values[_in_series(values, series.upper())]
        return values

    def resistor_values(
        self,
        series: str | None = None,
        low: float | None = None,
        high: float | None = None,
        in_stock_only: bool = False,
    ) -> np.ndarray:
        """Sorted unique resistor values (ohm), optionally members of ``series`` only
        (by value, so an E24 row of 4.7 kohm counts as E12), within [low, high] ohm,
        and only rows with stock (blank stock = unlimited)."""
        return self._values(self.resistors, series, low, high, in_stock_only)

    def capacitor_values(
        self,
        series: str | None = None,
        low: float | None = None,
        high: float | None = None,
        in_stock_only: bool = False,
        allow_class2: bool = False,
    ) -> np.ndarray:
        """Sorted unique capacitor values (F); filters as :meth:`resistor_values`. Without
        ``allow_class2`` only values with a row that is not a class-2 ceramic count (every
        capacitor of the stages is in the signal path)."""
        return self._values(self.signal_capacitors(allow_class2), series, low, high, in_stock_only)

    def signal_capacitors(self, allow_class2: bool = False) -> Table:
        """The capacitor rows that may sit in the signal path: all of them with
        ``allow_class2``, else every row but the class-2 ceramics."""
        if allow_class2:
            return self.capacitors
        return self.capacitors.where(np.array([not is_class2(d) for d in self.capacitors["dielectric"]], dtype=bool))

    def transistor(self, id: str) -> dict:
        """The transistor row ``id`` as a dict (SI units; a blank cell None)."""
        match = np.flatnonzero(self.transistors["id"] == id)
        if match.size == 0:
            raise InputError.single(
                "transistor",
                id,
                "one of " + ", ".join(self.transistors["id"]),
                title=f"unknown transistor in catalog {self.name}",
            )
        return self.transistors.row(int(match[0]))

    def _cheapest_in_stock(self, kind: str, allow_class2: bool, voltage_min: float = 0.0) -> Table:
        """The row part_for picks for each value in stock (sorted by value); cached."""
        key = (kind, allow_class2 or kind == "resistor", voltage_min if kind == "capacitor" else 0.0)
        if key not in self._picks:
            self._picks[key] = self._cheapest(kind, allow_class2, key[2])
        return self._picks[key]

    def _cheapest(self, kind: str, allow_class2: bool, voltage_min: float) -> Table:
        table = self.resistors if kind == "resistor" else self.signal_capacitors(allow_class2)
        stocked = np.flatnonzero(_in_stock(table))
        value, price, stock, part_id = (table[c] for c in ("value", "unit_price", "stock_qty", "part_id"))
        rating = table["voltage_rating"] if kind == "capacitor" else np.full(len(table), math.inf)

        def short_of(i: np.integer) -> float:  # V below voltage_min (0: rated for it); a blank rating counts as 0 V
            return max(0.0, voltage_min - (rating[i] if rating[i] is not None else 0.0))

        # by value, then rated for voltage_min before not (the higher rated first among those that
        # are not), then price, then the larger stock (blank = unlimited: largest), then part id
        order = sorted(
            stocked,
            key=lambda i: (value[i], short_of(i), price[i], -(math.inf if stock[i] is None else stock[i]), part_id[i]),
        )
        first = [i for n, i in enumerate(order) if n == 0 or value[i] != value[order[n - 1]]]
        return table.take(np.array(first, dtype=int))

    def part_for(
        self, role_kind: str, value: float, *, allow_class2: bool = False, voltage_min: float = 0.0
    ) -> dict | None:
        """The cheapest in-stock row of ``role_kind`` ("resistor" or "capacitor") with
        ``value`` (ohm or F); ties go to the larger stock. No class-2 ceramic unless
        ``allow_class2``. A capacitor rated at least ``voltage_min`` (V) where the value has one
        in stock, else the highest rated of the value. None if none is in stock."""
        row = self.parts_for(role_kind, np.array([value]), allow_class2=allow_class2, voltage_min=voltage_min).row(0)
        return None if row["part_id"] is None else row

    def parts_for(
        self, role_kind: str, values: np.ndarray, *, allow_class2: bool = False, voltage_min: float = 0.0
    ) -> Table:
        """The row :meth:`part_for` picks for each of ``values``, one table row per value
        (every cell blank where no row with that value is in stock)."""
        if role_kind not in ("resistor", "capacitor"):
            raise InputError.single("role_kind", role_kind, "resistor or capacitor")
        best = self._cheapest_in_stock(role_kind, bool(allow_class2), float(voltage_min))
        wanted = np.asarray(values, dtype=float)
        known = best["value"]
        if known.size == 0:
            return best.take(np.full(wanted.size, -1))
        i = (
            np.clip(np.searchsorted(known, wanted), 1, max(known.size - 1, 1))
            if known.size > 1
            else np.zeros(wanted.size, dtype=int)
        )
        below = np.maximum(i - 1, 0)
        nearer = np.where(np.abs(known[below] - wanted) <= np.abs(known[i] - wanted), below, i)
        match = np.isclose(known[nearer], wanted, rtol=VALUE_RTOL, atol=0)
        return best.take(np.where(match, nearer, -1))

    def summary(self) -> dict:
        """Counts, value ranges (SI), series present, transistor ids and stock totals."""

        def stock_total(table: Table) -> int | None:
            counts = [s for s in table["stock_qty"] if s is not None]
            return int(sum(counts)) if counts else None

        def value_range(table: Table) -> list[float] | None:
            return [float(table["value"].min()), float(table["value"].max())] if len(table) else None

        return {
            "name": self.name,
            "description": self.description,
            "currency": self.currency,
            "stock_tracked": self.stock_tracked,
            "resistors": {
                "count": len(self.resistors),
                "unique_values": int(np.unique(self.resistors["value"]).size),
                "range": value_range(self.resistors),
                "series": sorted(set(self.resistors["series"]), key=lambda s: int(s[1:])),
                "stock_total": stock_total(self.resistors),
            },
            "capacitors": {
                "count": len(self.capacitors),
                "unique_values": int(np.unique(self.capacitors["value"]).size),
                "range": value_range(self.capacitors),
                "dielectrics": sorted(set(self.capacitors["dielectric"])),
                "stock_total": stock_total(self.capacitors),
            },
            "transistors": {
                "count": len(self.transistors),
                "devices": list(self.transistors["id"]),
                "stock_total": stock_total(self.transistors),
            },
        }


def _in_stock(table: Table) -> np.ndarray:
    """Rows with stock above zero or stock not tracked (blank = unlimited)."""
    return np.array([s is None or s > 0 for s in table["stock_qty"]], dtype=bool)


def _read_meta(path: Path, label: str) -> tuple[dict, list[Problem]]:
    try:
        meta = yaml.safe_load(path.read_text(encoding="utf-8"))
    except yaml.YAMLError as err:
        return {}, [Problem(label, str(err).splitlines()[0], "valid YAML")]
    if not isinstance(meta, dict):
        return {}, [Problem(label, meta, "a mapping with keys " + ", ".join(_META_KEYS))]
    problems = [Problem(f"{label} key {k}", MISSING, "a value for this key") for k in _META_KEYS if k not in meta]
    problems += [
        Problem(f"{label} key {k}", k, "one of the keys " + ", ".join(_META_KEYS)) for k in meta if k not in _META_KEYS
    ]
    if "stock_tracked" in meta and not isinstance(meta["stock_tracked"], bool):
        problems.append(Problem(f"{label} key stock_tracked", meta["stock_tracked"], "true or false"))
    return meta, problems


def load_catalog_dir(path: Path) -> Catalog:
    """Load and validate the catalog in directory ``path`` (for tests and tools)."""
    path = Path(path)
    prefix = f"parts_catalogs/{path.name}"
    problems: list[Problem] = []
    files = {
        "catalog.yaml": None,
        "resistors.csv": ("part_id", _RESISTOR_COLUMNS),
        "capacitors.csv": ("part_id", _CAPACITOR_COLUMNS),
        "transistors.csv": ("id", _TRANSISTOR_COLUMNS),
    }
    missing = [name for name in files if not (path / name).is_file()]
    if missing:
        raise InputError(
            [Problem(f"{prefix}/{name}", MISSING, "this file must exist") for name in missing],
            title="incomplete parts catalog",
        )
    meta, meta_problems = _read_meta(path / "catalog.yaml", f"{prefix}/catalog.yaml")
    problems += meta_problems
    tables = {}
    for name, (key, columns) in ((n, spec) for n, spec in files.items() if spec):
        tables[name], found = _read_table(path / name, f"{prefix}/{name}", columns, key)
        problems += found
    transistors = tables["transistors.csv"]
    if (path / "jfets.csv").is_file():
        jfets, found = _read_table(path / "jfets.csv", f"{prefix}/jfets.csv", _JFET_COLUMNS, "id")
        problems += found
        for row in [] if found else jfets.rows():
            try:
                JFET.from_row(row)  # the typical point inside the ranges, VTO negative
            except InputError as err:
                problems += [replace(p, where=f"{prefix}/jfets.csv {p.where}") for p in err.problems]
        clash = set(jfets["id"]) & set(transistors["id"])
        problems += [Problem(f"{prefix}/jfets.csv id", i, "an id not used in transistors.csv") for i in clash]
        transistors = transistors.joined(jfets)
    if problems:
        raise InputError(problems, title=f"invalid parts catalog {path.name}")
    return Catalog(
        name=str(meta["name"]),
        description=str(meta["description"]).strip(),
        resistors=tables["resistors.csv"],
        capacitors=tables["capacitors.csv"],
        transistors=transistors,
        currency=str(meta["currency"]),
        stock_tracked=meta["stock_tracked"],
    )


def list_catalogs() -> list[str]:
    """Names of the catalogs under :data:`CATALOG_DIR`, sorted."""
    if not CATALOG_DIR.is_dir():
        return []
    return sorted(p.name for p in CATALOG_DIR.iterdir() if (p / "catalog.yaml").is_file())


def load_catalog(name: str) -> Catalog:
    """The catalog called ``name`` (a name from :func:`list_catalogs`, never a path)."""
    known = list_catalogs()
    if name not in known:
        raise InputError.single(
            "catalog", name, "one of " + (", ".join(known) or "(no catalogs found)"), title="unknown parts catalog"
        )
    return _load_cached(CATALOG_DIR / name)


@functools.lru_cache(maxsize=16)
def _load_cached(path: Path) -> Catalog:
    return load_catalog_dir(path)
