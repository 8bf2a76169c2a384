"""Plots of a search and of one candidate: Pareto front, frequency response, transfer curve.

Each function returns the image as bytes ("svg" or "png") and, given ``path``, also writes
it there. Figures are drawn with matplotlib's object interface on its Agg / SVG renderers
(no pyplot, no GUI, no global state), so the REST service may call them from any thread.
Every candidate plot is rebuilt from the candidate record alone
(:func:`optimizer.candidates.design_from_record`), so it needs neither spec nor catalog.
"""

from __future__ import annotations

import io
import math
from pathlib import Path

import numpy as np
from matplotlib.figure import Figure

from optimizer.candidates import design_from_record
from optimizer.errors import InputError
from optimizer.metrics import METRICS
from optimizer.palette import MARKERS, PLOT_COLOURS as COLOURS
from optimizer.scoring import pareto_mask
from optimizer.spec import DIRECTION_ALIASES
from optimizer.units import format_value

FORMATS = ("svg", "png")
PNG_DPI = 110
FIGSIZE = (7.2, 4.6)  # inches
RESPONSE_POINTS = 480  # log-spaced frequencies of the response curve
TRANSFER_POINTS = 401  # source voltages of the transfer sweep
TRANSFER_OVERDRIVE = 2.0  # sweep to this multiple of the source level that reaches the clip level
FLAT_SLOPE = 0.2  # the transfer curve "clips" where its slope falls below this part of mid-scale

#: metric -> (axis name, scale from SI, unit shown), from optimizer/metrics.py
METRIC_AXES: dict[str, tuple[str, float, str]] = {m.key: m.axis for m in METRICS if m.axis}


# ---- output ----------------------------------------------------------------------------


def _check_format(fmt: object) -> str:
    name = str(fmt).lower().lstrip(".") if isinstance(fmt, str) else fmt
    if name not in FORMATS:
        raise InputError.single("format", fmt, "svg or png", title="unknown plot format")
    return name


def _render(fig: Figure, fmt: str, path: str | Path | None) -> bytes:
    """The figure as bytes (reproducible: no date in the file), also written to ``path``."""
    buffer = io.BytesIO()
    metadata = {"Date": None} if fmt == "svg" else {"Software": None}
    fig.savefig(buffer, format=fmt, dpi=PNG_DPI, metadata=metadata, bbox_inches="tight")
    data = buffer.getvalue()
    if path is not None:
        Path(path).write_bytes(data)
    return data


def _axis_label(metric: str, direction: str | None = None) -> str:
    name, _, unit = METRIC_AXES.get(metric, (metric.replace("_", " "), 1.0, ""))
    label = f"{name} ({unit})" if unit else name
    if direction:
        label += ", lower is better" if direction == "minimise" else ", higher is better"
    return label


def _scaled(metric: str, values: np.ndarray) -> np.ndarray:
    return np.asarray(values, dtype=float) * METRIC_AXES.get(metric, ("", 1.0, ""))[1]


# ---- Pareto front ----------------------------------------------------------------------


def _check_objectives(objectives: object) -> list[tuple[str, str]]:
    expected = 'a list of (metric, direction) pairs, e.g. [("supply_current", "minimise")]'
    try:
        pairs = [
            (str(m), DIRECTION_ALIASES[str(d).lower()]) for m, d in objectives
        ]  # any input: a non-pair fails below
    except (TypeError, ValueError, KeyError):
        raise InputError.single("objectives", objectives, expected, title="invalid plot objectives") from None
    if not pairs:
        raise InputError.single("objectives", objectives, expected, title="invalid plot objectives")
    return pairs


def _metric_matrix(points: list[dict], metrics: list[str]) -> np.ndarray:
    """(points, metrics) floats; NaN where a point lacks a metric."""
    out = np.full((len(points), len(metrics)), np.nan)
    for i, point in enumerate(points):
        values = point.get("metrics") or {} if isinstance(point, dict) else {}
        for j, metric in enumerate(metrics):
            value = values.get(metric)
            if isinstance(value, (int, float)) and not isinstance(value, bool):
                out[i, j] = float(value)
    return out


