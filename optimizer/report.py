"""Every figure with its unit, and the design sheet of one candidate.

:func:`show` writes any metric, operating-point value or rating of a candidate record with its
unit (THD in %, noise in µV rms and nV/√Hz, the noise figure in dB); the CLI's tables and the
design sheet both use it. :func:`design_sheet` writes one self-contained HTML page a
technician can build from: the connections, the BOM, the DC node voltages with their
worst-case spread (min/typ/max over part tolerances, hFE spread and temperature, by
:func:`optimizer.tolerance.worst_case`), the metrics with units and margins to the spec's
limits, the worst case, the yield, the ratings, the cautions and the plots (inline SVG).
"""

from __future__ import annotations

import html
import math
from typing import TYPE_CHECKING

from optimizer.candidates import assess, design_from_record
from optimizer.catalog import Catalog
from optimizer.metrics import LIMIT_METRICS, METRICS
from optimizer.netlist import dc_node_voltages, designators, element_nodes
from optimizer.physics import SWEEP
from optimizer.spec import Spec, spec_digest
from optimizer.tolerance import Tolerance, worst_case
from optimizer.units import format_value

if TYPE_CHECKING:  # the BOM (pandas) is imported by the design sheet only: the search's tables run without it
    from optimizer.bom import Kit

#: metric -> how it is written (optimizer/metrics.py ``Metric.shown``)
METRIC_UNITS: dict[str, str] = {m.key: m.shown for m in METRICS}


def _unit_of(key: str) -> str:
    """The unit of a metric, operating-point or rating key (V, A, W, ...)."""
    if key in METRIC_UNITS:
        return METRIC_UNITS[key]
    if key.startswith(("p_", "q_power")):
        return "W"
    if key.startswith(("i", "supply_current")):
        return "A"
    if key.startswith("v"):
        return "V"
    return ""


