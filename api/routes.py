"""The /v1 routes: one blueprint, each route a thin call into ``optimizer``.

Request bodies are JSON (a spec may also be posted as YAML); responses are JSON, CSV,
SVG or plain text by the ``Accept`` header where a route offers more than one. Every
input is validated in full before anything is stored, so a rejected request never
leaves a half-made search behind.
"""

from __future__ import annotations

import re
import threading
from collections import OrderedDict
from dataclasses import dataclass
from typing import Any, Callable

from flask import Blueprint, Response, current_app, jsonify, request, url_for

from api.jobs import JobPool, QueueFull
from api.problems import ApiProblem
from optimizer.errors import MISSING, InputError, Problem
from optimizer.spec import MAX_SAMPLES, MAX_TOP

blueprint = Blueprint("v1", __name__)

JSON = "application/json"
CSV = "text/csv"
SVG = "image/svg+xml"
TEXT = "text/plain"
YAML_TYPES = ("application/yaml", "application/x-yaml", "text/yaml", "text/x-yaml")
TERMINAL = ("done", "failed", "cancelled")
MAX_PAGE = 200


@dataclass
class Service:
    """What the routes share: settings, the Optuna storage and the job pool."""

    settings: Any
    storage: Any
    jobs: JobPool


def service() -> Service:
    return current_app.extensions["stagefit"]


# --- request helpers ------------------------------------------------------------------


def negotiate(offered: tuple[str, ...]) -> str:
    """The offered media type the Accept header prefers (406 if it allows none)."""
    if not request.headers.get("Accept", "").strip():
        return offered[0]
    best = request.accept_mimetypes.best_match(offered)
    if best is None:
        raise ApiProblem(
            406,
            "Not Acceptable",
            f"this route produces {', '.join(offered)}; send an Accept header that allows "
            f"one of them (got {request.headers.get('Accept')!r})",
            kind="not-acceptable",
        )
    return best


def read_body(*, yaml_ok: bool = False) -> dict:
    """The request body as a mapping: 415 for another content type, 400 if unreadable or
    beyond the document bounds (optimizer.documents: the loader the CLI uses too)."""
    from optimizer.documents import parse_json, parse_yaml

    mimetype = request.mimetype
    accepted = (JSON,) + (YAML_TYPES if yaml_ok else ())
    if mimetype not in accepted and not (mimetype.startswith("application/") and mimetype.endswith("+json")):
        raise ApiProblem(
            415,
            "Unsupported Media Type",
            f"send the body as {' or '.join(accepted[:2])} "
            f"(Content-Type was {request.headers.get('Content-Type') or 'not set'!r})",
            kind="unsupported-media-type",
        )
    raw = request.get_data(cache=True)  # 413 past MAX_CONTENT_LENGTH
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ApiProblem(
            400, "Bad Request", f"the body is not UTF-8 text (byte {exc.start})", kind="malformed-body"
        ) from None
    try:
        data = parse_yaml(text, "<body>") if mimetype in YAML_TYPES else parse_json(text, "<body>")
    except InputError as error:
        raise ApiProblem.from_input(error, 400, kind="malformed-body") from None
    if not isinstance(data, dict):
        raise ApiProblem(
            422,
            "invalid request body",
            "the body must be a JSON object",
            kind="invalid-input",
            errors=[Problem("<body>", type(data).__name__, "an object")],
        )
    return data


_WHOLE = re.compile(r"-?[0-9]{1,12}")  # ASCII digits only: str.isdigit() also takes '²' and '٣'
_DECIMAL = re.compile(r"[0-9]{1,12}(\.[0-9]{0,9})?|\.[0-9]{1,9}")


def _query_value(
    name: str,
    default: Any,
    pattern: re.Pattern[str],
    convert: Callable[[str], Any],
    low: float,
    high: float,
    expected: str,
) -> Any:
    """Query parameter ``name`` written as ``pattern``, converted and in [low, high] (400 naming it and
    ``expected`` otherwise); ``default`` when absent."""
    raw = request.args.get(name)
    if raw is None:
        return default
    text = raw.strip()
    if not pattern.fullmatch(text) or not low <= convert(text) <= high:
        raise _query_problem(name, raw, expected)
    return convert(text)


def query_int(name: str, default: int, low: int, high: int) -> int:
    """An integer query parameter in [low, high] (400 naming it otherwise)."""
    return _query_value(name, default, _WHOLE, int, low, high, f"a whole number from {low} to {high}")