def front_plot(
    points: list[dict],
    objectives: list[tuple[str, str]],
    *,
    chosen: dict | None = None,
    front: list[dict] | None = None,
    fmt: str = "svg",
    path: str | Path | None = None,
    title: str | None = None,
) -> bytes:
    """Scatter of evaluated candidates over the first two objectives (one objective: against
    evaluation order): feasible and infeasible marked apart, the Pareto front joined (``front``
    records if given, else the non-dominated feasible points), the ``chosen`` design starred."""
    fmt = _check_format(fmt)
    pairs = _check_objectives(objectives)
    if not isinstance(points, (list, tuple)):
        raise InputError.single("points", type(points).__name__, "a list of candidate records")
    shown = pairs[:2]
    metrics = [m for m, _ in shown]
    points = list(points)
    values = _metric_matrix(points, metrics)  # objective columns, SI
    feasible = np.array([bool(p.get("feasible")) if isinstance(p, dict) else False for p in points], dtype=bool)
    single = len(shown) == 1

    def to_xy(rows: np.ndarray, index: np.ndarray) -> np.ndarray:
        """Plot coordinates: (evaluation, objective) for one objective, else the two scaled."""
        if single:
            return np.column_stack([index, _scaled(metrics[0], rows[:, 0])])
        return np.column_stack([_scaled(metrics[0], rows[:, 0]), _scaled(metrics[1], rows[:, 1])])

    xy = to_xy(values, np.arange(len(points), dtype=float))
    fig = Figure(figsize=FIGSIZE)
    ax = fig.add_subplot()
    for mask, key in ((~feasible, "infeasible"), (feasible, "feasible")):
        marker = MARKERS[key]
        if mask.any():
            ax.scatter(
                xy[mask, 0],
                xy[mask, 1],
                s=14,
                marker=marker,
                c=COLOURS[key],
                alpha=0.7,
                label=f"{key} ({int(mask.sum())})",
                linewidths=1.0,
            ).set_gid(key)
    if front is not None and not single:
        fxy = to_xy(_metric_matrix(list(front), metrics), np.zeros(len(front)))
    else:
        on_front = np.zeros(len(points), dtype=bool)
        on_front[feasible] = pareto_mask(values[feasible], [d for _, d in shown])
        fxy = xy[on_front]
    fxy = fxy[np.all(np.isfinite(fxy), axis=1)]
    if len(fxy):
        order = np.argsort(fxy[:, 0], kind="stable")
        label = f"{'best feasible' if single else 'Pareto front'} ({len(fxy)})"
        ax.plot(
            fxy[order, 0],
            fxy[order, 1],
            MARKERS["front"] if single else "-" + MARKERS["front"],
            color=COLOURS["front"],
            ms=5,
            lw=1.4,
            label=label,
            zorder=3,
        )[0].set_gid("front")
    if chosen is not None:
        index = next(
            (
                i
                for i, p in enumerate(points)
                if p is chosen
                or (isinstance(p, dict) and isinstance(chosen, dict) and p.get("metrics") == chosen.get("metrics"))
            ),
            np.nan,
        )
        cxy = to_xy(_metric_matrix([chosen], metrics), np.array([float(index)]))[0]
        if np.all(np.isfinite(cxy)):
            rank = chosen.get("rank") if isinstance(chosen, dict) else None
            ax.scatter(
                [cxy[0]],
                [cxy[1]],
                s=180,
                marker=MARKERS["chosen"],
                c=COLOURS["chosen"],
                edgecolors="black",
                linewidths=0.8,
                zorder=4,
                label="chosen" + (f" (rank {rank})" if rank else ""),
            ).set_gid("chosen")
    if not len(points):
        ax.text(0.5, 0.5, "no candidates evaluated", ha="center", va="center", transform=ax.transAxes)
    _zoom_on_feasible(ax, xy, feasible, fxy, single)
    ax.set_xlabel("evaluation" if single else _axis_label(*shown[0]))
    ax.set_ylabel(_axis_label(*shown[-1]))
    note = "" if len(pairs) <= 2 else f" (first 2 of {len(pairs)} objectives shown)"
    ax.set_title((title or ("Candidates and best feasible" if single else "Candidates and Pareto front")) + note)
    ax.grid(True, alpha=0.3)
    if ax.get_legend_handles_labels()[0]:
        ax.legend(loc="best", fontsize=8)
    return _render(fig, fmt, path)


def _zoom_on_feasible(ax, xy: np.ndarray, feasible: np.ndarray, fxy: np.ndarray, single: bool) -> None:
    """Frame the feasible designs and the front (padded), so far-off infeasible designs do not
    squash them into a corner; how many lie outside the frame is noted."""
    inside = np.vstack([xy[feasible], fxy]) if len(fxy) else xy[feasible]
    inside = inside[np.all(np.isfinite(inside), axis=1)]
    if single or len(inside) < 2:
        return
    low, high = inside.min(axis=0), inside.max(axis=0)
    pad = np.maximum(0.3 * (high - low), 0.05 * np.maximum(np.abs(high), 1e-12))
    low, high = low - pad, high + pad
    ax.set_xlim(low[0], high[0])
    ax.set_ylim(low[1], high[1])
    finite = xy[np.all(np.isfinite(xy), axis=1)]
    outside = int((np.any(finite < low, axis=1) | np.any(finite > high, axis=1)).sum())
    if outside:
        ax.text(
            0.01,
            0.01,
            f"{outside} infeasible designs lie outside this view",
            transform=ax.transAxes,
            fontsize=7,
            color="0.4",
            va="bottom",
        )


