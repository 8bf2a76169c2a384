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


def test_front_rows_read_back_and_replace_only_their_specs() -> None:
    # the front table of results/search.md is rebuilt from rows kept per (spec, screen mode):
    # a run of one spec replaces that spec's rows and keeps the others and the rest of the file
    rows = {("a", "off"): "| a | off | x |", ("a", "on"): "| a | on | x |", ("b", "on"): "| b | on | y |"}
    text = bench_search.with_front_section("# Search benchmark\n\n## Quality\n\nbody\n", rows)
    assert bench_search.stored_front_rows(text) == rows
    again = bench_search.with_front_section(text + "\n## Later\n\nkept\n", {**rows, ("a", "on"): "| a | on | z |"})
    assert bench_search.stored_front_rows(again)[("a", "on")] == "| a | on | z |"
    assert bench_search.stored_front_rows(again)[("b", "on")] == "| b | on | y |"
    assert (
        again.count(bench_search.FRONT_HEADING) == 1 and "## Quality\n\nbody" in again and "## Later\n\nkept" in again
    )


def test_screen_modes_change_only_the_robustness_basis() -> None:
    spec = bench_search.load_spec(bench_search.SPECS / "bs_e24_split_guitar.yaml")
    off, on = bench_search.screened(spec, "off"), bench_search.screened(spec, "on")
    assert (off.robustness, on.robustness) == ("nominal", spec.robustness)
    assert bench_search.screen_mode(off) == "off" and bench_search.screen_mode(on) == "on"
    assert bench_search.screened(off, "on").robustness == "yield"
    assert bench_search.spec_to_dict(off) | {"robustness": spec.robustness} == bench_search.spec_to_dict(spec)


def test_a_results_file_rewritten_keeps_the_notes_below_its_tables(tmp_path) -> None:
    from benchmarks.run_facts import write_keeping_notes

    path = tmp_path / "r.md"
    write_keeping_notes(path, "# R\n\n| a |\n")  # no old file: the text alone
    assert path.read_text() == "# R\n\n| a |\n"
    path.write_text("# R\n\n## Section\n\n| old |\n\n## Notes to this run\n\nwhy it moved\n")
    write_keeping_notes(path, "# R\n\n## Section\n\n| new |\n")
    assert path.read_text() == "# R\n\n## Section\n\n| new |\n\n## Notes to this run\n\nwhy it moved\n"


def test_only_keeps_the_notes_under_a_section_and_above_the_first(tmp_path, monkeypatch) -> None:
    path = tmp_path / "topologies.md"
    path.write_text(
        "# Search against the oracle\n\nProduced by ...\n\nA preamble.\n\n"
        "## bs_a\n\nold figures\n\n| seed | best score | hit |\n| --- | --- | --- |\n| 0 | 0.1000 | no |\n\n"
        "A note on bs_a.\n\n## bs_b\n\nb figures\n"
    )
    oracle = type("Oracle", (), {"combinations": 5, "best": {"score": 0.5}})
    run = {"runs": [{"best": 0.5, "hit": True}], "times": [1.0]}
    figures = {"topology": "t", "device": "d", "series": "E3", "range": (1, 2), "oracle_s": 1.0, "budget": 10}
    monkeypatch.setattr(bench_search, "TOPOLOGY_RESULTS", path)
    monkeypatch.setattr(
        bench_search, "bench_spec", lambda *a, **k: {**figures, "methods": {"our search": run}, "oracle": oracle()}
    )
    bench_search.only(["bs_a"])
    text = path.read_text()
    assert "A preamble." in text and "A note on bs_a." in text and "## bs_b\n\nb figures" in text
    assert "| 0 | 0.5000 | yes |" in text and "0.1000" not in text and "old figures" not in text


def test_a_full_run_keeps_the_front_table_and_the_notes(tmp_path) -> None:
    path = tmp_path / "search.md"
    row = "| bs_a | off | 3 points, best 0.5 (1.0 s) | 10/10 | 99.0 % (98.0..100.0) | met | 1.0 |"
    path.write_text(
        "# Search benchmark\n\n## Quality\n\nold table\n\n"
        + bench_search.front_section({("bs_a", "off"): row})
        + "\n\n## Notes to this run\n\nwhy\n"
    )
    bench_search.write_results(path, "# Search benchmark\n\n## Quality\n\nnew table\n")
    text = path.read_text()
    assert "new table" in text and "old table" not in text
    assert text.index("## Quality") < text.index(bench_search.FRONT_HEADING) < text.index("## Notes to this run")
    assert row in text and text.count(bench_search.FRONT_HEADING) == 1 and text.endswith("why\n")


def test_wall_replaces_its_specs_rows_and_judges_the_targets_over_every_row(tmp_path, monkeypatch) -> None:
    path = tmp_path / "search.md"
    head = "| spec | budget | in memory: search | finish | total | journal file: search | finish | total |\n"
    path.write_text(
        "# Search benchmark\n\n## Quality\n\nquality table\n\n## Our search: wall time (s, median)\n\n"
        + head
        + "| --- | --- | --- | --- | --- | --- | --- | --- |\n"
        "| bs_a | 4,000 | 2.50 | 0.90 | 3.40 | 2.60 | 0.90 | 3.50 |\n"
        "| bs_b | 4,000 | 1.00 | 0.50 | 1.50 | 1.20 | 0.50 | 1.70 |\n\n"
        "## Targets\n\n| target | measured | met |\n| --- | --- | --- |\n"
        "| optimum within 1 % in >= 9 of 10 seeds, every spec | bs_a 10/10 | met |\n"
        "| median wall time < 3 s in memory (search itself) | worst 2.50 s | met |\n"
        "| median wall time < 3 s in memory (search + finishing step) | worst 3.40 s | **missed** |\n"
        "| median wall time < 10 s on the journal file (search + finishing step) | worst 3.50 s | met |\n\n"
        "## Notes to this run\n\nwhy\n"
    )
    monkeypatch.setattr(bench_search, "RESULTS", path)
    spec = bench_search.load_spec(bench_search.SPECS / "bs_e24_split_guitar.yaml")  # a budget of 4,000
    monkeypatch.setattr(bench_search, "load_spec", lambda p: spec)
    monkeypatch.setattr(bench_search, "run_ours", lambda spec, seed, storage: ([], 2.0, 0.25, "id"))
    bench_search.wall(["bs_a"], bench_search.RunFacts.start())
    text = path.read_text()
    assert "| bs_a | 4,000 | 2.00 | 0.25 | 2.25 | 2.00 | 0.25 | 2.25 |" in text
    assert "| bs_b | 4,000 | 1.00 | 0.50 | 1.50 | 1.20 | 0.50 | 1.70 |" in text  # the other spec's row kept
    assert "| median wall time < 3 s in memory (search + finishing step) | worst 2.25 s | met |" in text
    assert "| median wall time < 3 s in memory (search itself) | worst 2.00 s | met |" in text
    assert "| optimum within 1 % in >= 9 of 10 seeds, every spec | bs_a 10/10 | met |" in text  # not a wall row
    assert "quality table" in text and text.endswith("## Notes to this run\n\nwhy\n")
    assert text.index("## Notes to a wall-time run") < text.index("## Notes to this run")
