"""Write the model-versus-ngspice agreement table (benchmarks/results/spice_agreement.md).

    .venv/bin/python benchmarks/spice_agreement.py

One row per design and metric: model, ngspice, error, tolerance; for gain and collector
current also the hand method's own estimate and its error against ngspice.
"""
from __future__ import annotations

import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))

from spice_agreement import agreement_rows  # noqa: E402
from spice_designs import check_designs, polarity_designs  # noqa: E402


def _fmt(value: float | None) -> str:
    return "" if value is None else f"{value:.4g}"


def main() -> int:
    rows = [row for design in check_designs() + polarity_designs() for row in agreement_rows(design)]
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
    for r in rows:
        lines.append(f"| {r['design']} | {r['metric']} | {_fmt(r['model'])} | {_fmt(r['simulator'])} | "
                     f"{r['error']:+.3g} | {r['tolerance']:g} | {'yes' if r['within'] else 'NO'} | "
                     f"{_fmt(r.get('hand'))} | {_fmt(r.get('hand_error'))} |")
    failed = [r for r in rows if not r["within"]]
    gain_rows = [r for r in rows if r["metric"] == "gain"]
    lines += ["", f"Rows: {len(rows)}; outside tolerance: {len(failed)}.",
              f"Mean |gain error|: model {sum(abs(r['error']) for r in gain_rows) / len(gain_rows):.2%}, "
              f"hand method {sum(abs(r['hand_error']) for r in gain_rows) / len(gain_rows):.2%}."]
    out.write_text("\n".join(lines) + "\n", encoding="utf-8")
    print("\n".join(lines[-2:]))
    print(f"written {out.relative_to(ROOT)}")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
