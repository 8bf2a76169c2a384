"""Every metric of a candidate, in one table: key, units, direction, labels, the limit that
reads it and how closely the model must agree with ngspice.

Scoring (limits, objectives), the CLI table, the report, the plots, the OpenAPI document,
the docs and the ngspice agreement checks read this table; nothing restates it. Rows are
in the order limits are judged (``LIMIT_METRICS``), which fixes the order violations are
summed in.
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class Metric:
    """One metric of a candidate design.

    ``unit`` is the SI unit of the value in JSON and CSV ("" for a fraction or a count);
    ``shown`` how the report and the CLI write it ("%": a fraction shown in per cent,
    "V p-p"/"V rms": volts with that suffix, "currency": the catalog's currency, otherwise
    a unit for ``units.format_value`` or a plain suffix); ``axis`` the plot axis (name,
    scale from SI, unit shown). ``direction``: set when the metric may be an objective.
    ``limit``: the spec limit that bounds it and +1 for a minimum, -1 for a maximum.
    ``column``: the CLI table column (name for --columns, header). ``spice``: the largest
    model-vs-ngspice difference accepted (tolerance, kind: "rel" fraction, "db" ratio in
    dB, "diff" plain difference in the metric's unit), for tests/spice_agreement.py."""

    key: str
    unit: str
    shown: str
    description: str
    axis: tuple[str, float, str] | None = None
    direction: str | None = None
    limit: tuple[str, int] | None = None
    column: tuple[str, str] | None = None
    spice: tuple[float, str] | None = None


METRICS: tuple[Metric, ...] = (
    Metric(
        "gain",
        "V/V",
        "V/V",
        "mid-band voltage gain source to load (negative: inverting)",
        ("gain", 1.0, "V/V"),
        column=("gain", "gain"),
        spice=(0.03, "rel"),
    ),
    Metric("gain_db", "dB", "dB", "|gain| in dB", ("gain", 1.0, "dB")),
    Metric(
        "gain_error_db",
        "dB",
        "dB",
        "gain_db minus the spec's target, dB",
        ("gain error", 1.0, "dB"),
        direction="minimise",
    ),
    Metric(
        "input_impedance",
        "ohm",
        "ohm",
        "|Z| seen by the source through c_in at the band's geometric mean, every capacitor at its value",
        ("input impedance", 1e-3, "kΩ"),
        "maximise",
        ("input_impedance_min", 1),
        ("zin", "Zin"),
        (0.05, "rel"),
    ),
    Metric(
        "output_impedance",
        "ohm",
        "ohm",
        "|Z| seen by the load through c_out at the band's geometric mean, every capacitor at its value",
        ("output impedance", 1.0, "Ω"),
        "minimise",
        ("output_impedance_max", -1),
        ("zout", "Zout"),
        (0.10, "rel"),
    ),
    Metric(
        "swing_vpp",
        "V",
        "V p-p",
        "usable output swing at the load, peak-to-peak (10 % gain compression)",
        ("output swing", 1.0, "Vpp"),
        "maximise",
        ("swing_min", 1),
        ("swing", "swing"),
        (0.10, "rel"),
    ),  # the 10 % rule
    Metric("clip_vpp", "V", "V p-p", "hard clip level of the AC load line, peak-to-peak", spice=(0.10, "rel")),
    Metric(
        "supply_current",
        "A",
        "A",
        "DC current drawn from the supply",
        ("supply current", 1e3, "mA"),
        "minimise",
        ("supply_current_max", -1),
        ("current", "current"),
    ),
    Metric(
        "thd",
        "",
        "%",
        "total harmonic distortion at the spec's signal level (fraction)",
        ("THD", 100.0, "%"),
        "minimise",
        ("thd_max", -1),
        ("thd", "THD"),
        (0.30, "rel"),
    ),
    Metric(
        "noise_ein_v",
        "V",
        "V rms",
        "equivalent input noise over the band, V rms",
        ("input noise (EIN)", 1e6, "µV rms"),
        "minimise",
        ("noise_ein_max", -1),
        ("noise", "noise"),
        (1.5, "db"),
    ),
    Metric(
        "noise_figure_db",
        "dB",
        "dB",
        "noise figure against the source resistance at 290 K",
        ("noise figure", 1.0, "dB"),
        column=("nf", "NF"),
        spice=(0.5, "diff"),
    ),
    Metric(
        "psrr_db", "dB", "dB", "supply rejection, the worse of psrr_ripple_db and psrr_mid_db", limit=("psrr_min_db", 1)
    ),
    Metric("psrr_ripple_db", "dB", "dB", "supply rejection at the ripple frequency (100 Hz)", spice=(2.0, "diff")),
    Metric("psrr_mid_db", "dB", "dB", "supply rejection at the band's geometric mean", spice=(2.0, "diff")),
    Metric("f_low", "Hz", "Hz", "low -3 dB corner", ("low -3 dB corner", 1.0, "Hz"), spice=(0.10, "rel")),
    Metric("f_high", "Hz", "Hz", "high -3 dB corner", ("high -3 dB corner", 1e-3, "kHz"), spice=(0.25, "rel")),
    Metric(
        "midband_deviation",
        "",
        "%",
        "how far |gain| at the band's centre (the whole response: capacitors as chosen, junction and load"
        " capacitances) is from the mid-band gain (limit 'midband': 2 %)",
    ),
    Metric("q_power", "W", "W", "largest transistor dissipation", ("transistor dissipation", 1e3, "mW")),
    Metric("emitter_voltage", "V", "V", "DC across the first stage's emitter resistor(s)"),
    Metric(
        "loop_gain", "V/V", "V/V", "mid-band loop gain of an overall feedback loop (none: empty)", spice=(0.05, "rel")
    ),
    Metric(
        "phase_margin_deg",
        "deg",
        "°",
        "phase margin of an overall feedback loop (none: empty)",
        ("phase margin", 1.0, "°"),
        limit=("phase_margin_min_deg", 1),
        spice=(10.0, "diff"),
    ),
    Metric(
        "part_count",
        "",
        "parts",
        "resistors, capacitors and transistors present",
        ("part count", 1.0, "parts"),
        "minimise",
    ),
    Metric("unique_values", "", "values", "distinct resistor and capacitor values", ("distinct values", 1.0, "values")),
    Metric(
        "cost",
        "",
        "currency",
        "parts cost per unit, in the catalog's currency",
        ("cost per unit", 1.0, "currency"),
        "minimise",
        column=("cost", "cost"),
    ),
    Metric(
        "yield",
        "",
        "%",
        "fraction of Monte Carlo builds meeting every limit",
        ("yield", 100.0, "%"),
        column=("yield", "yield"),
    ),
    Metric("ic_spread", "", "max/min", "collector current spread over part tolerances and hFE, max/min"),
)

BY_KEY: dict[str, Metric] = {m.key: m for m in METRICS}

#: each optional spec limit: (limit name, metric it bounds, +1 for a minimum, -1 for a maximum)
LIMIT_METRICS: tuple[tuple[str, str, int], ...] = tuple(
    (m.limit[0], m.key, m.limit[1]) for m in METRICS if m.limit is not None
)


def metric(key: str) -> Metric | None:
    """The table's row for ``key`` (None for a key that is not a metric)."""
    return BY_KEY.get(key)


def unit(key: str) -> str:
    """SI unit of a metric's value ("" for a fraction, a count or an unknown key)."""
    m = BY_KEY.get(key)
    return m.unit if m else ""


def markdown_table() -> str:
    """The table as Markdown, for the docs (docs/metrics.md is generated from it)."""
    rows = [
        "| key | unit | shown | objective | limit | ngspice tolerance | description |",
        "|---|---|---|---|---|---|---|",
    ]
    for m in METRICS:
        limit = f"{m.limit[0]} ({'min' if m.limit[1] > 0 else 'max'})" if m.limit else ""
        spice = f"{m.spice[0]:g} {m.spice[1]}" if m.spice else ""
        rows.append(
            f"| `{m.key}` | {m.unit or '-'} | {m.shown} | {m.direction or ''} | {limit} | {spice} | {m.description} |"
        )
    return "\n".join(rows) + "\n"


__all__ = ["Metric", "METRICS", "BY_KEY", "LIMIT_METRICS", "metric", "unit", "markdown_table"]
