"""Parts catalogs: the shipped catalogs, row validation and part choice."""

from __future__ import annotations

import importlib.util
import math
import shutil
from pathlib import Path

import numpy as np
import pytest

from optimizer import eseries
from optimizer.catalog import CATALOG_DIR, list_catalogs, load_catalog, load_catalog_dir
from optimizer.errors import InputError

ROOT = Path(__file__).resolve().parent.parent


def test_shipped_catalogs_load_sorted() -> None:
    assert {"bench_stock", "eseries_full"} <= set(list_catalogs())
    for name in ("bench_stock", "eseries_full"):
        catalog = load_catalog(name)
        for values in (catalog.resistor_values(), catalog.capacitor_values()):
            assert values.size > 10 and np.all(np.diff(values) > 0)
        assert "npn-general" in set(catalog.transistors["id"])


def test_full_catalog_values_belong_to_their_series() -> None:
    # IEC 60063 membership, through optimizer.eseries (itself checked against the standard).
    frame = load_catalog("eseries_full").resistors.frame()
    for series, group in frame.groupby("series"):
        values = group["value"].to_numpy(dtype=float)
        np.testing.assert_allclose(eseries.nearest(series, values), values, rtol=1e-12)
    assert frame["stock_qty"].isna().all()


def test_generated_catalog_is_reproducible(tmp_path: Path) -> None:
    spec = importlib.util.spec_from_file_location(
        "generate_full_catalog", ROOT / "scripts" / "generate_full_catalog.py"
    )
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    module.generate(tmp_path / "eseries_full")
    for name in ("resistors.csv", "capacitors.csv", "transistors.csv"):
        assert (tmp_path / "eseries_full" / name).read_bytes() == (CATALOG_DIR / "eseries_full" / name).read_bytes()


def test_in_stock_filter_and_cheapest_part() -> None:
    bench = load_catalog("bench_stock")
    everything, in_stock = bench.resistor_values(), bench.resistor_values(in_stock_only=True)
    assert set(in_stock) < set(everything)
    part = bench.part_for("resistor", 10e3)
    assert part is not None and part["stock_qty"] > 0
    resistors = bench.resistors.frame()
    same_value = resistors[np.isclose(resistors["value"], 10e3)]
    stocked = same_value[same_value["stock_qty"] > 0]
    assert part["unit_price"] == stocked["unit_price"].min()


def test_a_capacitor_value_takes_the_cheapest_part_rated_for_the_highest_rail() -> None:
    # bench_stock (its capacitors.csv read here): 10 uF as DR-C019 (25 V, 0.10) and DR-C020 (50 V,
    # 0.14); 220 uF only as DR-C024 (16 V)
    bench = load_catalog("bench_stock")
    assert bench.part_for("capacitor", 10e-6)["part_id"] == "DR-C019"  # no need stated: the cheapest
    assert bench.part_for("capacitor", 10e-6, voltage_min=25.0)["part_id"] == "DR-C019"  # 25 V covers 25 V
    assert bench.part_for("capacitor", 10e-6, voltage_min=31.5)["part_id"] == "DR-C020"  # the 50 V one
    assert bench.part_for("capacitor", 220e-6, voltage_min=31.5)["part_id"] == "DR-C024"  # none rated: the best
    # 1 uF: DR-C015 film 63 V has no stock, DR-C016 is class 2: with class 2 allowed, the X7R one
    assert bench.part_for("capacitor", 1e-6, allow_class2=True, voltage_min=31.5)["part_id"] == "DR-C016"


def test_the_search_prices_and_rates_a_capacitor_as_the_part_rated_for_the_supply() -> None:
    from optimizer.scoring import capacitor_rating_wanted
    from optimizer.search import SearchSpace
    from optimizer.spec import parse_spec

    spec = parse_spec(
        {
            "name": "rail",
            "supply": "24 V",
            "gain": {"target": -5},
            "source_impedance": 600,
            "load_impedance": "10k",
            "band": ["20 Hz", "20 kHz"],
            "parts": {"catalog": "bench_stock"},
        }
    )
    assert capacitor_rating_wanted(spec) == pytest.approx(25.2 / 0.8)  # 24 V +5 %, capacitors at 80 % of rating
    space = SearchSpace.build(spec)
    ten = int(np.flatnonzero(np.isclose(space.capacitors.values, 10e-6))[0])
    assert space.capacitors.part_id[ten] == "DR-C020" and space.capacitors.rating[ten] == 50.0


