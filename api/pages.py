"""The design desk in the browser: server-rendered HTML pages on the same Flask app.

Two kinds of route:

* **page shells** (``/``, ``/searches``, ``/searches/<id>``, ``/searches/<id>/designs/<rank>``,
  ``/compare``) and the static assets: no data in them, so they answer without the API
  token. Each holds a placeholder that ``static/pages.js`` fills from a fragment route;
* **fragments** (``/ui/...``): the server-rendered HTML of the data, behind the same
  bearer-token check as ``/v1`` (the script sends the token kept in ``sessionStorage``;
  it never appears in a URL). Errors are the same problem+json as the REST routes.

Every figure comes from the functions the REST routes call (``api.routes`` helpers,
``optimizer.scoring.limit_table``, ``optimizer.bom``, ``optimizer.netlist``); this module
only lays them out, with units. Plots and downloads are the REST routes themselves.
"""

from __future__ import annotations

import math
from functools import lru_cache
from typing import Any

import yaml
from flask import Blueprint, Response, jsonify, render_template, request, url_for

from api import routes
from api.problems import ApiProblem
from optimizer.bundled import example_names, example_path
from optimizer.errors import Problem

blueprint = Blueprint("pages", __name__, template_folder="templates", static_folder="static", static_url_path="/assets")

#: endpoints answered without the API token (they carry no data)
PUBLIC_ENDPOINTS = frozenset(
    {
        "pages.spec_page",
        "pages.searches_page",
        "pages.search_page",
        "pages.design_page",
        "pages.compare_page",
        "pages.static",
        "pages.palette_css",
    }
)
TABLE_ROWS = 50  # ranked designs in the search page's table
FRONT_POINTS = 250  # designs drawn on the search page's front (the front's own points always are)
LIST_ROWS = 30  # searches on the searches page
COMPARE_MAX = 3
SERIES = ("E3", "E6", "E12", "E24", "E48", "E96", "E192")

#: form fields of the spec page: (name as a spec path, label, unit hint, example)
SPEC_FIELDS: tuple[tuple[str, str, str, str], ...] = (
    ("name", "Name", "", "line_preamp"),
    ("supply", "Supply", "V", "15 V"),
    ("gain.target", "Gain target", "V/V, signed (−30) or dB", "-30"),
    ("gain.tolerance", "Gain tolerance", "dB, or %", "2 dB"),
    ("source_impedance", "Source impedance", "Ω", "2k2"),
    ("load_impedance", "Load impedance", "Ω", "22k"),
    ("band[0]", "Band, low edge", "Hz", "20 Hz"),
    ("band[1]", "Band, high edge", "Hz", "20 kHz"),
    ("limits.swing_min", "Output swing, at least", "V p-p", "4 V"),
    ("limits.supply_current_max", "Supply current, at most", "A", "2 mA"),
    ("limits.input_impedance_min", "Input impedance, at least", "Ω", "100k"),
    ("limits.output_impedance_max", "Output impedance, at most", "Ω", "1k"),
    ("limits.thd_max", "THD, at most", "% or fraction", "1 %"),
    ("limits.noise_ein_max", "Input noise, at most", "V rms", "2 uV"),
    ("objectives", "Objectives", "metric names, comma-separated", "supply_current, swing_vpp"),
    ("search.trials", "Trials", "count", "2000"),
    ("search.seed", "Seed", "whole number", "0"),
)

#: SI unit of each operating-point and rating quantity, by name
_OP_UNITS = {"ic": "A", "ib": "A", "i_divider": "A", "supply_current": "A", "q_power": "W", "active": ""}
KEY_FIGURES = (
    ("gain", "Gain"),
    ("swing_vpp", "Output swing"),
    ("input_impedance", "Input impedance"),
    ("supply_current", "Supply current"),
)
TABLE_METRICS = (
    "gain",
    "swing_vpp",
    "input_impedance",
    "output_impedance",
    "supply_current",
    "noise_ein_v",
    "thd",
    "part_count",
    "cost",
    "yield",
)


# --- presentation helpers (units; no physics) ----------------------------------------------


def _axis(metric: str) -> tuple[str, float, str]:
    from optimizer.plots import METRIC_AXES

    return METRIC_AXES.get(metric, (metric.replace("_", " "), 1.0, ""))


