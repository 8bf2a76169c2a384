"""The search benchmark's 2-D hypervolume, checked on a staircase computed by hand."""

from __future__ import annotations

import importlib.util
from pathlib import Path

import numpy as np
import pytest

_PATH = Path(__file__).resolve().parent.parent / "benchmarks" / "bench_search.py"
_spec = importlib.util.spec_from_file_location("bench_search", _PATH)
bench_search = importlib.util.module_from_spec(_spec)
_spec.loader.exec_module(bench_search)


def test_hypervolume_of_a_hand_computed_staircase() -> None:
    # Both axes minimised, reference (4, 4). The front (1,3), (2,2), (3,1) dominates the slabs
    # [1,2]x[3,4] = 1, [2,3]x[2,4] = 2 and [3,4]x[1,4] = 3: area 6 (drawn on squared paper).
    ref = np.array([4.0, 4.0])
    front = np.array([[1.0, 3.0], [2.0, 2.0], [3.0, 1.0]])
    assert bench_search.hypervolume_2d(front, ref) == pytest.approx(6.0)
    # a dominated point, a repeat, and a point beyond the reference (clipped to x = 4) add nothing
    extra = np.vstack([front, [[3.0, 3.0], [2.0, 2.0], [5.0, 0.0]]])
    assert bench_search.hypervolume_2d(extra, ref) == pytest.approx(6.0)
    # a single point: the rectangle to the reference
    assert bench_search.hypervolume_2d(np.array([[1.0, 1.0]]), ref) == pytest.approx(9.0)
    assert bench_search.hypervolume_2d(np.zeros((0, 2)), ref) == 0.0


def test_maximised_axes_are_negated_and_the_reference_is_nadir_plus_a_tenth_of_the_span() -> None:
    # minimise current (A), maximise swing (V): (1 mA, 4 V) and (2 mA, 6 V)
    points = bench_search.to_minimise(np.array([[1e-3, 4.0], [2e-3, 6.0]]), ["minimise", "maximise"])
    assert points.tolist() == [[1e-3, -4.0], [2e-3, -6.0]]
    ref = bench_search.reference_point(points)
    assert ref == pytest.approx([2.1e-3, -3.8])
    # slabs: [1, 2] mA x [-4, -3.8] V and [2, 2.1] mA x [-6, -3.8] V
    assert bench_search.hypervolume_2d(points, ref) == pytest.approx(1e-3 * 0.2 + 0.1e-3 * 2.2)
