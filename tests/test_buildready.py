"""From a ranked design to a board: netlist, BOM, design sheet, units, checks before the search,
first contact with the example specs.

References: ngspice (Debian) runs the exported netlist; the SPICE element-name convention
(first letter R, C, Q) and the DC node voltages ngspice reports; common practice for which way
an electrolytic goes; the class-2 dielectric codes of EIA RS-198.
"""

from __future__ import annotations

import io
import json
import re
import shutil
import subprocess
import sys
from contextlib import redirect_stderr, redirect_stdout
from pathlib import Path

import pytest
import yaml

from optimizer.bom import kit
from optimizer.catalog import is_class2, load_catalog
from optimizer.cli import main
from optimizer.netlist import candidate_netlist
from optimizer.search import search
from optimizer.spec import load_spec, parse_spec
from optimizer.topologies.divider_ce import DividerCE
from optimizer.topologies.feedback_ce import FeedbackCE

ROOT = Path(__file__).resolve().parent.parent
SPECS = sorted((ROOT / "specs").glob("*.yaml"))
INFEASIBLE_MARK = re.compile(r"^#.*deliberately infeasible", re.IGNORECASE | re.MULTILINE)
NGSPICE = shutil.which("ngspice")


def run_cli(*argv: str) -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    with redirect_stdout(out), redirect_stderr(err):
        code = main(list(argv))
    return code, out.getvalue(), err.getvalue()


def _readme_specs() -> list[tuple[str, str]]:
    """(label, YAML text) of every spec written out in README.md."""
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    blocks = re.findall(r"```yaml\n(.*?)```", text, re.DOTALL)
    return [(f"README block {i}", b) for i, b in enumerate(blocks) if re.search(r"^supply:", b, re.MULTILINE)]


EXAMPLES = [(path.name, path.read_text(encoding="utf-8")) for path in SPECS] + _readme_specs()


@pytest.fixture(scope="module")
def searched() -> dict:
    """Every example spec searched once at its own budget (in memory)."""
    return {label: search(parse_spec(yaml.safe_load(text)), top=4) for label, text in EXAMPLES}


# ---- 6: first contact ---------------------------------------------------------------------


def test_there_are_example_specs_including_the_readme_one() -> None:
    assert len(SPECS) >= 5 and any(label.startswith("README") for label, _ in EXAMPLES)


@pytest.mark.parametrize("label", [label for label, _ in EXAMPLES])
def test_every_example_is_feasible_or_marked_infeasible_in_its_comment(label: str, searched: dict) -> None:
    text = dict(EXAMPLES)[label]
    marked = bool(INFEASIBLE_MARK.search(text))
    best = searched[label].candidates[0]
    assert best["feasible"] is not marked, (
        f"{label}: {'marked infeasible but a design meets every limit' if marked else 'no feasible design'}"
        f" (binding: {best.get('binding')})"
    )


@pytest.mark.parametrize("label", [label for label, _ in EXAMPLES])
def test_no_class2_ceramic_in_a_signal_role_by_default(label: str, searched: dict) -> None:
    result = searched[label]
    rows = load_catalog(result.spec.parts.catalog).capacitors.frame().set_index("part_id")
    assert not result.spec.parts.allow_class2_coupling
    for candidate in result.candidates + result.front:
        for role, part in candidate["parts"].items():
            if role.startswith("c_") and part.get("part_id"):
                assert not is_class2(rows.loc[part["part_id"], "dielectric"]), (label, role, part)


# ---- 1 and 3: netlist and BOM agree one for one; ngspice runs the netlist ------------------


def _elements(netlist: str) -> dict[str, float | str]:
    """Designator -> value (R, C) or model (Q) of the stage's elements (not source or load)."""
    out: dict[str, float | str] = {}
    for line in netlist.splitlines():
        fields = line.split()
        if fields and re.fullmatch(r"[RCQ]\d+", fields[0]):
            out[fields[0]] = fields[4] if fields[0][0] == "Q" else float(fields[3])
    return out