def query_number(name: str, default: float, low: float, high: float) -> float:
    """A decimal query parameter (seconds) in [low, high] (400 naming it otherwise)."""
    return _query_value(name, default, _DECIMAL, float, low, high, f"a number of seconds from {low:g} to {high:g}")


def query_bool(name: str) -> bool | None:
    raw = request.args.get(name)
    if raw is None:
        return None
    text = raw.strip().lower()
    if text in ("true", "1", "yes"):
        return True
    if text in ("false", "0", "no"):
        return False
    raise _query_problem(name, raw, "true or false")


def _query_problem(name: str, value: Any, expected: str) -> ApiProblem:
    return ApiProblem(
        400,
        "invalid query parameter",
        f"query.{name}: got {value!r}; {expected}",
        kind="invalid-query",
        errors=[Problem(f"query.{name}", value, expected)],
    )


def _input(error: InputError, prefix: str = "", status: int = 422) -> ApiProblem:
    return ApiProblem.from_input(error, status, prefix=prefix)


def _not_found(what: str, value: Any, detail: str) -> ApiProblem:
    return ApiProblem(
        404,
        f"unknown {what}",
        detail,
        kind=f"unknown-{what.replace(' ', '-')}",
        errors=[Problem(what.replace(" ", "_"), value, detail)],
    )


# --- catalogs, topologies, spec schema -----------------------------------------------


@blueprint.get("/topologies")
def topologies() -> Response:
    from optimizer.topologies import TOPOLOGIES

    negotiate((JSON,))
    return jsonify({"topologies": [t.describe() for t in TOPOLOGIES.values()]})


def _catalog(name: str) -> Any:
    from optimizer.catalog import list_catalogs, load_catalog

    if name not in list_catalogs():  # a name from the list, never a path
        raise _not_found("catalog", name, f"no catalog named {name!r}; one of " + ", ".join(list_catalogs()))
    return load_catalog(name)


@blueprint.get("/catalogs")
def catalogs() -> Response:
    from optimizer.catalog import list_catalogs

    negotiate((JSON,))
    items = []
    for name in list_catalogs():
        summary = _catalog(name).summary()
        items.append(
            {
                "name": name,
                "description": summary["description"],
                "currency": summary["currency"],
                "stock_tracked": summary["stock_tracked"],
                "url": url_for("v1.catalog", name=name),
            }
        )
    return jsonify({"catalogs": items})


@blueprint.get("/catalogs/<name>")
def catalog(name: str) -> Response:
    negotiate((JSON,))
    found = _catalog(name)
    summary = found.summary()
    summary["transistors"]["models"] = [
        {k: v for k, v in row.items()} for row in found.transistors.frame().to_dict(orient="records")
    ]
    return jsonify(summary)


@blueprint.get("/spec-schema")
def spec_schema() -> Response:
    from optimizer.spec import spec_json_schema

    negotiate((JSON, "application/schema+json"))
    return jsonify(spec_json_schema())


@blueprint.get("/openapi.json")
def openapi() -> Response:
    from api.openapi import openapi_document

    negotiate((JSON,))
    return jsonify(openapi_document())


# --- evaluate ---------------------------------------------------------------------------

EVALUATE_KEYS = ("spec", "topology", "parts", "device", "samples")


def _spec_from(data: Any, prefix: str = "") -> tuple[Any, Any]:
    """Parse a spec mapping and check it against its catalog: (spec, catalog)."""
    from optimizer.catalog import list_catalogs, load_catalog
    from optimizer.spec import parse_spec
    from optimizer.validation import validate_spec

    try:
        spec = parse_spec(data)
    except InputError as error:
        raise _input(error, prefix) from None
    if spec.parts.catalog not in list_catalogs():
        raise ApiProblem(
            422,
            "unknown parts catalog",
            f"{prefix + '.' if prefix else ''}parts.catalog: got {spec.parts.catalog!r}; one of "
            + ", ".join(list_catalogs()),
            kind="unknown-catalog",
            errors=[
                Problem(
                    f"{prefix + '.' if prefix else ''}parts.catalog",
                    spec.parts.catalog,
                    "one of " + ", ".join(list_catalogs()),
                )
            ],
        )
    found = load_catalog(spec.parts.catalog)
    try:
        validate_spec(spec, found)
    except InputError as error:
        raise _input(error, prefix) from None
    return spec, found


