"""Plots (optimizer/plots.py) and rebuilding a design from its candidate record alone.

References: the -3 dB cut-off is where |H| falls to 1/sqrt(2) of mid-band (the usual
definition, common practice); the marked corners must equal the stage model's f_low/f_high,
which are themselves checked against ngspice in the model tests. Non-domination is checked
against a brute-force pairwise comparison. SVG is parsed with xml.etree; PNG is recognised
by its signature (PNG specification, ISO/IEC 15948).
"""

from __future__ import annotations

import json
import math
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pytest

from optimizer import plots
from optimizer.candidates import assess, design_from_record
from optimizer.catalog import load_catalog
from optimizer.devices import Device
from optimizer.errors import InputError
from optimizer.spec import load_spec

ROOT = Path(__file__).resolve().parent.parent
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
SPLIT = {"r_top": 220e3, "r_bottom": 47e3, "r_collector": 8.2e3, "r_emitter": 180, "r_emitter_dc": 1.5e3}
DESIGNS = [  # (topology, resistors) on the bench-stock preamp spec, feasible and not
    ("divider_ce_split", SPLIT),
    ("divider_ce", {"r_top": 270e3, "r_bottom": 18e3, "r_collector": 8.2e3, "r_emitter": 220}),
    ("feedback_ce", {"r_feedback": 1.2e6, "r_collector": 8.2e3, "r_emitter": 220}),
    ("ce_follower", {"r_top": 270e3, "r_bottom": 18e3, "r_collector": 6.8e3, "r_emitter": 220, "r_follower": 3.9e3}),
    (
        "divider_ce_split",
        {"r_top": 150e3, "r_bottom": 33e3, "r_collector": 4.7e3, "r_emitter": 100, "r_emitter_dc": 1e3},
    ),
]
OBJECTIVES = [("supply_current", "minimise"), ("swing_vpp", "maximise")]


@pytest.fixture(scope="module")
def records() -> list[dict]:
    spec = load_spec(ROOT / "specs" / "bench_stock_preamp.yaml")
    catalog = load_catalog(spec.parts.catalog)
    out = [assess(spec, catalog, topology, parts, samples=20) for topology, parts in DESIGNS]
    return [json.loads(json.dumps(r)) for r in out]  # as a client would get them


@pytest.fixture(scope="module")
def record(records: list[dict]) -> dict:
    return records[0]


def _svg_ids(data: bytes) -> set[str]:
    root = ET.fromstring(data)
    assert root.tag.endswith("svg")
    return {el.get("id") for el in root.iter() if el.get("id")}


# ---- rebuilding from the record ---------------------------------------------------------


@pytest.mark.parametrize("index", range(len(DESIGNS)))
def test_record_rebuilds_its_own_metrics(records: list[dict], index: int) -> None:
    record = records[index]
    topology, parts, device, conditions = design_from_record(record)
    assert topology.name == record["topology"] and conditions.temperature == 27.0
    assert parts and all(v.shape == (1,) for v in parts.values())
    metrics = topology.evaluate(parts, device, conditions, full=True).metrics
    for key in ("gain", "swing_vpp", "input_impedance", "supply_current", "f_low", "f_high"):
        assert float(metrics[key][0]) == pytest.approx(record["metrics"][key], rel=1e-9), key


def test_device_from_record_equals_the_catalog_row(record: dict) -> None:
    row = load_catalog("bench_stock").transistor(record["transistor"]["id"])
    assert Device.from_record(record["transistor"]) == Device.from_row(row)


@pytest.mark.parametrize(
    ("path", "named"),
    [
        (("parts", "r_top"), "parts.r_top.value"),
        (("transistor", "hfe_typ"), "transistor.hfe_typ"),
        (("transistor", "model", "IS"), "transistor.model.IS"),
        (("conditions", "supply"), "conditions.supply"),
        (("conditions",), "conditions"),
    ],
)
def test_incomplete_record_names_the_missing_key(record: dict, path: tuple[str, ...], named: str) -> None:
    broken = json.loads(json.dumps(record))
    holder = broken
    for key in path[:-1]:
        holder = holder[key]
    del holder[path[-1]]
    with pytest.raises(InputError) as err:
        design_from_record(broken)
    assert named in [p.where for p in err.value.problems]


