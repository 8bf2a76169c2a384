"""Kitting a candidate against a catalog's stock (optimizer/bom.py).

Reference for the arithmetic: common practice of kitting, quantity for the kit = quantity per
unit x units, short by = max(0, quantity - on hand), line price = unit price x quantity; the
stock and prices are read straight from the catalog's CSV files with the csv module (not
through optimizer.catalog).
"""

from __future__ import annotations

import csv
import io
import json
from pathlib import Path

import numpy as np
import pytest

from optimizer.bom import COLUMNS, MAX_UNITS, Kit, kit
from optimizer.candidates import assess
from optimizer.catalog import load_catalog
from optimizer.errors import InputError
from optimizer.scoring import unique_values, unique_values_array
from optimizer.spec import load_spec

ROOT = Path(__file__).resolve().parent.parent
BENCH = ROOT / "parts_catalogs" / "bench_stock"

# divider_ce from bench stock: r_bottom and r_collector share 10k; 100k's cheapest row
# (DR-R061) holds 25, its 1 % row (DR-R062) 150.
SHARED = {"r_top": 100e3, "r_bottom": 10e3, "r_collector": 10e3, "r_emitter": 1e3}
# divider_ce_split: 180 ohm is in no drawer, 1k5's drawer (DR-R030) is empty, 8k2 holds 3.
# Capacitors given, so the lines do not move with the sizing: c_in and c_emitter electrolytics,
# c_out film.
SPLIT = {
    "r_top": 220e3,
    "r_bottom": 47e3,
    "r_collector": 8.2e3,
    "r_emitter": 180,
    "r_emitter_dc": 1.5e3,
    "c_in": 2.2e-6,
    "c_emitter": 100e-6,
    "c_out": 1e-6,
}


def _csv_rows(name: str, key: str = "part_id") -> dict[str, dict[str, str]]:
    with (BENCH / name).open(newline="", encoding="utf-8") as handle:
        return {row[key]: row for row in csv.DictReader(handle)}


CSV_ROWS = {**_csv_rows("resistors.csv"), **_csv_rows("capacitors.csv"), **_csv_rows("transistors.csv", "id")}


@pytest.fixture(scope="module")
def spec():
    return load_spec(ROOT / "specs" / "bench_stock_preamp.yaml")


@pytest.fixture(scope="module")
def bench():
    return load_catalog("bench_stock")


@pytest.fixture(scope="module")
def shared(spec, bench) -> dict:
    return assess(spec, bench, "divider_ce", SHARED, samples=50)


@pytest.fixture(scope="module")
def split(spec, bench) -> dict:
    return assess(spec, bench, "divider_ce_split", SPLIT, samples=50)


def _line(k: Kit, roles: str) -> dict:
    match = [row for row in k.lines.to_dict(orient="records") if row["roles"] == roles]
    assert len(match) == 1, k.lines
    return match[0]


def test_repeated_values_share_one_line(shared: dict, bench) -> None:
    k = kit(shared, bench, 10)
    line = _line(k, "r_bottom,r_collector")
    assert line["qty_per_unit"] == 2 and line["qty_total"] == 20
    assert line["value"] == pytest.approx(10e3)
    values = {role: part["value"] for role, part in shared["parts"].items()}
    assert len(k.lines) == unique_values(values) + 1  # + the transistor line
    assert k.totals["parts_per_unit"] == len(shared["parts"]) + 1
    assert k.totals["parts_total"] == 10 * k.totals["parts_per_unit"]


