"""Parts catalogs: the shipped catalogs, row validation and part choice."""

from __future__ import annotations

import importlib.util
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
    frame = load_catalog("eseries_full").resistors
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
    same_value = bench.resistors[np.isclose(bench.resistors["value"], 10e3)]
    stocked = same_value[same_value["stock_qty"] > 0]
    assert part["unit_price"] == stocked["unit_price"].min()


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