# ---- formats --------------------------------------------------------------------------


@pytest.mark.parametrize("plot", ["response", "transfer", "front"])
def test_svg_parses_and_png_has_its_signature(records: list[dict], plot: str, tmp_path: Path) -> None:
    def draw(fmt: str, path: Path | None = None) -> bytes:
        if plot == "front":
            return plots.front_plot(records, OBJECTIVES, chosen=records[0], fmt=fmt, path=path)
        return getattr(plots, f"{plot}_plot")(records[0], fmt=fmt, path=path)

    svg = draw("svg")
    assert _svg_ids(svg)
    target = tmp_path / f"{plot}.png"
    png = draw("png", target)
    assert png.startswith(PNG_SIGNATURE) and target.read_bytes() == png


@pytest.mark.parametrize("fmt", ["pdf", "jpg", "", None, 3])
def test_bad_format_names_the_field(record: dict, fmt: object) -> None:
    for call in (
        lambda: plots.response_plot(record, fmt=fmt),
        lambda: plots.transfer_plot(record, fmt=fmt),
        lambda: plots.front_plot([record], OBJECTIVES, fmt=fmt),
    ):
        with pytest.raises(InputError) as err:
            call()
        assert err.value.problems[0].where == "format"


# ---- frequency response ---------------------------------------------------------------


@pytest.mark.parametrize("index", range(len(DESIGNS)))
def test_response_markers_are_the_model_corners(records: list[dict], index: int) -> None:
    record = records[index]
    data = plots.response_data(record)
    assert data["f_low"] == pytest.approx(record["metrics"]["f_low"], rel=0.01)
    assert data["f_high"] == pytest.approx(record["metrics"]["f_high"], rel=0.01)
    # the marked level is mid-band / sqrt(2), and the curve passes through it at the markers
    assert data["reference_db"] - data["level_db"] == pytest.approx(10 * math.log10(2))
    topology, parts, device, conditions = design_from_record(record)
    h = topology.frequency_response(parts, device, conditions, np.array([data["f_low"], data["f_high"]]))[0]
    assert np.abs(h) == pytest.approx(abs(record["metrics"]["gain"]) / math.sqrt(2), rel=0.01)


def test_response_svg_marks_both_corners(record: dict) -> None:
    assert {"f_low_marker", "f_high_marker"} <= _svg_ids(plots.response_plot(record))


# ---- transfer curve -------------------------------------------------------------------


@pytest.mark.parametrize("index", range(len(DESIGNS)))
def test_transfer_curve_slope_and_clip_level(records: list[dict], index: int) -> None:
    record = records[index]
    data = plots.transfer_data(record, spec_swing=4.0)
    vs, out = data["source_v"], data["output_v"]
    centre = len(vs) // 2
    assert vs[centre] == pytest.approx(0.0, abs=1e-12)
    # at rest the static solve sits at the operating point (feedback_ce's settles within ~1 mV)
    assert out[centre] == pytest.approx(0.0, abs=0.005 * record["metrics"]["swing_vpp"] / 2)
    # at rest the slope is the small-signal gain source -> load
    slope = (out[centre + 1] - out[centre - 1]) / (vs[centre + 1] - vs[centre - 1])
    assert slope == pytest.approx(record["metrics"]["gain"], rel=0.03)
    # the sweep clips, and the nearer side flattens at the clip level the model reports
    assert len(data["clips"]) >= 1
    nearer = min(abs(o) for _, o in data["clips"])
    assert nearer == pytest.approx(record["metrics"]["clip_vpp"] / 2, rel=0.1)


def test_transfer_svg_marks_clipping_and_rejects_a_bad_spec_swing(record: dict) -> None:
    assert "clip_0" in _svg_ids(plots.transfer_plot(record, spec_swing=4.0))
    with pytest.raises(InputError) as err:
        plots.transfer_plot(record, spec_swing=-1.0)
    assert err.value.problems[0].where == "spec_swing"