@pytest.mark.skipif(NGSPICE is None, reason="ngspice is not installed (apt-get install ngspice)")
def test_searched_design_netlist_runs_in_ngspice_and_matches_the_bom(searched: dict, tmp_path: Path) -> None:
    result = searched["bench_stock_preamp.yaml"]
    best = result.candidates[0]
    netlist = candidate_netlist(best)
    bill = kit(best, load_catalog(result.spec.parts.catalog), 1, result.spec)
    from_bom: dict[str, float | str] = {}
    for line in bill.to_dict()["lines"]:
        for name in line["designators"].split(","):
            from_bom[name] = line["label"] if line["kind"] == "transistor" else line["value"]
    elements = _elements(netlist)
    assert set(elements) == set(from_bom)  # one for one
    for name, value in elements.items():
        if name.startswith("Q"):
            assert value == re.sub(r"[^A-Za-z0-9_]", "_", str(from_bom[name]))
        else:
            assert value == pytest.approx(from_bom[name], rel=1e-9), name
    # ngspice: the netlist runs as written once its commented .op is enabled; the base sits at
    # the model's DC operating point
    runnable = netlist.replace("* .op\n", ".op\n").replace(
        ".end\n", ".control\nrun\nprint v(base) v(collector)\n.endc\n.end\n"
    )
    path = tmp_path / "design.cir"
    path.write_text(runnable)
    done = subprocess.run([NGSPICE, "-b", str(path)], capture_output=True, text=True, timeout=60)
    found = dict(re.findall(r"^v\((\w+)\)\s*=\s*([-+0-9.e]+)", done.stdout, re.MULTILINE))
    assert set(found) == {"base", "collector"}, done.stdout + done.stderr
    op = best["operating_point"]
    assert float(found["base"]) == pytest.approx(op["v_base"], rel=0.03)
    assert float(found["collector"]) == pytest.approx(op["v_collector"], rel=0.03)


def test_netlist_command_from_a_spec_and_from_a_candidate_on_stdin(tmp_path: Path, monkeypatch) -> None:
    storage = str(tmp_path / "s.journal")
    spec = str(ROOT / "specs" / "bench_stock_preamp.yaml")
    code, out, err = run_cli("netlist", spec, "--storage", storage, "--trials", "200", "--quiet")
    assert code == 0 and "no stored search of this spec" in err
    assert ".temp 27.0" in out and "* .op" in out and "* Itest 0 out AC 1" in out
    assert re.search(r"^Rsource sig src 2200\.0$", out, re.MULTILINE)  # the spec's source
    assert re.search(r"^Rload out 0 22000\.0$", out, re.MULTILINE)  # and load
    code, bom_out, err = run_cli("bom", spec, "--storage", storage, "--trials", "200", "--format", "json")
    assert code == 0 and "reusing the stored search" in err
    code, cand, _ = run_cli("search", spec, "--storage", storage, "--trials", "200", "--format", "json", "--top", "1")
    monkeypatch.setattr(sys, "stdin", io.StringIO(json.dumps(json.loads(cand)["candidates"][0])))
    code, piped, _ = run_cli("netlist", "-")
    assert code == 0
    assert _elements(piped) == _elements(out)


def test_report_writes_one_self_contained_sheet(tmp_path: Path) -> None:
    storage = str(tmp_path / "s.journal")
    code, _, err = run_cli(
        "report",
        str(ROOT / "specs" / "bench_stock_preamp.yaml"),
        "--storage",
        storage,
        "--trials",
        "200",
        "--out",
        str(tmp_path / "sheet"),
        "--quiet",
    )
    assert code == 0, err
    page = (tmp_path / "sheet" / "rank1.html").read_text(encoding="utf-8")
    for heading in (
        "Connections",
        "Bill of materials",
        "Operating point",
        "Metrics and margins",
        "Worst case",
        "Ratings",
        "Cautions",
        "Frequency response",
        "Transfer curve",
    ):
        assert f"<h2>{heading}" in page, heading
    assert page.count("<svg") == 2 and "src=" not in page  # plots inline, nothing fetched
    # each node's min <= typ <= max, in volts
    for lo, typ, hi in re.findall(r"<td>\w+</td><td>([-0-9.]+) V</td><td>([-0-9.]+) V</td><td>([-0-9.]+) V</td>", page):
        assert float(lo) <= float(typ) + 1e-9 <= float(hi) + 2e-9