@blueprint.post("/evaluate")
def evaluate() -> Response:
    from optimizer.candidates import assess, missing_resistors
    from optimizer.topologies import get_topology
    from optimizer.units import parse_quantity

    negotiate((JSON,))
    body = read_body()
    problems = [
        Problem(key, body[key], "one of the keys " + ", ".join(EVALUATE_KEYS))
        for key in body
        if key not in EVALUATE_KEYS
    ]
    problems += [
        Problem(key, MISSING, "a value is required here") for key in ("spec", "topology", "parts") if key not in body
    ]
    if problems:
        raise ApiProblem(422, "invalid evaluate request", _summary(problems), kind="invalid-input", errors=problems)
    spec = found = topology = None
    try:  # every problem of the request is reported at once: the spec's, the topology's, the parts'
        spec, found = _spec_from(body["spec"], "spec")
    except ApiProblem as problem:
        problems += problem.errors
    try:
        topology = get_topology(body["topology"])
    except InputError as error:
        problems += error.problems
    raw_parts = body["parts"]
    if not isinstance(raw_parts, dict) or not raw_parts:
        problems.append(Problem("parts", raw_parts, 'a mapping role -> value, e.g. {"r_top": "68k", "c_in": "2.2u"}'))
        raw_parts = {}
    if topology is None:
        raise ApiProblem(422, "invalid evaluate request", _summary(problems), kind="invalid-input", errors=problems)
    known = set(topology.resistors) | set(topology.capacitors)
    parts: dict[str, float] = {}
    for role, value in raw_parts.items():
        if role not in known:
            problems.append(
                Problem(
                    f"parts.{role}",
                    value,
                    f"a part of {topology.name}: " + ", ".join(topology.resistors + topology.capacitors),
                )
            )
            continue
        try:
            parts[role] = parse_quantity(value, "F" if role.startswith("c_") else "ohm", where=f"parts.{role}")
        except InputError as error:
            problems += error.problems
    if raw_parts:
        split = spec is not None and spec.supply_arrangement == "split"
        problems += [
            Problem(
                f"parts.{role}", MISSING, f"every resistor of {topology.name} given: " + ", ".join(topology.resistors)
            )
            for role in missing_resistors(topology, raw_parts, split)
        ]
    device = body.get("device")
    if (
        device is not None
        and found is not None
        and (not isinstance(device, str) or device not in set(found.transistors["id"]))
    ):
        problems.append(
            Problem("device", device, f"a transistor of catalog {found.name}: " + ", ".join(found.transistors["id"]))
        )
    samples = body.get("samples", 1000)
    if isinstance(samples, bool) or not isinstance(samples, int) or not 1 <= samples <= MAX_SAMPLES:
        problems.append(Problem("samples", samples, f"a whole number of Monte Carlo builds, 1 to {MAX_SAMPLES}"))
    if problems or spec is None or found is None:  # the spec's own problems are among them
        raise ApiProblem(422, "invalid evaluate request", _summary(problems), kind="invalid-input", errors=problems)
    try:
        record = assess(spec, found, topology.name, parts, device, samples=samples)
    except InputError as error:  # a design the models cannot solve: still the user's input
        raise _input(error) from None
    return jsonify(record)


def _summary(problems: list[Problem]) -> str:
    return str(problems[0]) if len(problems) == 1 else f"{len(problems)} problems; see errors"


# --- searches ---------------------------------------------------------------------------


def _search_url(search_id: str) -> str:
    return url_for("v1.get_search", search_id=search_id)


def _status(search_id: str) -> dict:
    from optimizer.search import search_status

    _require(search_id)
    status = dict(search_status(service().storage, search_id))
    status["url"] = _search_url(search_id)
    return status


def _require(search_id: str) -> int:
    """The study id of ``search_id`` (404 if there is no such search)."""
    try:
        return service().storage.get_study_id_from_name(search_id)
    except KeyError:
        raise _not_found("search", search_id, f"no search with id {search_id!r}; GET /v1/searches lists them") from None


def _stored_status(search_id: str) -> str | None:
    """The status attribute alone (a cheap read, for polling)."""
    storage = service().storage
    return storage.get_study_user_attrs(_require(search_id)).get("status")