# ---- frequency response ----------------------------------------------------------------


def _crossing(freqs: np.ndarray, db: np.ndarray, level: float, index: np.ndarray) -> float | None:
    """Frequency (Hz) where db crosses ``level`` between index[0] (inside) and index[1]
    (outside), linear in log f."""
    i_in, i_out = int(index[0]), int(index[1])
    d_in, d_out = db[i_in] - level, db[i_out] - level
    if d_in == d_out:
        return None
    x = math.log10(freqs[i_in]) + (math.log10(freqs[i_out]) - math.log10(freqs[i_in])) * d_in / (d_in - d_out)
    return 10.0**x


def response_data(candidate: dict, *, points: int = RESPONSE_POINTS) -> dict:
    """The response behind :func:`response_plot`: freqs (Hz), gain_db of |H| source->load,
    reference_db (mid-band gain), the -3 dB corners f_low / f_high found on this curve (Hz,
    None beyond the sweep) and the band (Hz)."""
    topology, parts, device, conditions = design_from_record(candidate)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        gain = float(topology.evaluate(parts, device, conditions, full=False).metrics["gain"][0])
        low = max(min(conditions.band[0], 1.0) / 10.0, 0.01)
        high = max(conditions.band[1], 1e6) * 100.0
        freqs = np.logspace(math.log10(low), math.log10(high), points)
        response = topology.frequency_response(parts, device, conditions, freqs)[0]
    db = 20.0 * np.log10(np.maximum(np.abs(response), 1e-300))
    reference = 20.0 * math.log10(abs(gain))
    level = reference - 10.0 * math.log10(2.0)
    peak = int(np.argmax(db))
    below = np.flatnonzero(db < level)
    left, right = below[below < peak], below[below > peak]
    f_low = _crossing(freqs, db, level, np.array([left[-1] + 1, left[-1]])) if left.size else None
    f_high = _crossing(freqs, db, level, np.array([right[0] - 1, right[0]])) if right.size else None
    return {
        "freqs": freqs,
        "gain_db": db,
        "reference_db": reference,
        "level_db": level,
        "f_low": f_low,
        "f_high": f_high,
        "band": conditions.band,
        "topology": topology.name,
        "gain": gain,
    }


def response_plot(candidate: dict, *, fmt: str = "svg", path: str | Path | None = None) -> bytes:
    """|gain| (dB, source to load) against frequency (Hz, log axis), the spec band shaded and
    the -3 dB points marked."""
    fmt = _check_format(fmt)
    data = response_data(candidate)
    if not (np.isfinite(data["gain_db"]).all() and math.isfinite(data["reference_db"])):
        raise InputError.single(
            "response",
            "not a finite number at some frequency",
            "a design whose small-signal response the model can compute (this one's bias or gain does not solve)",
            title="no response to plot",
        )
    fig = Figure(figsize=FIGSIZE)
    ax = fig.add_subplot()
    ax.axvspan(
        *data["band"],
        color=COLOURS["band"],
        alpha=0.12,
        label=f"band {format_value(data['band'][0], 'Hz')} – {format_value(data['band'][1], 'Hz')}",
    )
    ax.semilogx(data["freqs"], data["gain_db"], color=COLOURS["model"], lw=1.8, label="|gain| source to load")
    ax.axhline(data["level_db"], color=COLOURS["ideal"], ls="--", lw=0.9, label=f"-3 dB ({data['level_db']:.1f} dB)")
    for key, align in (("f_low", "left"), ("f_high", "right")):
        f = data[key]
        if f is None:
            continue
        marker = ax.plot([f], [data["level_db"]], MARKERS["limit"], color=COLOURS["limit"], ms=7, zorder=4)[0]
        marker.set_gid(f"{key}_marker")
        ax.axvline(f, color=COLOURS["limit"], lw=0.7, ls=":")
        ax.annotate(
            f"{key} {format_value(f, 'Hz')}",
            (f, data["level_db"]),
            textcoords="offset points",
            xytext=(6 if align == "left" else -6, -16),
            ha=align,
            fontsize=9,
            color=COLOURS["limit"],
        )
    top = max(float(np.max(data["gain_db"])), data["reference_db"])
    ax.set_ylim(top - 40.0, top + 6.0)
    ax.set_xlim(data["freqs"][0], data["freqs"][-1])
    ax.set_xlabel("frequency (Hz)")
    ax.set_ylabel("|gain| (dB)")
    ax.set_title(
        f"Frequency response: {data['topology']}, mid-band {data['gain']:.3g} V/V ({data['reference_db']:.1f} dB)"
    )
    ax.grid(True, which="both", alpha=0.25)
    ax.legend(loc="lower center", fontsize=8)
    return _render(fig, fmt, path)