# ---- 4: units ----------------------------------------------------------------------------


def test_evaluate_prints_every_figure_with_its_unit() -> None:
    code, out, _ = run_cli(
        "evaluate",
        str(ROOT / "specs" / "contact_pickup_buffer.yaml"),
        "--topology",
        "divider_ce",
        "--set",
        "r_top=270k",
        "--set",
        "r_bottom=51k",
        "--set",
        "r_collector=11k",
        "--set",
        "r_emitter=1k3",
        "--samples",
        "50",
    )
    assert code == 0
    section = None
    for line in out.splitlines():
        if line.endswith(":") or line.startswith(("ratings", "metrics", "operating")):
            section = line
            continue
        if line.startswith("  ") and section and not line.strip().startswith("active"):
            assert re.search(r"\d\s?(?:[pnuµmkMG]?(?:V|A|W|Ω|Hz)|V/V|dB|%|parts|values|EUR| max/min)", line), line
    assert re.search(r"thd\s+[0-9.]+ %", out)
    assert re.search(r"noise_ein_v\s+[0-9.]+ [nµ]V rms, [0-9.]+ nV/√Hz", out)
    assert re.search(r"noise_figure_db\s+[-0-9.]+ dB", out)


def test_search_table_has_device_noise_why_and_columns(tmp_path: Path) -> None:
    spec = str(ROOT / "specs" / "bench_stock_preamp.yaml")
    code, out, _ = run_cli(
        "search", spec, "--storage", str(tmp_path / "s.journal"), "--trials", "200", "--top", "3", "--quiet"
    )
    header = next(line for line in out.splitlines() if line.startswith("rank "))
    for column in ("device", "noise", "why"):
        assert column in header
    code, out, _ = run_cli(
        "search",
        spec,
        "--storage",
        str(tmp_path / "s.journal"),
        "--trials",
        "200",
        "--top",
        "3",
        "--columns",
        "rank,current,noise",
        "--quiet",
    )
    rows = [line.split("  ")[0] for line in out.splitlines()]
    header = next(line for line in out.splitlines() if line.startswith("rank "))
    assert header.split() == ["rank", "current", "noise"]
    assert re.search(r"\d [mµ]A\s+\d", out) and "nV/√Hz" in out and rows


# ---- 5: mistakes caught before the search ------------------------------------------------


def _spec_file(tmp_path: Path, **changes: object) -> str:
    data = yaml.safe_load((ROOT / "specs" / "bench_stock_preamp.yaml").read_text())
    data.update(changes)
    path = tmp_path / "spec.yaml"
    path.write_text(yaml.safe_dump(data))
    return str(path)


def _refused(tmp_path: Path, argv: list[str], *needles: str) -> None:
    """Exit code 2 with a message naming the field and the value, and no search stored; a
    mistake in the spec is refused by `check` as well as `search`, one in a flag by `search`."""
    storage = tmp_path / "never.journal"
    runs = [["search", *argv, "--storage", str(storage)]]
    if len(argv) == 1:
        runs.append(["check", argv[0]])
    for args in runs:
        code, _, err = run_cli(*args)
        assert code == 2, (args, err)
        for needle in needles:
            assert needle in err, (needle, err)
        assert "Traceback" not in err
    assert not storage.exists()  # refused before any trial ran