@blueprint.post("/searches")
def create() -> Response | tuple[Response, int]:
    from optimizer.search import create_search

    negotiate((JSON,))
    wait = query_number("wait", 0.0, 0.0, 3600.0)
    top = query_int("top", 20, 1, MAX_TOP)
    body = read_body(yaml_ok=True)
    spec, found = _spec_from(body)
    limit = service().settings.max_trials
    if spec.search.trials > limit:
        raise ApiProblem(
            422,
            "trial budget too large",
            f"search.trials: got {spec.search.trials}; at most {limit} on this service "
            "(STAGEFIT_MAX_TRIALS): ask for fewer trials",
            kind="budget-too-large",
            errors=[Problem("search.trials", spec.search.trials, f"at most {limit}")],
        )
    pool = service().jobs
    try:
        pool.admit()
    except QueueFull as full:
        raise ApiProblem(
            429,
            "Too Many Requests",
            f"{full.limit} searches are queued or running on this service (STAGEFIT_MAX_QUEUE); "
            f"try again in {full.retry_after} s",
            kind="queue-full",
            headers={"Retry-After": str(full.retry_after)},
        ) from None
    try:
        search_id = create_search(spec, service().storage, catalog=found)
    except InputError as error:
        pool.release()
        raise _input(error) from None
    except BaseException:
        pool.release()
        raise
    pool.submit(search_id, reserved=True)
    waited = pool.wait(search_id, min(wait, service().settings.max_wait), lambda: _stored_status(search_id) in TERMINAL)
    status = _status(search_id)
    if status["status"] == "done" and wait > 0 and waited:
        return jsonify(_result_body(search_id, status, top, None)), 200
    response = jsonify(status)
    response.status_code = 202
    response.headers["Location"] = status["url"]
    return response


_results: "OrderedDict[tuple, Any]" = OrderedDict()
_results_lock = threading.Lock()
RESULT_CACHE = 8


def _result(search_id: str, status: dict) -> Any:
    """The search's SearchResult; a finished one is kept (it no longer changes unless its
    budget is extended, which changes the key)."""
    from optimizer.search import load_search

    key = (search_id, status["status"], status["trials_done"], status["budget"])
    with _results_lock:
        if key in _results:
            _results.move_to_end(key)
            return _results[key]
    result = load_search(service().storage, search_id)
    if status["status"] == "done":
        with _results_lock:
            _results[key] = result
            while len(_results) > RESULT_CACHE:
                _results.popitem(last=False)
    return result


def _forget(search_id: str) -> None:
    with _results_lock:
        for key in [k for k in _results if k[0] == search_id]:
            del _results[key]


def _result_body(search_id: str, status: dict, top: int, feasible: bool | None) -> dict:
    candidates = _result(search_id, status).candidates
    if feasible is not None:
        candidates = [c for c in candidates if bool(c.get("feasible")) == feasible]
    return {"search": status, "candidates": candidates[:top]}


@blueprint.get("/searches")
def searches() -> Response:
    from optimizer.search import list_searches

    negotiate((JSON,))
    limit = query_int("limit", 50, 1, MAX_PAGE)
    offset = query_int("offset", 0, 0, 10_000_000)
    everything = list_searches(service().storage)
    page = everything[offset : offset + limit]
    for item in page:
        item["url"] = _search_url(item["id"])
    body = {
        "searches": page,
        "total": len(everything),
        "limit": limit,
        "offset": offset,
        "next": (
            url_for("v1.searches", limit=limit, offset=offset + limit) if offset + limit < len(everything) else None
        ),
    }
    return jsonify(body)


@blueprint.get("/searches/<search_id>")
def get_search(search_id: str) -> Response:
    negotiate((JSON,))
    return jsonify(_status(search_id))


@blueprint.delete("/searches/<search_id>")
def cancel(search_id: str) -> Response:
    from optimizer.search import cancel_search, delete_search

    negotiate((JSON,))
    purge = query_bool("purge")
    status = _status(search_id)
    if purge:
        cancel_search(service().storage, search_id)
        delete_search(service().storage, search_id)
        _forget(search_id)
        service().jobs.notify()
        return Response(status=204)
    if status["status"] not in TERMINAL:
        cancel_search(service().storage, search_id)
        service().jobs.notify()
        status = _status(search_id)
    return jsonify(status)