# ---- transfer curve --------------------------------------------------------------------


def transfer_data(candidate: dict, *, spec_swing: float | None = None, points: int = TRANSFER_POINTS) -> dict:
    """The DC transfer behind :func:`transfer_plot`: source voltage sweep (V) and load voltage
    (V, change from quiescent) by the static nonlinear solve, the small-signal straight line,
    the model's clip level (+/- clip_vpp/2), its usable swing (swing_vpp, the 10 % rule) and
    where the curve flattens on each side."""
    topology, parts, device, conditions = design_from_record(candidate)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        metrics = topology.evaluate(parts, device, conditions, full=False).metrics
    gain, swing, clip = (float(metrics[k][0]) for k in ("gain", "swing_vpp", "clip_vpp"))
    reach = max(swing, clip, spec_swing or 0.0, 1e-3) / 2.0
    peak = TRANSFER_OVERDRIVE * reach / max(abs(gain), 1e-9)
    vs = np.linspace(-peak, peak, points)
    out = topology.static_transfer(parts, device, conditions, vs)[0]
    slope = np.gradient(out, vs)
    centre = points // 2
    flat = np.abs(slope) < FLAT_SLOPE * abs(slope[centre])
    left = np.flatnonzero(flat[:centre])
    right = np.flatnonzero(flat[centre:]) + centre
    clips = [
        (float(vs[i]), float(out[i]))
        for i in ((left[-1] if left.size else None), (right[0] if right.size else None))
        if i is not None
    ]
    return {
        "source_v": vs,
        "output_v": out,
        "linear_v": gain * vs,
        "gain": gain,
        "swing_vpp": swing,
        "clip_vpp": clip,
        "spec_swing": spec_swing,
        "clips": clips,
        "topology": topology.name,
    }


def transfer_plot(
    candidate: dict, *, fmt: str = "svg", path: str | Path | None = None, spec_swing: float | None = None
) -> bytes:
    """Load voltage against source voltage (quasi-static sweep) showing where the stage clips:
    the model's clip level (clip_vpp) and, if given, the spec's required swing (Vpp)."""
    fmt = _check_format(fmt)
    if spec_swing is not None and not (isinstance(spec_swing, (int, float)) and spec_swing > 0):
        raise InputError.single("spec_swing", spec_swing, "a positive swing in V peak-to-peak, or None")
    data = transfer_data(candidate, spec_swing=spec_swing)
    vs, out = data["source_v"], data["output_v"]
    scale, unit = (1e3, "mV") if np.max(np.abs(vs)) < 1.0 else (1.0, "V")
    x = vs * scale
    fig = Figure(figsize=FIGSIZE)
    ax = fig.add_subplot()
    half = data["clip_vpp"] / 2.0
    lim = 1.15 * max(np.max(np.abs(out)), half, (spec_swing or 0.0) / 2.0)
    ax.plot(
        x,
        np.clip(data["linear_v"], -lim, lim),
        color=COLOURS["ideal"],
        ls=":",
        lw=1.0,
        label=f"small-signal gain {data['gain']:.3g} V/V",
    )
    ax.plot(x, out, color=COLOURS["model"], lw=1.8, label="static transfer (model)")
    ax.axhspan(-half, half, color=COLOURS["model"], alpha=0.06)
    for sign in (1, -1):
        ax.axhline(
            sign * half,
            color=COLOURS["limit"],
            ls="--",
            lw=0.9,
            label=f"clip level {data['clip_vpp']:.2f} Vpp (usable swing {data['swing_vpp']:.2f} Vpp)"
            if sign > 0
            else None,
        )
        if spec_swing:
            ax.axhline(
                sign * spec_swing / 2.0,
                color=COLOURS["spec"],
                ls="-.",
                lw=1.0,
                label=f"spec swing {spec_swing:.2f} Vpp" if sign > 0 else None,
            )
    for i, (v, o) in enumerate(data["clips"]):
        ax.plot(
            [v * scale],
            [o],
            MARKERS["limit"],
            color=COLOURS["limit"],
            ms=6,
            zorder=4,
            label=f"clips (slope < {FLAT_SLOPE:.0%})" if i == 0 else None,
        )[0].set_gid(f"clip_{i}")
    ax.set_ylim(-lim, lim)
    ax.set_xlim(x[0], x[-1])
    ax.set_xlabel(f"source voltage ({unit}, change from rest)")
    ax.set_ylabel("load voltage (V, change from rest)")
    ax.set_title(f"Transfer curve: {data['topology']}")
    ax.grid(True, alpha=0.3)
    ax.legend(loc="upper right" if data["gain"] < 0 else "upper left", fontsize=8)
    return _render(fig, fmt, path)