def metric_label(metric: str) -> str:
    """A metric's name with its display unit, e.g. "supply current (mA)"."""
    name, _, unit = _axis(metric)
    return f"{name} ({unit})" if unit else name


def metric_text(metric: str, value: Any) -> str:
    """A metric in its display unit (the plots' units), 4 significant figures, e.g. "0.7166 mA"."""
    if not isinstance(value, (int, float)) or isinstance(value, bool) or not math.isfinite(value):
        return "—"
    _, scale, unit = _axis(metric)
    shown = value * scale
    size = abs(shown)
    # 4 significant figures, without an exponent between 0.001 and 10^9
    number = f"{shown:.{max(0, 3 - math.floor(math.log10(size)))}f}" if 1e-3 <= size < 1e9 else f"{shown:.4g}"
    number = number.replace("-", "−")
    return f"{number} {unit}".strip()


def quantity_text(name: str, value: Any) -> str:
    """An operating-point or rating quantity in engineering notation with its SI unit."""
    from optimizer.units import format_value

    if not isinstance(value, (int, float)) or isinstance(value, bool) or not math.isfinite(value):
        return "—"
    if name in _OP_UNITS:
        unit = _OP_UNITS[name]
    elif name.startswith("p_"):
        unit = "W"
    elif name.startswith("v"):
        unit = "V"
    else:
        unit = ""
    return format_value(value, unit, digits=4) if unit else f"{value:.4g}"


def basis_label(record: dict) -> str:
    """On what basis the design meets the spec (the record's ``basis`` when it has one)."""
    basis = record.get("basis") or {}
    if basis.get("label"):
        return str(basis["label"])
    if not record.get("feasible"):
        return f"misses {record.get('binding') or 'a limit'}"
    if "yield" in (record.get("metrics") or {}) and record.get("worst_case"):
        return f"nominal values; {record['metrics']['yield']:.0%} of builds"
    return "nominal values"


for _filter in (metric_label, metric_text, quantity_text, basis_label):
    blueprint.add_app_template_filter(_filter)


# --- page shells (public: no data) ---------------------------------------------------------


@blueprint.get("/")
def spec_page() -> str:
    from optimizer.catalog import list_catalogs
    from optimizer.spec import METRIC_DIRECTIONS

    return render_template(
        "spec.html",
        fields=SPEC_FIELDS,
        examples=example_names(),
        catalogs=list_catalogs(),
        series=SERIES,
        metrics=tuple(METRIC_DIRECTIONS),
        title="New search",
    )


@blueprint.get("/searches")
def searches_page() -> str:
    return render_template("shell.html", title="Searches", source=url_for("pages.searches_fragment"))


@blueprint.get("/searches/<search_id>")
def search_page(search_id: str) -> str:
    return render_template(
        "search.html",
        title=f"Search {search_id}",
        search_id=search_id,
        status_url=url_for("v1.get_search", search_id=search_id),
        source=url_for("pages.results_fragment", search_id=search_id),
    )


@blueprint.get("/searches/<search_id>/designs/<int:rank>")
def design_page(search_id: str, rank: int) -> str:
    return render_template(
        "shell.html",
        title=f"Design {rank} of {search_id}",
        source=url_for("pages.design_fragment", search_id=search_id, rank=rank),
    )


@blueprint.get("/compare")
def compare_page() -> str:
    chosen: dict[str, Any] = request.args.to_dict()  # the designs to compare, passed on to the fragment
    return render_template("shell.html", title="Compare designs", source=url_for("pages.compare_fragment", **chosen))


@blueprint.get("/palette.css")
def palette_css() -> Response:
    response = Response(_palette_css(), mimetype="text/css")
    response.headers["Cache-Control"] = "public, max-age=3600"
    return response


@lru_cache(maxsize=1)
def _palette_css() -> str:
    from optimizer.palette import css_variables

    return css_variables()


# --- fragments (behind the token) ------------------------------------------------------------


def _html(text: str) -> Response:
    return Response(text, mimetype="text/html")