def test_quantities_stock_and_prices_match_the_csv(shared: dict, bench) -> None:
    units = 30
    k = kit(shared, bench, units)
    for line in k.lines.to_dict(orient="records"):
        row = CSV_ROWS[line["part_id"]]
        assert line["qty_total"] == line["qty_per_unit"] * units
        assert line["stock"] == int(row["stock_qty"])
        assert line["short_by"] == max(0, line["qty_total"] - int(row["stock_qty"]))
        assert line["unit_price"] == pytest.approx(float(row["unit_price"]))
        assert line["line_price"] == pytest.approx(float(row["unit_price"]) * line["qty_total"])
    assert k.totals["cost_total"] == pytest.approx(k.lines["line_price"].sum())
    assert k.totals["cost_per_unit"] == pytest.approx(k.totals["cost_total"] / units)
    assert k.totals["currency"] == "EUR"


def test_short_stock_uses_an_equal_or_better_row_of_the_same_value(shared: dict, bench) -> None:
    assert shared["parts"]["r_top"]["part_id"] == "DR-R061"  # cheapest 100k, 25 in the drawer
    line = _line(kit(shared, bench, 30), "r_top")
    assert line["part_id"] == "DR-R062" and line["short_by"] == 0  # 1 %, 150 on hand
    assert "DR-R062 instead of DR-R061" in line["note"]
    assert _line(kit(shared, bench, 20), "r_top")["part_id"] == "DR-R061"  # enough: kept


def test_kit_beyond_every_drawer_is_flagged_short(shared: dict, bench) -> None:
    k = kit(shared, bench, 200)
    top, tens = _line(k, "r_top"), _line(k, "r_bottom,r_collector")
    assert (top["part_id"], top["short_by"]) == ("DR-R061", 200 - 25)
    assert (tens["part_id"], tens["short_by"]) == ("DR-R044", 400 - 250)
    assert "short by 150" in tens["note"]
    assert k.short and k.totals["lines_short"] == int((k.lines["short_by"] > 0).sum()) >= 2


def test_bench_stock_preamp_short_and_missing_parts(split: dict, bench) -> None:
    k = kit(split, bench, 25)
    missing = _line(k, "r_emitter")
    assert missing["part_id"] is None or missing["part_id"] != missing["part_id"]  # None / NaN
    assert missing["note"] == "not in catalog bench_stock"
    assert missing["short_by"] == 25 and missing["stock"] == 0
    empty = _line(k, "r_emitter_dc")  # in the catalog, drawer empty
    assert (empty["part_id"], empty["stock"], empty["short_by"]) == ("DR-R030", 0, 25)
    few = _line(k, "r_collector")
    assert (few["part_id"], few["short_by"]) == ("DR-R043", 25 - 3)
    assert k.short and k.totals["lines_unpriced"] == 1
    # the unpriced line is left out of the cost, never turned into NaN
    assert k.totals["cost_total"] == pytest.approx(k.lines["line_price"].dropna().sum())


def test_two_transistors_of_ce_follower_are_one_line(spec, bench) -> None:
    record = assess(
        spec,
        bench,
        "ce_follower",
        {"r_top": 270e3, "r_bottom": 18e3, "r_collector": 6.8e3, "r_emitter": 220, "r_follower": 3.9e3},
        samples=20,
    )
    line = _line(kit(record, bench, 4), "q1,q2")
    assert (line["kind"], line["part_id"]) == ("transistor", "npn-general")
    assert (line["qty_per_unit"], line["qty_total"]) == (2, 8)
    assert line["stock"] == int(CSV_ROWS["npn-general"]["stock_qty"])


def test_unknown_transistor_is_a_short_line(shared: dict, bench) -> None:
    record = {**shared, "transistor": {**shared["transistor"], "id": "no-such-npn"}}
    line = _line(kit(record, bench, 3), "q1")
    assert line["note"] == "not in catalog bench_stock" and line["short_by"] == 3


def test_untracked_stock_is_never_short(shared: dict) -> None:
    full = load_catalog("eseries_full")  # no stock limits
    k = kit(shared, full, MAX_UNITS)
    assert not k.short and k.lines["stock"].isna().all()
    assert k.to_dict()["lines"] and all(line["stock"] is None for line in k.to_dict()["lines"])