_FIXTURE = {
    "catalog.yaml": "name: tiny\ndescription: three resistors\ncurrency: EUR\nstock_tracked: true\n",
    "resistors.csv": (
        "part_id,value,series,tolerance,power_rating,package,unit_price,stock_qty\n"
        "T-R1,4k7,E12,5%,,0603,0.01,\n"
        "T-R2,10000,e24,0.01,0.25,1206,0.03,0\n"
        "T-R3,4.7k,E24,1%,0.125,0805,0.02,12\n"
    ),
    "capacitors.csv": (
        "part_id,value,tolerance,voltage_rating,dielectric,polarised,unit_price,stock_qty\n"
        "T-C1,100n,10%,50,X7R,false,0.02,5\n"
        "T-C2,4u7,20%,25,electrolytic,TRUE,0.1,7\n"
    ),
    "transistors.csv": (
        "id,polarity,hfe_min,hfe_typ,hfe_max,IS,BF,NF,VAF,RB,CJE,CJC,TF,vce_sat,vceo_max,p_max,KF,AF,"
        "description,unit_price,stock_qty\n"
        "T-N1,NPN,100,200,300,1e-14,200,1.0,100,10,8p,4p,400p,0.2,45,0.5,,1,a test device,0.06,3\n"
    ),
    "jfets.csv": (
        "id,polarity,idss_min,idss_max,vp_min,vp_max,BETA,VTO,LAMBDA,CGS,CGD,IS,KF,AF,TCV,BEX,vds_max,p_max,"
        "description,unit_price,stock_qty\n"
        "T-J1,njf,2m,6m,0.5,1.5,4.44m,-0.9,0.005,10p,4p,5e-13,1e-18,1,0.0022,-1.5,30,0.3,a test jfet,0.35,\n"
    ),
}


def test_reader_gives_the_hand_worked_table(tmp_path: Path) -> None:
    """A small catalog read cell by cell, each expected value worked by hand from the CSV text:
    engineering notation and % read as SI numbers and fractions, a blank power rating filled
    from the package (0603: 0.1 W, common practice), blank stock as None (not tracked), the
    JFETs joined after the transistors with the other table's columns blank."""
    for name, text in _FIXTURE.items():
        (tmp_path / name).write_text(text, encoding="utf-8")
    tiny = load_catalog_dir(tmp_path)
    assert tiny.resistors.rows() == [
        {"part_id": "T-R1", "value": 4700.0, "series": "E12", "tolerance": 0.05, "power_rating": 0.1,
         "package": "0603", "unit_price": 0.01, "stock_qty": None},
        {"part_id": "T-R2", "value": 10000.0, "series": "E24", "tolerance": 0.01, "power_rating": 0.25,
         "package": "1206", "unit_price": 0.03, "stock_qty": 0},
        {"part_id": "T-R3", "value": 4700.0, "series": "E24", "tolerance": 0.01, "power_rating": 0.125,
         "package": "0805", "unit_price": 0.02, "stock_qty": 12},
    ]  # fmt: skip
    assert tiny.resistors["value"].dtype == float and tiny.resistors["stock_qty"].dtype == object
    assert tiny.capacitors["value"].tolist() == pytest.approx([100e-9, 4.7e-6], rel=1e-12)
    assert tiny.capacitors["polarised"].tolist() == [False, True]
    assert tiny.transistors["id"].tolist() == ["T-N1", "T-J1"]
    npn, jfet = tiny.transistor("T-N1"), tiny.transistor("T-J1")
    assert npn["polarity"] == "npn" and npn["CJE"] == pytest.approx(8e-12) and npn["KF"] is None
    assert npn["idss_min"] is None and jfet["hfe_min"] is None and jfet["stock_qty"] is None
    assert jfet["BETA"] == pytest.approx(4.44e-3) and jfet["VTO"] == -0.9
    # the picks: the 4.7 kohm rows tie on value; the cheaper one in stock (untracked counts) wins
    assert tiny.part_for("resistor", 4700.0)["part_id"] == "T-R1"
    assert tiny.part_for("resistor", 10e3) is None  # its one row has no stock
    assert tiny.parts_for("resistor", np.array([4.7e3, 1e3, 10e3]))["part_id"].tolist() == ["T-R1", None, None]
    assert tiny.capacitor_values().tolist() == pytest.approx([4.7e-6])  # X7R is class 2: not in the signal path
    assert tiny.resistor_values("E12", in_stock_only=True).tolist() == [4700.0]
    frame = tiny.resistors.frame()
    assert list(frame.columns) == list(tiny.resistors.columns) and str(frame["stock_qty"].dtype) == "Int64"
    assert frame["stock_qty"].isna().tolist() == [True, False, False]