@blueprint.get("/ui/examples/<name>")
def example(name: str) -> Response:
    """An example spec from specs/: its YAML text and the mapping as written."""
    path = example_path(name)  # a name from the list, never a path
    if path is None:
        raise routes._not_found("example", name, "one of " + ", ".join(example_names()))
    text = path.read_text(encoding="utf-8")
    return jsonify({"name": name, "yaml": text, "spec": yaml.safe_load(text)})


@blueprint.get("/ui/searches")
def searches_fragment() -> Response:
    from optimizer.search import list_searches

    everything = list_searches(routes.service().storage)
    rows = []
    for item in everything[:LIST_ROWS]:
        status = routes._status(item["id"])
        rows.append({**item, **status})
    return _html(render_template("searches.html", rows=rows, total=len(everything), shown=LIST_ROWS))


@blueprint.get("/ui/searches/<search_id>/results")
def results_fragment(search_id: str) -> Response:
    status = routes._status(search_id)
    result = routes._result(search_id, status)
    objectives = result.spec.objective_directions
    metrics = list(dict.fromkeys([m for m, _ in objectives] + list(TABLE_METRICS)))
    return _html(
        render_template(
            "results.html",
            search_id=search_id,
            status=status,
            spec=result.spec,
            rows=result.candidates[:TABLE_ROWS],
            total=len(result.candidates),
            metrics=metrics,
            front=front_svg(search_id, result),
            objectives=objectives,
        )
    )


def front_svg(search_id: str, result: Any) -> dict:
    """The front's drawing: points in pixel coordinates, axes and ticks (for results.html)."""
    width, height, left, right, top, bottom = 640, 380, 70, 20, 20, 50
    objectives = result.spec.objective_directions
    rank_of = {c.get("trial"): c["rank"] for c in result.candidates if c.get("trial") is not None}
    on_front = {p.get("trial") for p in result.front}
    # the front's points that a ranked design stands for (near-identical variants folded into it) are
    # drawn from the front itself, unranked
    shown = (
        result.candidates[:FRONT_POINTS]
        + [c for c in result.candidates[FRONT_POINTS:] if c.get("trial") in on_front]
        + [p for p in result.front if p.get("trial") not in rank_of]
    )
    x_metric = objectives[0][0]
    y_metric = objectives[1][0] if len(objectives) > 1 else None

    def coords(c: dict) -> tuple[float, float] | None:
        m = c.get("metrics") or {}
        x = m.get(x_metric)
        y = m.get(y_metric) if y_metric else c.get("rank")
        if not (isinstance(x, (int, float)) and isinstance(y, (int, float)) and math.isfinite(x) and math.isfinite(y)):
            return None
        return x * _axis(x_metric)[1], y * (_axis(y_metric)[1] if y_metric else 1.0)

    located = [(c, coords(c)) for c in shown]
    placed = [(c, xy) for c, xy in located if xy is not None and abs(xy[0]) < 1e11 and abs(xy[1]) < 1e11]
    framing = [xy for c, xy in placed if c.get("feasible")] or [xy for _, xy in placed]
    if not framing:
        return {"points": [], "width": width, "height": height}
    xs, ys = [p[0] for p in framing], [p[1] for p in framing]
    x0, x1, y0, y1 = _padded(min(xs), max(xs)) + _padded(min(ys), max(ys))
    sx = lambda v: left + (v - x0) / (x1 - x0) * (width - left - right)  # noqa: E731
    sy = lambda v: height - bottom - (v - y0) / (y1 - y0) * (height - top - bottom)  # noqa: E731
    points, outside = [], 0
    for c, (x, y) in placed:
        if not (x0 <= x <= x1 and y0 <= y <= y1):
            outside += 1
            continue
        rank = rank_of.get(c.get("trial"), c.get("rank"))
        tip = [f"rank {rank}" if rank is not None else f"trial {c.get('trial')} (a variant of a ranked design)"]
        tip += ["meets the spec" if c.get("feasible") else "misses the spec"]
        tip += [f"{_axis(m)[0]} {metric_text(m, c['metrics'].get(m))}" for m in (x_metric, y_metric) if m]
        points.append(
            {
                "x": round(sx(x), 1),
                "y": round(sy(y), 1),
                "rank": rank,
                "feasible": bool(c.get("feasible")),
                "front": c.get("trial") in on_front,
                "tip": " · ".join(tip),
                "url": url_for("pages.design_page", search_id=search_id, rank=rank)
                if rank is not None
                else url_for("pages.search_page", search_id=search_id) + "#front",
            }
        )
    points.sort(key=lambda p: (p["feasible"], p["front"], -(p["rank"] or 0)))  # best drawn last, on top
    line = sorted((p for p in points if p["front"]), key=lambda p: p["x"])
    return {
        "points": points,
        "front_line": " ".join(f"{p['x']},{p['y']}" for p in line),
        "outside": outside,
        "width": width,
        "height": height,
        "left": left,
        "right": right,
        "top": top,
        "bottom": bottom,
        "x_label": metric_label(x_metric),
        "y_label": metric_label(y_metric) if y_metric else "rank",
        "x_ticks": [(round(sx(v), 1), f"{v:.4g}") for v in _ticks(x0, x1)],
        "y_ticks": [(round(sy(v), 1), f"{v:.4g}") for v in _ticks(y0, y1)],
    }