# ---- Pareto front ---------------------------------------------------------------------


def _brute_front(values: np.ndarray, directions: list[str]) -> np.ndarray:
    s = values * np.array([1.0 if d == "minimise" else -1.0 for d in directions])
    n = len(s)
    return np.array(
        [
            np.isfinite(s[i]).all()
            and not any(np.isfinite(s[j]).all() and np.all(s[j] <= s[i]) and np.any(s[j] < s[i]) for j in range(n))
            for i in range(n)
        ]
    )


@pytest.mark.parametrize("objectives", [1, 2, 3])
def test_pareto_mask_matches_brute_force(objectives: int) -> None:
    rng = np.random.default_rng(objectives)
    for _ in range(40):
        values = rng.integers(0, 5, size=(int(rng.integers(1, 30)), objectives)).astype(float)
        values[rng.random(len(values)) < 0.1, 0] = np.nan
        directions = [str(rng.choice(["minimise", "maximise"])) for _ in range(objectives)]
        assert (plots.pareto_mask(values, directions, chunk=7) == _brute_front(values, directions)).all()


def test_front_marks_feasible_infeasible_front_and_chosen(records: list[dict]) -> None:
    assert any(r["feasible"] for r in records) and not all(r["feasible"] for r in records)
    ids = _svg_ids(plots.front_plot(records, OBJECTIVES, chosen=records[0]))
    assert {"feasible", "infeasible", "front", "chosen"} <= ids


def test_front_without_feasible_points_has_no_front(records: list[dict]) -> None:
    infeasible = [r for r in records if not r["feasible"]]
    ids = _svg_ids(plots.front_plot(infeasible, OBJECTIVES))
    assert "infeasible" in ids and "front" not in ids and "feasible" not in ids


def test_front_given_records_one_objective_many_objectives_and_none(records: list[dict]) -> None:
    assert "front" in _svg_ids(plots.front_plot(records, OBJECTIVES, front=records[:1]))
    assert "front" in _svg_ids(plots.front_plot(records, [("supply_current", "min")], chosen=records[0]))
    three = OBJECTIVES + [("noise_ein_v", "minimise")]
    assert _svg_ids(plots.front_plot(records, three))
    assert _svg_ids(plots.front_plot([], OBJECTIVES))


@pytest.mark.parametrize("objectives", [[], [("swing_vpp", "sideways")], "swing_vpp", None])
def test_bad_objectives_name_the_field(records: list[dict], objectives: object) -> None:
    with pytest.raises(InputError) as err:
        plots.front_plot(records, objectives)  # type: ignore[arg-type]
    assert err.value.problems[0].where == "objectives"


def test_palette_reads_in_greyscale_and_is_used_by_every_plot(records: list[dict]) -> None:
    # Relative luminance of WCAG 2.1 (sRGB linearised): the scatter roles differ in lightness, so a
    # greyscale print keeps them apart, and in marker shape as well.
    from optimizer.palette import MARKERS, PLOT_COLOURS as COLOURS

    def luminance(hex_colour: str) -> float:
        channels = [int(hex_colour[i : i + 2], 16) / 255 for i in (1, 3, 5)]
        linear = [c / 12.92 if c <= 0.04045 else ((c + 0.055) / 1.055) ** 2.4 for c in channels]
        return 0.2126 * linear[0] + 0.7152 * linear[1] + 0.0722 * linear[2]

    roles = ("front", "feasible", "infeasible", "chosen")
    levels = sorted(luminance(COLOURS[r]) for r in roles)
    assert all((b + 0.05) / (a + 0.05) >= 1.4 for a, b in zip(levels, levels[1:]))  # contrast ratio steps
    assert len({MARKERS[r] for r in roles}) == len(roles)
    svg = plots.front_plot(records, OBJECTIVES, chosen=records[0], fmt="svg").decode().lower()
    assert COLOURS["front"] in svg and COLOURS["chosen"] in svg
    assert COLOURS["model"] in plots.response_plot(records[0]).decode().lower()
    assert COLOURS["limit"] in plots.transfer_plot(records[0]).decode().lower()