def show(key: str, value: float | None, currency: str = "") -> str:
    """``value`` of ``key`` written with its unit ("68 kΩ", "1.2 mA", "0.42 %", "-20.1 V/V"); a -3 dB
    corner found at an end of the response search's span (physics.SWEEP, where corners beyond it
    are reported) as "above 100 MHz" or "below 100 mHz"."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "-"
    unit = _unit_of(key)
    if key == "active":
        return "yes" if value else "no (saturated or cut off)"
    if unit == "%":
        return f"{100 * value:.3g} %"
    if unit in ("dB", "V/V", "parts", "values", "max/min"):
        return f"{value:.3g} {unit}"
    if unit == "currency":
        return f"{value:.2f} {currency}".rstrip()
    if not math.isfinite(value):
        return f"{value} {unit}"
    if key in ("f_low", "f_high") and not SWEEP[0] < value < SWEEP[1]:  # a corner past the response search's span
        return f"below {format_value(SWEEP[0], unit)}" if value <= SWEEP[0] else f"above {format_value(SWEEP[1], unit)}"
    if unit.endswith(" p-p") or unit.endswith(" rms"):
        base, suffix = unit.split(" ", 1)
        return f"{format_value(value, base)} {suffix}"
    return format_value(value, unit)


def noise_density(candidate: dict) -> float | None:
    """The equivalent input noise as an average density over the band, V/√Hz."""
    ein = (candidate.get("metrics") or {}).get("noise_ein_v")
    band = (candidate.get("conditions") or {}).get("band")
    if ein is None or not band:
        return None
    return float(ein) / math.sqrt(float(band[1]) - float(band[0]))


def show_noise(candidate: dict) -> str:
    """Noise as "0.56 µV rms, 4 nV/√Hz" (rms over the band and its average density)."""
    ein = (candidate.get("metrics") or {}).get("noise_ein_v")
    density = noise_density(candidate)
    if ein is None or density is None:
        return "-"
    return f"{show('noise_ein_v', ein)}, {density * 1e9:.3g} nV/√Hz"


def why(candidate: dict, count: int = 2) -> str:
    """What lifts and what holds back the candidate's score: its ``count`` strongest terms and
    its weakest ("margin 1.00, yield 1.00; weakest parts 0.57"), or "-" without score terms."""
    terms = sorted((candidate.get("score_terms") or {}).items(), key=lambda kv: -float(kv[1]))
    if not terms:
        return "-"
    strong = ", ".join(f"{name} {float(value):.2f}" for name, value in terms[:count])
    return strong + (f"; weakest {terms[-1][0]} {float(terms[-1][1]):.2f}" if len(terms) > count else "")


# ---- design sheet ----------------------------------------------------------------------


def _full(candidate: dict, spec: Spec, catalog: Catalog) -> dict:
    """The candidate with its full assessment (operating point, ratings, worst case, yield)."""
    if all(k in candidate for k in ("operating_point", "ratings", "worst_case")):
        return candidate
    parts = {role: p["value"] for role, p in candidate["parts"].items()}
    full = assess(spec, catalog, candidate["topology"], parts, candidate["transistor"]["id"])
    return {**full, **{k: candidate[k] for k in ("rank", "basis", "score_terms") if k in candidate}}


def node_spread(candidate: dict, bill: Kit) -> dict[str, tuple[float, float, float]]:
    """(min, typ, max) DC voltage of every node over the worst-case corners (V): parts at
    their BOM tolerances, hFE at min and max, both ends of the temperature range."""
    topology, parts, device, conditions = design_from_record(candidate)
    tolerance: dict[str, Tolerance] = {}
    for line in bill.lines.itertuples():
        for role in str(line.roles).split(","):
            if line.tolerance and str(line.tolerance).endswith("%"):
                tolerance[role] = float(str(line.tolerance).rstrip(" %")) / 100
    temperature = tuple(candidate["conditions"].get("temperature") or (conditions.temperature,) * 2)
    spread = worst_case(topology, parts, device, conditions, tolerance, (float(temperature[0]), float(temperature[1])))
    typ = dc_node_voltages(
        topology.name, candidate["operating_point"], conditions.supply, device.polarity, conditions.below_ground
    )
    low = dc_node_voltages(
        topology.name,
        {k: float(v[0][0]) for k, v in spread.items()},
        conditions.supply,
        device.polarity,
        conditions.below_ground,
    )
    high = dc_node_voltages(
        topology.name,
        {k: float(v[1][0]) for k, v in spread.items()},
        conditions.supply,
        device.polarity,
        conditions.below_ground,
    )
    return {node: (low[node], typ[node], high[node]) for node in typ}


def _table(header: list[str], rows: list[list[str]]) -> str:
    head = "".join(f"<th>{html.escape(h)}</th>" for h in header)
    body = "".join("<tr>" + "".join(f"<td>{html.escape(str(c))}</td>" for c in row) + "</tr>" for row in rows)
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def _margins(candidate: dict, spec: Spec, currency: str) -> list[list[str]]:
    rows = []
    metrics = candidate["metrics"]
    limits = {metric: (name, sign) for name, metric, sign in LIMIT_METRICS}
    for key, value in metrics.items():
        limit_name, sign = limits.get(key, (None, 0))
        limit = getattr(spec.limits, limit_name) if limit_name else None
        shown = show_noise(candidate) if key == "noise_ein_v" else show(key, value, currency)
        if limit is None or value is None:
            rows.append([key, shown, "", ""])
            continue
        margin = sign * (value - limit) / limit
        rows.append([key, shown, f"{limit_name} {show(key, limit)}", f"{100 * margin:+.0f} %"])
    return rows


def design_sheet(candidate: dict, spec: Spec, catalog: Catalog, *, units: int = 1) -> str:
    """The self-contained HTML design sheet of ``candidate`` (inline SVG plots)."""
    from optimizer import plots  # matplotlib is the optional [plots] extra: imported only here
    from optimizer.bom import NO_BASIS, kit

    record = _full(candidate, spec, catalog)
    bill = kit(record, catalog, units, spec)
    topology, parts, _, _ = design_from_record(record)
    values = {role: float(v[0]) for role, v in parts.items()}
    names = designators(topology.name, values)
    nodes = element_nodes(topology.name)
    spread = node_spread(record, bill)
    basis = (record.get("basis") or {}).get("label") or NO_BASIS
    verdict = "meets every limit" if record.get("feasible") else "MISSES: " + ", ".join(record.get("violations", {}))
    connections = []
    transistors = {role for role, *_ in topology.transistor_pins}
    spread_words = (
        "IDSS and VP at both ends of their spread" if topology.device_kind == "jfet" else "hFE at its min and max"
    )
    pins = ("D", "G", "S") if topology.device_kind == "jfet" else ("C", "B", "E")
    order = {"R": 0, "C": 1}  # then the transistors (Q.., or J.. for a JFET)
    for role, name in sorted(
        names.items(), key=lambda kv: (2 if kv[0] in transistors else order[kv[1][0]], int(kv[1][1:]))
    ):
        label = record["transistor"]["id"] if role in transistors else record["parts"][role]["label"]
        ends = (
            " / ".join(f"{pin} {node}" for pin, node in zip(pins, nodes[role]))
            if role in transistors
            else f"{nodes[role][0]} – {nodes[role][1]}"
        )
        connections.append([name, role, label, ends])
    op_rows = [[node, f"{lo:.3f} V", f"{typ:.3f} V", f"{hi:.3f} V"] for node, (lo, typ, hi) in spread.items()]
    op_rows += [[k, "", show(k, v), ""] for k, v in record["operating_point"].items() if not k.startswith("v_")]
    worst = [[k, show(k, lo), show(k, hi)] for k, (lo, hi) in record.get("worst_case", {}).items()]
    ratings = [
        [k, show(k, r["value"]), show(k, r["limit"]), f"{100 * r['value'] / r['limit']:.0f} %"]
        for k, r in record.get("ratings", {}).items()
    ]
    bom_rows = [[str("" if v is None else v) for v in line.values()] for line in bill.to_dict()["lines"]]

    response = plots.response_plot(record, fmt="svg").decode()
    transfer = plots.transfer_plot(record, fmt="svg", spec_swing=spec.limits.swing_min).decode()
    cautions = "".join(f"<li>{html.escape(c)}</li>" for c in bill.cautions)
    title = f"{spec.name}: {record['topology']} with {record['transistor']['id']}"
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>{html.escape(title)}</title>
<style>body{{font-family:sans-serif;max-width:60em;margin:auto}}table{{border-collapse:collapse;margin:.5em 0}}
td,th{{border:1px solid #999;padding:.2em .5em;text-align:left;font-size:90%}}svg{{max-width:100%;height:auto}}</style>
</head><body>
<h1>{html.escape(title)}</h1>
<p>Spec <b>{html.escape(spec.name)}</b> (digest {spec_digest(spec)}), catalog {html.escape(catalog.name)},
rank {record.get("rank", "-")}. Verdict: {html.escape(verdict)}. Basis: {html.escape(basis)}.
Yield: {show("yield", record["metrics"].get("yield"))} of builds meet every limit (Monte Carlo).</p>
<h2>Cautions</h2><ul>{cautions}</ul>
<h2>Connections</h2>
<p>Nodes: vcc the supply ({spec.supply:g} V), src the input after the source resistance, out the load, 0 ground.</p>
{_table(["designator", "role", "value", "connects"], connections)}
<h2>Bill of materials ({units} unit{"s" if units != 1 else ""})</h2>
{_table(list(bill.lines.columns), bom_rows)}
<h2>Operating point</h2>
<p>DC node voltages to ground, typical and min/max over the worst-case corners (parts at their tolerance,
{spread_words}, {spec.temperature[0]:g} °C and {spec.temperature[1]:g} °C).</p>
{_table(["node / quantity", "min", "typ", "max"], op_rows)}
<h2>Metrics and margins</h2>
{_table(["metric", "value", "spec limit", "margin"], _margins(record, spec, catalog.currency))}
<h2>Worst case</h2>
{_table(["metric", "low", "high"], worst)}
<h2>Ratings</h2>
{_table(["part", "stress", "rating", "of rating"], ratings)}
<h2>Frequency response</h2>
{response}
<h2>Transfer curve</h2>
{transfer}
</body></html>
"""


__all__ = ["METRIC_UNITS", "show", "show_noise", "noise_density", "why", "node_spread", "design_sheet"]