def _padded(low: float, high: float) -> tuple[float, float]:
    span = high - low or abs(high) or 1.0
    return low - 0.06 * span, high + 0.06 * span


def _ticks(low: float, high: float, count: int = 5) -> list[float]:
    step = (high - low) / count
    magnitude = 10 ** math.floor(math.log10(step))
    step = min((m * magnitude for m in (1, 2, 2.5, 5, 10) if m * magnitude >= step), default=step)
    first = math.ceil(low / step) * step
    return [first + k * step for k in range(int((high - first) / step) + 1)]


@blueprint.get("/ui/searches/<search_id>/designs/<int:rank>")
def design_fragment(search_id: str, rank: int) -> Response:
    from optimizer.netlist import spice_netlist
    from optimizer.scoring import limit_table
    from optimizer.topologies import get_topology

    record, result = routes._candidate(search_id, rank)
    parts = {role: part["value"] for role, part in record["parts"].items()}
    netlist = spice_netlist(
        record["topology"],
        parts,
        record["transistor"]["model"],
        result.spec,
        device_id=record["transistor"]["id"],
        title=f"stagefit search {search_id} rank {rank}: {record['topology']}",
    )
    base = f"/v1/searches/{search_id}/candidates/{rank}"
    return _html(
        render_template(
            "design.html",
            search_id=search_id,
            rank=rank,
            record=record,
            spec=result.spec,
            key_figures=KEY_FIGURES,
            limits=limit_table(result.spec, record["metrics"]),
            topology=get_topology(record["topology"]),
            netlist=netlist,
            base=base,
            count=len(result.candidates),
        )
    )


@blueprint.get("/ui/compare")
def compare_fragment() -> Response:
    search_id = request.args.get("search", "")
    raw = request.args.get("ranks", "")
    given = [r.strip() for r in raw.split(",") if r.strip()]
    ranks = [int(r) for r in given] if all(routes._WHOLE.fullmatch(r) for r in given) else []  # ASCII digits only
    if not 2 <= len(ranks) <= COMPARE_MAX or len(set(ranks)) != len(ranks):
        raise ApiProblem(
            400,
            "invalid query parameter",
            f"query.ranks: got {raw!r}; two or three different ranks separated by commas, e.g. 1,2",
            kind="invalid-query",
            errors=[Problem("query.ranks", raw, "two or three different ranks, e.g. 1,2")],
        )
    records = [routes._candidate(search_id, rank)[0] for rank in ranks]
    roles = list(dict.fromkeys(role for r in records for role in r["parts"]))
    metrics = list(dict.fromkeys(m for r in records for m in r["metrics"]))
    rows = [
        ("topology", "Topology", [r["topology"] for r in records]),
        ("device", "Transistor", [r["transistor"]["id"] for r in records]),
        ("basis", "Meets the spec", [basis_label(r) for r in records]),
    ]
    rows += [
        (f"part-{role}", role, [r["parts"][role]["label"] if role in r["parts"] else "absent" for r in records])
        for role in roles
    ]
    rows += [(f"metric-{m}", metric_label(m), [metric_text(m, r["metrics"].get(m)) for r in records]) for m in metrics]
    return _html(render_template("compare.html", search_id=search_id, ranks=ranks, rows=rows))