@pytest.mark.parametrize("name", list_catalogs())
def test_every_shipped_catalog_matches_pandas_read_csv(name: str) -> None:
    """Every cell of every shipped catalog as the stdlib-csv reader gives it against the same
    file read by pandas.read_csv (a general-purpose reference reader): the same rows in the
    same order, text cells equal, number cells equal to the text parsed (engineering notation
    by optimizer.units, % as a fraction), blank cells blank."""
    import pandas as pd

    from optimizer.units import parse_quantity

    catalog = load_catalog(name)
    files = {"resistors.csv": catalog.resistors, "capacitors.csv": catalog.capacitors}
    transistors = catalog.transistors
    files["transistors.csv"] = transistors.where(transistors["polarity"] != "njf")
    files["jfets.csv"] = transistors.where(transistors["polarity"] == "njf")
    for file, table in files.items():
        reference = pd.read_csv(CATALOG_DIR / name / file, dtype=str, keep_default_na=False)
        assert len(reference) == len(table), file
        for column in reference.columns:
            for text, got in zip(reference[column], table[column]):
                text = text.strip()
                if column == "power_rating" and not text:
                    assert got > 0, (file, column)  # filled from the package
                elif not text:
                    assert got is None or math.isnan(got), (file, column, got)
                elif column == "stock_qty":
                    assert got == int(text), (file, column)
                elif column == "polarised":
                    assert got is (text.lower() == "true"), (file, column)
                elif column == "tolerance":
                    want = float(text[:-1]) / 100 if text.endswith("%") else float(text)
                    assert got == pytest.approx(want, rel=1e-12), (file, column)
                elif table[column].dtype == float:
                    want = parse_quantity(text, None, allow_negative=True)
                    assert got == pytest.approx(want, rel=1e-12), (file, column, text)
                else:
                    assert got.lower() == text.lower(), (file, column)


def test_unknown_names_list_what_exists() -> None:
    with pytest.raises(InputError, match="bench_stock"):
        load_catalog("shelf_9")
    with pytest.raises(InputError, match="npn-general"):
        load_catalog("bench_stock").transistor("no-such-device")


def _broken_copy(tmp_path: Path, file: str, line: int, old: str, new: str) -> Path:
    target = tmp_path / "broken"
    shutil.copytree(CATALOG_DIR / "bench_stock", target)
    path = target / file
    lines = path.read_text(encoding="utf-8").splitlines(keepends=True)
    assert old in lines[line - 1]
    lines[line - 1] = lines[line - 1].replace(old, new, 1)
    path.write_text("".join(lines), encoding="utf-8")
    return target


@pytest.mark.parametrize(
    ("file", "old", "new", "column"),
    [
        ("resistors.csv", ",5%,", ",55%,", "tolerance"),
        ("resistors.csv", ",0.125,", ",lots,", "power_rating"),
        ("transistors.csv", "npn-general,npn", "npn-general,nqn", "polarity"),
        ("capacitors.csv", ",50,", ",-50,", "voltage_rating"),
    ],
)
def test_malformed_rows_name_file_line_column_and_value(
    tmp_path: Path, file: str, old: str, new: str, column: str
) -> None:
    directory = _broken_copy(tmp_path, file, 2, old, new)
    with pytest.raises(InputError) as caught:
        load_catalog_dir(directory)
    message = str(caught.value)
    assert file in message and "line 2" in message and column in message
    assert new.strip(",").split(",")[-1] in message