@blueprint.get("/searches/<search_id>/candidates")
def candidates(search_id: str) -> Response:
    kind = negotiate((JSON, CSV))
    top = query_int("top", 20, 1, MAX_TOP)
    feasible = query_bool("feasible")
    status = _status(search_id)
    body = _result_body(search_id, status, top, feasible)
    if kind == CSV:
        return _csv_response(candidates_csv(body["candidates"]), f"{search_id}-candidates.csv")
    return jsonify(body)


def candidates_csv(records: list[dict]) -> str:
    """Ranked candidates as CSV: part labels and SI metrics as columns."""
    from optimizer.search import candidates_csv as as_csv

    return as_csv(records, labels=True)


def _csv_response(text: str, filename: str) -> Response:
    response = Response(text, mimetype=CSV)
    response.headers["Content-Disposition"] = f'attachment; filename="{filename}"'
    return response


def _candidate(search_id: str, rank: int) -> tuple[dict, Any]:
    result = _result(search_id, _status(search_id))
    if not 1 <= rank <= len(result.candidates):
        count = len(result.candidates)
        raise _not_found(
            "rank",
            rank,
            f"no candidate of rank {rank}; this search has "
            + (f"ranks 1 to {count}" if count else "no candidates yet"),
        )
    return result.candidates[rank - 1], result


@blueprint.get("/searches/<search_id>/candidates/<int(signed=True):rank>")
def candidate(search_id: str, rank: int) -> Response:
    negotiate((JSON,))
    record, _ = _candidate(search_id, rank)
    return jsonify(record)


@blueprint.get("/searches/<search_id>/candidates/<int(signed=True):rank>/bom")
def bom(search_id: str, rank: int) -> Response:
    from optimizer.bom import MAX_UNITS, kit

    kind = negotiate((JSON, CSV))
    units = query_int("units", 1, 1, MAX_UNITS)
    record, result = _candidate(search_id, rank)
    built = kit(record, _catalog(result.spec.parts.catalog), units, result.spec)
    if kind == CSV:
        return _csv_response(built.to_csv(), f"{search_id}-rank{rank}-bom-{units}.csv")
    return jsonify(built.to_dict())


@blueprint.get("/searches/<search_id>/candidates/<int(signed=True):rank>/netlist")
def netlist(search_id: str, rank: int) -> Response:
    from optimizer.netlist import candidate_netlist

    negotiate((TEXT,))
    record, _ = _candidate(search_id, rank)
    text = candidate_netlist(record, title=f"stagefit search {search_id} rank {rank}: {record['topology']}")
    response = Response(text, mimetype=TEXT)
    response.headers["Content-Disposition"] = f'inline; filename="{search_id}-rank{rank}.cir"'
    return response


def _plots() -> Any:
    try:
        from optimizer import plots
    except ImportError:
        raise ApiProblem(
            501, "Not Implemented", "plots are not available in this version of stagefit", kind="not-implemented"
        ) from None
    return plots


@blueprint.get("/searches/<search_id>/candidates/<int(signed=True):rank>/response.svg")
def response_svg(search_id: str, rank: int) -> Response:
    negotiate((SVG,))
    record, _ = _candidate(search_id, rank)
    return Response(_plots().response_plot(record, fmt="svg"), mimetype=SVG)


@blueprint.get("/searches/<search_id>/candidates/<int(signed=True):rank>/transfer.svg")
def transfer_svg(search_id: str, rank: int) -> Response:
    negotiate((SVG,))
    record, result = _candidate(search_id, rank)
    return Response(_plots().transfer_plot(record, fmt="svg", spec_swing=result.spec.limits.swing_min), mimetype=SVG)


@blueprint.get("/searches/<search_id>/front")
def front(search_id: str) -> Response:
    negotiate((JSON,))
    status = _status(search_id)
    result = _result(search_id, status)
    return jsonify({"search": status, "objectives": _objectives(result.spec), "front": result.front})


def _objectives(spec: Any) -> list[dict]:
    return [{"metric": metric, "direction": direction} for metric, direction in spec.objective_directions]


@blueprint.get("/searches/<search_id>/front.svg")
def front_svg(search_id: str) -> Response:
    negotiate((SVG,))
    plots = _plots()
    result = _result(search_id, _status(search_id))
    chosen = result.candidates[0] if result.candidates else None
    svg = plots.front_plot(
        result.candidates,
        result.spec.objective_directions,
        chosen=chosen,
        front=result.front,
        title=f"search {search_id}: {result.spec.name}",
    )
    return Response(svg, mimetype=SVG)
