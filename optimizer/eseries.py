"""Preferred-number series E3..E192 (IEC 60063): tables, ranges and rounding.

Values are plain SI numbers (ohm, farad, ...), no prefixes. Every value is built as
``significand * 10**k`` from an integer significand, so ``4.7e3`` comes out as the same
float that ``float("4.7e3")`` gives, with no ``4700.000000000001`` artefacts.

Lookups treat two numbers within ``REL_TOL`` (1 part per billion) of each other as equal,
so a value that is a series value up to float noise rounds to itself.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

from optimizer.errors import InputError

SERIES: tuple[str, ...] = ("E3", "E6", "E12", "E24", "E48", "E96", "E192")

REL_TOL = 1e-9

# Published mantissas of IEC 60063, written out as the standard lists them (not computed).
# E3..E24 have two significant digits; E24 keeps the historical values 2.7 3.0 3.3 3.6 3.9
# 4.3 4.7 8.2 that depart from the rounded geometric formula. E48..E192 have three
# significant digits; E192 lists 9.20 where the formula gives 9.19.
_TABLES: dict[str, tuple[float, ...]] = {
    "E3": (1.0, 2.2, 4.7),
    "E6": (1.0, 1.5, 2.2, 3.3, 4.7, 6.8),
    "E12": (1.0, 1.2, 1.5, 1.8, 2.2, 2.7, 3.3, 3.9, 4.7, 5.6, 6.8, 8.2),
    "E24": (
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
    ),
    "E48": (
        1.00,
        1.05,
        1.10,
        1.15,
        1.21,
        1.27,
        1.33,
        1.40,
        1.47,
        1.54,
        1.62,
        1.69,
        1.78,
        1.87,
        1.96,
        2.05,
        2.15,
        2.26,
        2.37,
        2.49,
        2.61,
        2.74,
        2.87,
        3.01,
        3.16,
        3.32,
        3.48,
        3.65,
        3.83,
        4.02,
        4.22,
        4.42,
        4.64,
        4.87,
        5.11,
        5.36,
        5.62,
        5.90,
        6.19,
        6.49,
        6.81,
        7.15,
        7.50,
        7.87,
        8.25,
        8.66,
        9.09,
        9.53,
    ),
    "E96": (
        1.00,
        1.02,
        1.05,
        1.07,
        1.10,
        1.13,
        1.15,
        1.18,
        1.21,
        1.24,
        1.27,
        1.30,
        1.33,
        1.37,
        1.40,
        1.43,
        1.47,
        1.50,
        1.54,
        1.58,
        1.62,
        1.65,
        1.69,
        1.74,
        1.78,
        1.82,
        1.87,
        1.91,
        1.96,
        2.00,
        2.05,
        2.10,
        2.15,
        2.21,
        2.26,
        2.32,
        2.37,
        2.43,
        2.49,
        2.55,
        2.61,
        2.67,
        2.74,
        2.80,
        2.87,
        2.94,
        3.01,
        3.09,
        3.16,
        3.24,
        3.32,
        3.40,
        3.48,
        3.57,
        3.65,
        3.74,
        3.83,
        3.92,
        4.02,
        4.12,
        4.22,
        4.32,
        4.42,
        4.53,
        4.64,
        4.75,
        4.87,
        4.99,
        5.11,
        5.23,
        5.36,
        5.49,
        5.62,
        5.76,
        5.90,
        6.04,
        6.19,
        6.34,
        6.49,
        6.65,
        6.81,
        6.98,
        7.15,
        7.32,
        7.50,
        7.68,
        7.87,
        8.06,
        8.25,
        8.45,
        8.66,
        8.87,
        9.09,
        9.31,
        9.53,
        9.76,
    ),
    "E192": (
        1.00,
        1.01,
        1.02,
        1.04,
        1.05,
        1.06,
        1.07,
        1.09,
        1.10,
        1.11,
        1.13,
        1.14,
        1.15,
        1.17,
        1.18,
        1.20,
        1.21,
        1.23,
        1.24,
        1.26,
        1.27,
        1.29,
        1.30,
        1.32,
        1.33,
        1.35,
        1.37,
        1.38,
        1.40,
        1.42,
        1.43,
        1.45,
        1.47,
        1.49,
        1.50,
        1.52,
        1.54,
        1.56,
        1.58,
        1.60,
        1.62,
        1.64,
        1.65,
        1.67,
        1.69,
        1.72,
        1.74,
        1.76,
        1.78,
        1.80,
        1.82,
        1.84,
        1.87,
        1.89,
        1.91,
        1.93,
        1.96,
        1.98,
        2.00,
        2.03,
        2.05,
        2.08,
        2.10,
        2.13,
        2.15,
        2.18,
        2.21,
        2.23,
        2.26,
        2.29,
        2.32,
        2.34,
        2.37,
        2.40,
        2.43,
        2.46,
        2.49,
        2.52,
        2.55,
        2.58,
        2.61,
        2.64,
        2.67,
        2.71,
        2.74,
        2.77,
        2.80,
        2.84,
        2.87,
        2.91,
        2.94,
        2.98,
        3.01,
        3.05,
        3.09,
        3.12,
        3.16,
        3.20,
        3.24,
        3.28,
        3.32,
        3.36,
        3.40,
        3.44,
        3.48,
        3.52,
        3.57,
        3.61,
        3.65,
        3.70,
        3.74,
        3.79,
        3.83,
        3.88,
        3.92,
        3.97,
        4.02,
        4.07,
        4.12,
        4.17,
        4.22,
        4.27,
        4.32,
        4.37,
        4.42,
        4.48,
        4.53,
        4.59,
        4.64,
        4.70,
        4.75,
        4.81,
        4.87,
        4.93,
        4.99,
        5.05,
        5.11,
        5.17,
        5.23,
        5.30,
        5.36,
        5.42,
        5.49,
        5.56,
        5.62,
        5.69,
        5.76,
        5.83,
        5.90,
        5.97,
        6.04,
        6.12,
        6.19,
        6.26,
        6.34,
        6.42,
        6.49,
        6.57,
        6.65,
        6.73,
        6.81,
        6.90,
        6.98,
        7.06,
        7.15,
        7.23,
        7.32,
        7.41,
        7.50,
        7.59,
        7.68,
        7.77,
        7.87,
        7.96,
        8.06,
        8.16,
        8.25,
        8.35,
        8.45,
        8.56,
        8.66,
        8.76,
        8.87,
        8.98,
        9.09,
        9.20,
        9.31,
        9.42,
        9.53,
        9.65,
        9.76,
        9.88,
    ),
}

# Significant digits of each table: E3..E24 two, E48..E192 three.
_DIGITS: dict[str, int] = {"E3": 2, "E6": 2, "E12": 2, "E24": 2, "E48": 3, "E96": 3, "E192": 3}

# Tolerance customarily assigned to each series (IEC 60063 assignment / common practice).
# IEC 60063 gives E3 for tolerances wider than 20 %; 0.2 is used here as its nominal figure.
_TOLERANCE: dict[str, float] = {
    "E3": 0.2,
    "E6": 0.2,
    "E12": 0.1,
    "E24": 0.05,
    "E48": 0.02,
    "E96": 0.01,
    "E192": 0.005,
}


def _canonical(name: str) -> str:
    """Return the canonical series name ("e24" -> "E24") or raise InputError."""
    key = name.strip().upper() if isinstance(name, str) else None
    if key not in _TABLES:
        raise InputError.single("series", name, f"expected one of the E-series {', '.join(SERIES)}", "unknown E-series")
    return key


def _significands(name: str) -> np.ndarray:
    """Integer significands of a series (E24: 10..91, E192: 100..988)."""
    scale = 10 ** (_DIGITS[name] - 1)
    return np.rint(np.asarray(_TABLES[name]) * scale).astype(np.int64)


def _scaled(significand: np.ndarray, exponent: np.ndarray) -> np.ndarray:
    """significand * 10**exponent, correctly rounded (one exact product or quotient)."""
    significand = np.asarray(significand, dtype=float)
    exponent = np.asarray(exponent)
    power = np.power(10.0, np.abs(exponent))
    return np.where(exponent >= 0, significand * power, significand / power)


def base_values(name: str) -> np.ndarray:
    """The published mantissas of series ``name`` in [1, 10), ascending."""
    return np.array(_TABLES[_canonical(name)], dtype=float)


def customary_tolerance(name: str) -> float:
    """Tolerance customarily assigned to series ``name``, as a fraction (E24 -> 0.05)."""
    return _TOLERANCE[_canonical(name)]


def _decade_values(name: str, decades: np.ndarray) -> np.ndarray:
    """Series values in each of ``decades`` (shape (..., D)) -> shape (..., D * N), ascending."""
    sig = _significands(name)
    shift = _DIGITS[name] - 1
    values = _scaled(sig, decades[..., None] - shift)
    return values.reshape(*decades.shape[:-1], -1)


def series_values(name: str, low: float, high: float) -> np.ndarray:
    """All values of series ``name`` in [low, high] (SI units), ascending."""
    key = _canonical(name)
    bad = [
        (where, v)
        for where, v in (("low", low), ("high", high))
        if not (isinstance(v, (int, float, np.floating, np.integer)) and np.isfinite(v) and v > 0)
    ]
    if bad:
        raise InputError.single(bad[0][0], bad[0][1], "expected a finite number greater than zero")
    if low > high:
        raise InputError.single("low", low, f"expected low <= high (high is {high!r})")
    decades = np.arange(int(np.floor(np.log10(low))) - 1, int(np.floor(np.log10(high))) + 2)
    values = _decade_values(key, decades)
    keep = (values >= low * (1 - REL_TOL)) & (values <= high * (1 + REL_TOL))
    return values[keep]


def _neighbours(name: str, x: ArrayLike) -> tuple[np.ndarray, np.ndarray, np.ndarray, bool]:
    """For each x: (x, next series value down, next series value up) and whether x was scalar."""
    key = _canonical(name)
    arr = np.asarray(x, dtype=float)
    if not np.all(np.isfinite(arr) & (arr > 0)):
        first = arr[~(np.isfinite(arr) & (arr > 0))].ravel()[0]
        raise InputError.single("value", float(first), "expected a finite number greater than zero")
    flat = arr.ravel()
    decade = np.floor(np.log10(flat)).astype(np.int64)
    # Three decades around each x, so float error in log10 cannot miss a neighbour.
    grid = _decade_values(key, decade[:, None] + np.arange(-1, 2))
    up_ok = grid >= flat[:, None] * (1 - REL_TOL)
    down_ok = grid <= flat[:, None] * (1 + REL_TOL)
    rows = np.arange(flat.size)
    up = grid[rows, np.argmax(up_ok, axis=1)]
    down = grid[rows, grid.shape[1] - 1 - np.argmax(down_ok[:, ::-1], axis=1)]
    return flat, down, up, arr.ndim == 0


def _shaped(values: np.ndarray, like: ArrayLike, scalar: bool) -> float | np.ndarray:
    return float(values[0]) if scalar else values.reshape(np.shape(like))


def next_up(name: str, x: ArrayLike) -> float | np.ndarray:
    """Smallest value of series ``name`` >= x (elementwise; scalar in, float out)."""
    _, _, up, scalar = _neighbours(name, x)
    return _shaped(up, x, scalar)


def next_down(name: str, x: ArrayLike) -> float | np.ndarray:
    """Largest value of series ``name`` <= x (elementwise; scalar in, float out)."""
    _, down, _, scalar = _neighbours(name, x)
    return _shaped(down, x, scalar)


def nearest(name: str, x: ArrayLike) -> float | np.ndarray:
    """Value of series ``name`` nearest to x by ratio (log distance); ties go up."""
    flat, down, up, scalar = _neighbours(name, x)
    pick = np.where(np.log(up / flat) <= np.log(flat / down), up, down)
    return _shaped(pick, x, scalar)


def series_of(value: float) -> str | None:
    """The coarsest series (fewest steps per decade) containing ``value``, or None."""
    if not (np.isfinite(value) and value > 0):
        return None
    for name in SERIES:
        if abs(float(nearest(name, value)) / value - 1) <= REL_TOL:
            return name
    return None
