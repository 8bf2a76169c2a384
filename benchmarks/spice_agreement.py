"""Write the model-versus-ngspice agreement table (benchmarks/results/spice_agreement.md).

    .venv/bin/python benchmarks/spice_agreement.py

One row per design and metric: model, ngspice, error, tolerance; for gain and collector
current also the hand method's own estimate and its error against ngspice. The JFET stages'
designs (spice_designs.jfet_check_designs) follow the bipolar ones; their "ic" is the drain current.

    .venv/bin/python benchmarks/spice_agreement.py --topology feedback_pair

simulates only that topology's designs and writes them as their own section at the end of the
table (replacing an earlier section of that topology), leaving the other rows as they are.

    .venv/bin/python benchmarks/spice_agreement.py --direct

does the same for the direct-coupled inputs on split supplies (spice_designs.direct_coupled_designs).

    .venv/bin/python benchmarks/spice_agreement.py --fb-split

does the same for the feedback pair and feedback_ce on split supplies (spice_designs.fb_split_designs).
"""

from __future__ import annotations

import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))

from spice_agreement import agreement_rows  # noqa: E402
from spice_designs import (  # noqa: E402
    check_designs,
    direct_coupled_designs,
    fb_split_designs,
    jfet_check_designs,
    later_polarity_designs,
    pair_ac_designs,
    polarity_designs,
)


def _fmt(value: float | None) -> str:
    return "" if value is None else f"{value:.4g}"


def all_designs() -> list:
    """Every check design: the bipolar stages', the JFET stages', then the PNP, negative-rail and
    split-supply versions of two bipolar stages, and the PNP, negative-rail (and the followers'
    split-supply) versions of the followers and the feedback pair, the direct-coupled inputs, the
    feedback pair and feedback_ce on split supplies, and the feedback pair with its leg AC-coupled."""
    return (
        check_designs()
        + jfet_check_designs()
        + polarity_designs()
        + later_polarity_designs()
        + direct_coupled_designs()
        + fb_split_designs()
        + pair_ac_designs()
    )


def _row(r: dict) -> str:
    return (
        f"| {r['design']} | {r['metric']} | {_fmt(r['model'])} | {_fmt(r['simulator'])} | "
        f"{r['error']:+.3g} | {r['tolerance']:g} | {'yes' if r['within'] else 'NO'} | "
        f"{_fmt(r.get('hand'))} | {_fmt(r.get('hand_error'))} |"
    )


def topology_section(title: str, designs: list, option: str) -> int:
    """Simulate ``designs`` only; their rows replace the table's section ``title`` (written by
    the benchmark's ``option``)."""
    rows = [row for design in designs for row in agreement_rows(design)]
    out = ROOT / "benchmarks" / "results" / "spice_agreement.md"
    marker = f"\n## {title}\n"
    text = out.read_text(encoding="utf-8")
    text = text.split(marker)[0].rstrip("\n") + "\n"
    failed = [r for r in rows if not r["within"]]
    lines = [
        marker.strip(),
        "",
        f"Produced by `benchmarks/spice_agreement.py {option}`.",
        "",
        "| design | metric | model | ngspice | error | tolerance | within | hand | hand error |",
        "| --- | --- | --- | --- | --- | --- | --- | --- | --- |",
        *map(_row, rows),
        "",
        f"Rows: {len(rows)}; outside tolerance: {len(failed)}.",
    ]
    out.write_text(text + "\n" + "\n".join(lines) + "\n", encoding="utf-8")
    print(lines[-1])
    return 1 if failed else 0


def main() -> int:
    if "--topology" in sys.argv:
        topology = sys.argv[sys.argv.index("--topology") + 1]
        return topology_section(
            topology, [d for d in all_designs() if d.topology == topology], f"--topology {topology}"
        )
    if "--direct" in sys.argv:
        return topology_section("direct-coupled inputs", direct_coupled_designs(), "--direct")
    if "--fb-split" in sys.argv:
        return topology_section("split-supply feedback stages", fb_split_designs(), "--fb-split")
    rows = [row for design in all_designs() for row in agreement_rows(design)]
    out = ROOT / "benchmarks" / "results" / "spice_agreement.md"
    lines = [
        "# Stage models against ngspice",
        "",
        "Produced by `benchmarks/spice_agreement.py`; the same rows are asserted by",
        "`tests/test_spice_agreement.py`. Error is relative, except noise (dB).",
        "`hand` is the textbook estimate for the same design (synthesis, unrounded).",
        "",
        "| design | metric | model | ngspice | error | tolerance | within | hand | hand error |",
        "| --- | --- | --- | --- | --- | --- | --- | --- | --- |",
    ]
    lines += map(_row, rows)
    failed = [r for r in rows if not r["within"]]
    gain_rows = [r for r in rows if r["metric"] == "gain"]
    lines += [
        "",
        f"Rows: {len(rows)}; outside tolerance: {len(failed)}.",
        f"Mean |gain error|: model {sum(abs(r['error']) for r in gain_rows) / len(gain_rows):.2%}, "
        f"hand method {sum(abs(r['hand_error']) for r in gain_rows) / len(gain_rows):.2%}.",
    ]
    out.write_text("\n".join(lines) + "\n", encoding="utf-8")
    print("\n".join(lines[-2:]))
    print(f"written {out.relative_to(ROOT)}")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