def test_positive_gain_with_only_inverting_topologies_is_refused(tmp_path: Path) -> None:
    inverting = ["divider_ce", "divider_ce_split", "feedback_ce", "ce_follower"]  # the followers are not
    _refused(
        tmp_path,
        [_spec_file(tmp_path, gain={"target": 30, "tolerance": "1 dB"}, topologies=inverting)],
        "gain.target",
        "'30'",
        "no topology in the spec",
        "non-inverting",
    )


def test_split_supply_is_refused_by_a_single_rail_stage_alone(tmp_path: Path, monkeypatch) -> None:
    # eligibility (optimizer/validation.py): a stage that declares no split supply
    monkeypatch.setattr(FeedbackCE, "supplies", ("positive", "negative"))  # as if drawn for single rails alone
    _refused(
        tmp_path,
        [_spec_file(tmp_path, supply="+-12 V", topologies=["feedback_ce"])],
        "topologies",
        "feedback_ce cannot",
        "no split supply: runs on positive, negative",
    )


def test_pnp_device_is_refused_by_npn_only_topologies(tmp_path: Path, monkeypatch) -> None:
    monkeypatch.setattr(DividerCE, "polarities", ("npn",))  # as if divider_ce were drawn for npn alone
    _refused(
        tmp_path,
        [_spec_file(tmp_path, devices=["SF-P1"], topologies=["divider_ce"])],
        "topologies",
        "divider_ce cannot",
        "built with npn devices; the spec's are SF-P1 (pnp)",
    )


def test_one_milli_ohm_is_refused_with_the_megohm_hint(tmp_path: Path) -> None:
    _refused(
        tmp_path,
        [_spec_file(tmp_path, load_impedance="1m")],
        "load_impedance",
        "'1m'",
        "milli-ohm? write 1M or 1meg for megohm",
    )
    assert load_spec(_spec_file(tmp_path, load_capacitance="1m")).load_capacitance == pytest.approx(1e-3)


def test_supply_current_of_mega_amps_is_refused(tmp_path: Path) -> None:
    _refused(
        tmp_path,
        [_spec_file(tmp_path, limits={"supply_current_max": "3 MA"})],
        "limits.supply_current_max",
        "'3 MA'",
        "at most 1 A",
    )
    assert load_spec(_spec_file(tmp_path, limits={"supply_current_max": "3 mA"})).limits.supply_current_max == 3e-3


def test_unknown_plot_name_and_column_are_refused_before_the_search(tmp_path: Path) -> None:
    spec = str(ROOT / "specs" / "bench_stock_preamp.yaml")
    _refused(
        tmp_path,
        [spec, "--plot", str(tmp_path / "pareto.svg")],
        "--plot",
        "pareto.svg",
        "front.svg, response.svg or transfer.svg",
    )
    _refused(tmp_path, [spec, "--columns", "rank,colour"], "--columns", "rank,colour", "noise")


# ---- 6: cautions where called for --------------------------------------------------------


def test_mains_caution_only_where_the_scenario_or_supply_calls_for_it(tmp_path: Path) -> None:
    from optimizer.candidates import assess

    spec = load_spec(ROOT / "specs" / "bench_stock_preamp.yaml")
    parts = {"r_top": 100e3, "r_bottom": 10e3, "r_collector": 10e3, "r_emitter": 1e3}
    bench = load_catalog("bench_stock")

    def cautions(**changes: object) -> str:
        data = yaml.safe_load((ROOT / "specs" / "bench_stock_preamp.yaml").read_text())
        data.update(changes)
        return " ".join(assess(parse_spec(data), bench, "divider_ce", parts, samples=10)["cautions"])

    plain = " ".join(assess(spec, bench, "divider_ce", parts, samples=10)["cautions"])
    assert "mains" not in plain and "local electrical codes" not in plain
    assert "mains-powered" in cautions(mains_powered=True)
    assert "above 30 V" in cautions(supply="48 V") and "mains" not in cautions(supply="48 V")