def test_csv_has_comments_then_the_header_and_one_row_per_line(split: dict, bench, spec) -> None:
    k = kit(split, bench, 25, spec)
    text = k.to_csv()
    comments = [line for line in text.splitlines() if line.startswith("#")]
    assert text.splitlines()[: len(comments)] == comments  # the comments lead
    assert comments[0].startswith(f'# stagefit BOM: spec "{spec.name}" (digest ')
    assert f"# basis: {split['basis']['label']}" in comments
    unstated = kit({k: v for k, v in split.items() if k != "basis"}, bench, 25, spec).to_csv()
    assert "# basis: basis not stated" in unstated.splitlines()  # a record that states no basis
    assert split["cautions"] and all(f"# caution: {c}" in comments for c in split["cautions"])
    rows = list(csv.reader(io.StringIO(k.to_csv(comments=False))))
    assert rows == list(csv.reader(line for line in text.splitlines() if not line.startswith("#")))
    assert rows[0] == list(COLUMNS)
    assert len(rows) == len(k.lines) + 1
    by_roles = {row[COLUMNS.index("roles")]: dict(zip(COLUMNS, row)) for row in rows[1:]}
    assert by_roles["r_emitter"]["part_id"] == "" and by_roles["r_emitter"]["unit_price"] == ""
    assert by_roles["r_collector"]["qty_total"] == "25" and by_roles["r_collector"]["short_by"] == "22"


def test_json_has_no_nan(split: dict, bench) -> None:
    data = kit(split, bench, 25).to_dict()
    text = json.dumps(data, allow_nan=False)  # raises on NaN / inf
    back = json.loads(text)
    assert back["short"] is True and back["units"] == 25
    q = next(line for line in back["lines"] if line["kind"] == "transistor")
    assert q["value"] is None and isinstance(q["stock"], int)
    missing = next(line for line in back["lines"] if line["roles"] == "r_emitter")
    assert missing["part_id"] is None and missing["unit_price"] is None and missing["line_price"] is None


@pytest.mark.parametrize("units", [0, -1, MAX_UNITS + 1, 2.5, True, "many", None, "3.0"])
def test_bad_units_name_the_field(units: object, shared: dict, bench) -> None:
    with pytest.raises(InputError) as err:
        kit(shared, bench, units)  # type: ignore[arg-type]
    assert err.value.problems[0].where == "units"


@pytest.mark.parametrize("units", [1, 25.0, "25", np.int64(7)])
def test_whole_numbers_of_units_are_accepted(units: object, shared: dict, bench) -> None:
    assert kit(shared, bench, units).units == int(units)  # type: ignore[arg-type]


def test_incomplete_candidate_is_bad_input(shared: dict, bench) -> None:
    with pytest.raises(InputError) as err:
        kit({k: v for k, v in shared.items() if k != "parts"}, bench, 1)
    assert err.value.problems[0].where == "parts"


def test_unique_values_counts_distinct_passives() -> None:
    assert (
        unique_values(
            {"r_top": 100e3, "r_bottom": 10e3, "r_collector": 10e3, "r_emitter": 1e3, "c_in": 1e-6, "c_out": 1e-6}
        )
        == 4
    )
    assert (
        unique_values({"r_feedback": 1e6, "r_collector": 1e4, "r_emitter": 0.0, "c_in": 1e-6, "c_out": 4.7e-7}) == 4
    )  # an absent optional part is no value
    counts = unique_values_array(
        {"r_top": np.array([1e3, 1e3]), "r_bottom": np.array([1e3, 2e3]), "c_in": np.array([1e-6, 1e-6])}
    )
    assert counts.tolist() == [2, 3]


