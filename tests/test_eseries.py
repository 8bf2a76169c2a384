"""Preferred-number series against IEC 60063 and the `eseries` reference package."""

from __future__ import annotations

import numpy as np
import pytest

from optimizer import eseries
from optimizer.errors import InputError

# IEC 60063 (from memory): E24 with its historical values, and the E192 oddity 9.20.
E24_IEC = [
    1.0,
    1.1,
    1.2,
    1.3,
    1.5,
    1.6,
    1.8,
    2.0,
    2.2,
    2.4,
    2.7,
    3.0,
    3.3,
    3.6,
    3.9,
    4.3,
    4.7,
    5.1,
    5.6,
    6.2,
    6.8,
    7.5,
    8.2,
    9.1,
]
E12_IEC = [1.0, 1.2, 1.5, 1.8, 2.2, 2.7, 3.3, 3.9, 4.7, 5.6, 6.8, 8.2]
E6_IEC = [1.0, 1.5, 2.2, 3.3, 4.7, 6.8]
E3_IEC = [1.0, 2.2, 4.7]
COUNTS = {"E3": 3, "E6": 6, "E12": 12, "E24": 24, "E48": 48, "E96": 96, "E192": 192}


@pytest.mark.parametrize(("name", "table"), [("E3", E3_IEC), ("E6", E6_IEC), ("E12", E12_IEC), ("E24", E24_IEC)])
def test_low_series_match_iec_60063(name: str, table: list[float]) -> None:
    np.testing.assert_allclose(eseries.base_values(name), table, rtol=1e-12)


def test_e192_keeps_9_20_and_e96_values() -> None:
    e192 = eseries.base_values("E192")
    assert 9.20 in np.round(e192, 2) and 9.19 not in np.round(e192, 2)  # IEC 60063 (from memory)
    assert {1.00, 1.02, 1.05, 4.99, 9.76} <= set(np.round(eseries.base_values("E96"), 2))


@pytest.mark.parametrize("name", eseries.SERIES)
def test_every_series_against_reference_package(name: str) -> None:
    reference = pytest.importorskip("eseries")  # PyPI `eseries`, a reference implementation
    # The package returns the series as integer significands (E24: 10, 11, ...; E192: 100, 101, ...).
    theirs = np.array(reference.series(getattr(reference, name)), dtype=float)
    theirs = theirs / 10 ** np.floor(np.log10(theirs))
    ours = eseries.base_values(name)
    assert ours.size == COUNTS[name]
    np.testing.assert_allclose(ours, theirs, rtol=1e-12)


def test_series_nest_as_published() -> None:
    for small, large in [("E3", "E6"), ("E6", "E12"), ("E12", "E24"), ("E48", "E96"), ("E96", "E192")]:
        assert set(eseries.base_values(small)) <= set(eseries.base_values(large))


def test_series_values_over_decades() -> None:
    values = eseries.series_values("E24", 10, 1e6)
    assert values[0] == 10 and values[-1] == 1e6 and np.all(np.diff(values) > 0)
    assert 4700.0 in values and 68000.0 in values
    assert values.size == 24 * 5 + 1


def test_lookups_vectorised_with_decade_edges() -> None:
    x = np.array([9.9e3, 4.8e3, 1.0e3, 1.04e3])
    np.testing.assert_array_equal(eseries.next_up("E24", x), [10e3, 5.1e3, 1.0e3, 1.1e3])
    np.testing.assert_array_equal(eseries.next_down("E24", x), [9.1e3, 4.7e3, 1.0e3, 1.0e3])
    np.testing.assert_array_equal(eseries.nearest("E24", x), [10e3, 4.7e3, 1.0e3, 1.0e3])
    assert eseries.nearest("e12", 5000.0) == 4700.0


def test_customary_tolerances() -> None:
    assert [eseries.customary_tolerance(n) for n in ("E6", "E12", "E24", "E96")] == [0.2, 0.1, 0.05, 0.01]


def test_unknown_series_is_a_clear_error() -> None:
    with pytest.raises(InputError, match="E13"):
        eseries.base_values("E13")
    with pytest.raises(InputError):
        eseries.series_values("E24", 1e6, 10)