def test_designators_follow_the_netlist_and_lines_are_ordered(split: dict, bench) -> None:
    # divider_ce_split's netlist order: c_in, r_top, r_bottom, r_collector, r_emitter, r_emitter_dc,
    # c_emitter, c_out (optimizer/netlist.py): R1..R5, C1..C3, then Q1
    lines = kit(split, bench, 1).to_dict()["lines"]
    assert [line["designators"] for line in lines] == ["R1", "R2", "R3", "R4", "R5", "C1", "C2", "C3", "Q1"]
    assert [line["roles"] for line in lines][:5] == ["r_top", "r_bottom", "r_collector", "r_emitter", "r_emitter_dc"]
    shared_line = _line(
        kit(
            assess(load_spec(ROOT / "specs" / "bench_stock_preamp.yaml"), bench, "divider_ce", SHARED, samples=20),
            bench,
            1,
        ),
        "r_bottom,r_collector",
    )
    assert shared_line["designators"] == "R2,R3" and shared_line["qty_per_unit"] == 2


def test_electrolytic_plus_side_follows_the_dc_bias(split: dict, bench) -> None:
    # Common practice: an aluminium electrolytic's + terminal goes to the more positive DC node.
    # c_in sits between the source (0 V DC) and the base (a divider voltage above 0), c_emitter
    # between the emitter resistors' junction (above 0) and ground.
    lines = {line["roles"]: line for line in kit(split, bench, 1).to_dict()["lines"]}
    op = split["operating_point"]
    assert lines["c_in"]["technology"] == "aluminium electrolytic" and lines["c_in"]["polarised"]
    assert lines["c_in"]["orientation"].startswith("C1: + toward Q1's base")
    assert f"({op['v_base']:.2f} V DC)" in lines["c_in"]["orientation"]
    assert lines["c_emitter"]["orientation"].startswith("C2: + toward the emitter resistors' junction")
    assert lines["c_out"]["orientation"] == ""  # film: not polarised
    assert all(line["rating"] for line in lines.values() if line["part_id"]) and any(
        line["part_id"] for line in lines.values()
    )


def test_class2_only_when_the_spec_allows_it_and_then_cautioned(bench, spec) -> None:
    # bench_stock's 100n: an X7R (cheaper, 300 in the drawer) and a film part; by default the film
    # one, with allow_class2_coupling the X7R, and the kit says so.
    from optimizer.spec import parse_spec, spec_to_dict

    assert bench.part_for("capacitor", 100e-9)["dielectric"] == "film"
    assert bench.part_for("capacitor", 100e-9, allow_class2=True)["dielectric"] == "X7R"
    allowing = parse_spec(
        {**spec_to_dict(spec), "parts": {**spec_to_dict(spec)["parts"], "allow_class2_coupling": True}}
    )
    parts = {**SHARED, "c_in": 100e-9, "c_out": 100e-9}
    default = kit(assess(spec, bench, "divider_ce", parts, samples=20), bench, 1, spec)
    assert set(default.lines[default.lines["kind"] == "capacitor"]["technology"]) == {"film"}
    assert not any("class-2" in c for c in default.cautions)
    allowed = kit(assess(allowing, bench, "divider_ce", parts, samples=20), bench, 1, allowing)
    assert set(allowed.lines[allowed.lines["kind"] == "capacitor"]["technology"]) == {"X7R"}
    assert any("class-2 ceramic (X7R)" in c for c in allowed.cautions)
    assert any("class-2" in line for line in allowed.to_csv().splitlines() if line.startswith("# caution"))
    assert any("class-2" in c for c in allowed.to_dict()["cautions"])


def test_every_node_of_every_template_has_words_for_the_assembler() -> None:
    # an orientation note names both ends of a polarised capacitor: no template node left as its
    # netlist name (the rails are named by their true voltage: ground, the positive or negative rail)
    from optimizer.bom import _NODE_WORDS
    from optimizer.topologies import TOPOLOGIES

    nodes = {n for t in TOPOLOGIES.values() for _, a, b in t.elements for n in (a, b)}
    assert nodes - set(_NODE_WORDS) == {"vcc", "0"}
