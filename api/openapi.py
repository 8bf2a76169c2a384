"""The OpenAPI 3.1 document of the service: every route, parameter, body and response.

The spec body's schema is ``optimizer.spec.spec_json_schema()`` itself (its ``$defs``
moved under ``components/schemas`` as ``Spec.<name>``), so the document cannot drift from
what the service validates.
"""

from __future__ import annotations

import copy
import functools
from typing import Any

from api.problems import PROBLEM_JSON
from optimizer.metrics import METRICS
from optimizer.spec import MAX_SAMPLES, MAX_TOP
from optimizer.topologies.base import POLARITIES, SPLIT_BIASES, SUPPLIES

VERSION = "1.0.0"
STATUSES = ["queued", "running", "done", "failed", "cancelled"]


def _ref(name: str) -> dict:
    return {"$ref": f"#/components/schemas/{name}"}


def _spec_schemas() -> dict[str, Any]:
    """The spec's JSON Schema as components: Spec plus Spec.<def> for each of its $defs."""
    from optimizer.spec import spec_json_schema

    schema = copy.deepcopy(spec_json_schema())
    schema.pop("$schema", None)
    defs = schema.pop("$defs", {})

    def rewrite(node: Any) -> Any:
        if isinstance(node, dict):
            return {
                k: (
                    f"#/components/schemas/Spec.{v[len('#/$defs/') :]}"
                    if k == "$ref" and isinstance(v, str) and v.startswith("#/$defs/")
                    else rewrite(v)
                )
                for k, v in node.items()
            }
        if isinstance(node, list):
            return [rewrite(v) for v in node]
        return node

    out = {"Spec": rewrite(schema)}
    out.update({f"Spec.{name}": rewrite(body) for name, body in defs.items()})
    return out


NUMBER_OR_NULL = {"type": ["number", "null"]}


def _candidate_schemas() -> dict[str, Any]:
    """The candidate record's schema, generated from its type (optimizer/record.py), as
    components Candidate and Candidate.<block>; each metric described from the metrics table."""
    from optimizer.record import candidate_schema

    prefix = "#/components/schemas/Candidate."
    schemas = candidate_schema(prefix)
    out = {("Candidate" if name == "Candidate" else f"Candidate.{name}"): body for name, body in schemas.items()}
    out["Candidate"]["properties"]["metrics"]["properties"] = {
        m.key: {**NUMBER_OR_NULL, "description": m.description + (f" ({m.unit})" if m.unit else "")} for m in METRICS
    }
    return out


PROBLEM_ERRORS = {
    "400": "the request cannot be read (malformed JSON or YAML, a document beyond the bounds "
    "in this document's description, a bad query parameter)",
    "401": "a bearer token is required (STAGEFIT_API_TOKEN is set) and was missing or wrong",
    "404": "no such search, candidate rank or catalog",
    "406": "the Accept header allows none of this route's media types",
    "413": "the body is larger than STAGEFIT_MAX_BODY",
    "415": "the body's Content-Type is not accepted",
    "422": "the body is well-formed but invalid (field paths in errors)",
    "429": "STAGEFIT_MAX_QUEUE searches are queued or running already; Retry-After says when to try again",
    "501": "this feature is not available in this version",
    "503": "the search storage is not available (Retry-After says when to try again)",
}


def _problem(code: str) -> dict:
    return {"description": PROBLEM_ERRORS[code], "content": {PROBLEM_JSON: {"schema": _ref("Problem")}}}


def _responses(ok: dict[str, dict], *errors: str) -> dict:
    out = dict(ok)
    for code in ("401", "406", *errors, "503"):
        out[code] = _problem(code)
    return out


def _json(schema: dict, description: str, *, csv: bool = False) -> dict:
    content = {"application/json": {"schema": schema}}
    if csv:
        content["text/csv"] = {"schema": {"type": "string"}}
    return {"description": description, "content": content}


def _param(name: str, where: str, schema: dict, description: str, required: bool = False) -> dict:
    return {
        "name": name,
        "in": where,
        "required": required or where == "path",
        "schema": schema,
        "description": description,
    }


SEARCH_ID = _param("search_id", "path", {"type": "string", "minLength": 1}, "the search id")
RANK = _param("rank", "path", {"type": "integer"}, "candidate rank, 1 = best")
TOP = _param(
    "top",
    "query",
    {"type": "integer", "minimum": 1, "maximum": MAX_TOP, "default": 20},
    "how many ranked candidates to return",
)


def _schemas() -> dict[str, Any]:
    status = {
        "type": "object",
        "required": ["id", "status", "trials_done", "budget", "url"],
        "properties": {
            "id": {"type": "string"},
            "name": {"type": ["string", "null"]},
            "status": {"enum": STATUSES},
            "trials_done": {"type": "integer", "minimum": 0},
            "trials_running": {"type": "integer", "minimum": 0},
            "trials_feasible": {
                "type": "integer",
                "minimum": 0,
                "description": "finished trials whose design meets every limit",
            },
            "budget": {"type": "integer", "minimum": 0},
            "elapsed": NUMBER_OR_NULL,
            "created": {"type": ["string", "null"]},
            "reason": {"type": ["string", "null"], "description": "why a failed search stopped"},
            "best": {"anyOf": [_ref("Candidate"), {"type": "null"}]},
            "url": {"type": "string", "description": "this search's URL"},
        },
    }
    return {
        "Problem": {
            "type": "object",
            "description": "RFC 9457 problem details",
            "required": ["type", "title", "status", "detail"],
            "properties": {
                "type": {"type": "string"},
                "title": {"type": "string"},
                "status": {"type": "integer"},
                "detail": {"type": "string"},
                "instance": {"type": "string"},
                "errors": {
                    "type": "array",
                    "items": {
                        "type": "object",
                        "required": ["field", "expected"],
                        "properties": {
                            "field": {"type": "string", "description": "path of the bad field"},
                            "value": {},
                            "expected": {"type": "string"},
                        },
                    },
                },
            },
        },
        "Health": {
            "type": "object",
            "required": ["status"],
            "properties": {
                "status": {"const": "ok"},
                "queue_only": {"type": "boolean"},
                "workers": {"type": "integer"},
            },
        },
        "Topologies": {
            "type": "object",
            "required": ["topologies"],
            "properties": {
                "topologies": {
                    "type": "array",
                    "items": {
                        "type": "object",
                        "required": ["name", "resistors", "capacitors"],
                        "properties": {
                            "name": {"type": "string"},
                            "description": {"type": "string"},
                            "resistors": {"type": "array", "items": {"type": "string"}},
                            "capacitors": {"type": "array", "items": {"type": "string"}},
                            "optional_parts": {"type": "array", "items": {"type": "string"}},
                            "transistors": {"type": "integer"},
                            "roles": {
                                "type": "array",
                                "items": {
                                    "type": "object",
                                    "required": ["name", "kind"],
                                    "properties": {
                                        "name": {"type": "string"},
                                        "kind": {"enum": ["resistor", "capacitor"]},
                                        "unit": {"enum": ["ohm", "F"]},
                                        "series": {"type": "string"},
                                        "optional": {"type": "boolean"},
                                    },
                                },
                            },
                            "polarities": {"type": "array", "items": {"enum": list(POLARITIES)}},
                            "supplies": {"type": "array", "items": {"enum": list(SUPPLIES)}},
                            "split_bias": {"enum": list(SPLIT_BIASES)},
                            "device_kind": {"type": "string"},
                            "direct_input": {
                                "type": "boolean",
                                "description": "on a split supply, takes a DC-passing source without c_in",
                            },
                            "gain_sign": {"enum": ["inverting", "non-inverting"]},
                        },
                    },
                }
            },
        },
        "Catalogs": {
            "type": "object",
            "required": ["catalogs"],
            "properties": {
                "catalogs": {
                    "type": "array",
                    "items": {
                        "type": "object",
                        "required": ["name", "url"],
                        "properties": {
                            "name": {"type": "string"},
                            "description": {"type": "string"},
                            "currency": {"type": "string"},
                            "stock_tracked": {"type": "boolean"},
                            "url": {"type": "string"},
                        },
                    },
                }
            },
        },
        "Catalog": {
            "type": "object",
            "required": ["name", "resistors", "capacitors", "transistors"],
            "properties": {
                "name": {"type": "string"},
                "description": {"type": "string"},
                "currency": {"type": "string"},
                "stock_tracked": {"type": "boolean"},
                "resistors": {"type": "object"},
                "capacitors": {"type": "object"},
                "transistors": {"type": "object"},
            },
        },
        **_candidate_schemas(),
        "SearchStatus": status,
        "SearchList": {
            "type": "object",
            "required": ["searches", "total", "limit", "offset"],
            "properties": {
                "searches": {"type": "array", "items": _ref("SearchStatus")},
                "total": {"type": "integer"},
                "limit": {"type": "integer"},
                "offset": {"type": "integer"},
                "next": {"type": ["string", "null"]},
            },
        },
        "SearchResult": {
            "type": "object",
            "required": ["search", "candidates"],
            "properties": {"search": _ref("SearchStatus"), "candidates": {"type": "array", "items": _ref("Candidate")}},
        },
        "Front": {
            "type": "object",
            "required": ["search", "objectives", "front"],
            "properties": {
                "search": _ref("SearchStatus"),
                "objectives": {
                    "type": "array",
                    "items": {
                        "type": "object",
                        "properties": {"metric": {"type": "string"}, "direction": {"type": "string"}},
                    },
                },
                "front": {"type": "array", "items": _ref("Candidate")},
            },
        },
        "Kit": {
            "type": "object",
            "required": ["units", "short", "totals", "lines"],
            "properties": {
                "units": {"type": "integer"},
                "short": {"type": "boolean"},
                "totals": {"type": "object"},
                "lines": {"type": "array", "items": {"type": "object"}},
            },
        },
        "EvaluateRequest": {
            "type": "object",
            "required": ["spec", "topology", "parts"],
            "additionalProperties": False,
            "properties": {
                "spec": _ref("Spec"),
                "topology": {"type": "string", "description": "a name from GET /v1/topologies"},
                "parts": {
                    "type": "object",
                    "description": "role -> value (SI number or engineering "
                    'notation such as "68k", "2.2u"); capacitors left out are sized',
                    "additionalProperties": {"anyOf": [{"type": "number"}, {"type": "string"}]},
                },
                "device": {
                    "type": ["string", "null"],
                    "description": "transistor id (default: the spec's first device)",
                },
                "samples": {
                    "type": "integer",
                    "minimum": 1,
                    "maximum": MAX_SAMPLES,
                    "default": 1000,
                    "description": "Monte Carlo builds for the yield",
                },
            },
        },
        **_spec_schemas(),
    }


def _links(search_id: str) -> dict:
    """Links from a created search to what a client does next (schemathesis follows them
    in its stateful run: create -> poll -> candidates -> delete)."""
    follow = {"search_id": search_id}
    return {
        "GetSearch": {"operationId": "getSearch", "parameters": follow},
        "GetCandidates": {"operationId": "candidates", "parameters": follow},
        "GetFront": {"operationId": "front", "parameters": follow},
        "CancelSearch": {"operationId": "cancelSearch", "parameters": follow},
    }


def limits_text() -> str:
    """Every bound the service enforces, with its value (the document's description)."""
    from api import Settings
    from optimizer import documents
    from optimizer.spec import MAX_BATCH, MAX_DESCRIPTION, MAX_NAME, MAX_SAMPLES, MAX_TOP, MAX_TRIALS

    return (
        f"Limits: request body at most STAGEFIT_MAX_BODY bytes (default {Settings.max_body}; 413); "
        f"a body document at most {documents.MAX_NODES} values, {documents.MAX_DEPTH} levels of "
        f"nesting and {documents.MAX_ALIASES} YAML aliases, no lone surrogates (400); "
        f"search.trials at most STAGEFIT_MAX_TRIALS (default {Settings.max_trials}, never above "
        f"{MAX_TRIALS}); search.batch_size at most {MAX_BATCH}; spec name at most {MAX_NAME} "
        f"characters, description {MAX_DESCRIPTION} (422); samples at most {MAX_SAMPLES}; "
        f"?top at most {MAX_TOP}; numbers in ASCII digits only; ?wait= at most STAGEFIT_MAX_WAIT s "
        f"(default {Settings.max_wait:g}), STAGEFIT_MAX_WAITERS waiting requests at once (default half "
        f"the request threads, so /healthz always answers); STAGEFIT_MAX_QUEUE searches queued or "
        f"running (default {Settings.max_queue}; 429 with Retry-After)."
    )


def _paths() -> dict[str, Any]:
    svg = {"content": {"image/svg+xml": {"schema": {"type": "string"}}}}
    spec_body = {
        "required": True,
        "description": "a requirements spec (see GET /v1/spec-schema)",
        "content": {"application/json": {"schema": _ref("Spec")}, "application/yaml": {"schema": _ref("Spec")}},
    }
    return {
        "/healthz": {
            "get": {
                "operationId": "health",
                "summary": "liveness (never needs a token)",
                "security": [],
                "responses": {"200": _json(_ref("Health"), "the service is up")},
            }
        },
        "/v1/openapi.json": {
            "get": {
                "operationId": "openapi",
                "summary": "this document",
                "responses": _responses({"200": _json({"type": "object"}, "the OpenAPI 3.1 document")}),
            }
        },
        "/v1/spec-schema": {
            "get": {
                "operationId": "specSchema",
                "summary": "JSON Schema (2020-12) of a requirements spec",
                "responses": _responses(
                    {
                        "200": {
                            "description": "the schema",
                            "content": {
                                "application/json": {"schema": {"type": "object"}},
                                "application/schema+json": {"schema": {"type": "object"}},
                            },
                        }
                    }
                ),
            }
        },
        "/v1/topologies": {
            "get": {
                "operationId": "topologies",
                "summary": "the stage topologies and their parts",
                "responses": _responses({"200": _json(_ref("Topologies"), "every topology")}),
            }
        },
        "/v1/catalogs": {
            "get": {
                "operationId": "catalogs",
                "summary": "the parts catalogs, by name",
                "responses": _responses({"200": _json(_ref("Catalogs"), "every catalog")}),
            }
        },
        "/v1/catalogs/{name}": {
            "get": {
                "operationId": "catalog",
                "summary": "one catalog's summary and transistor models",
                "parameters": [_param("name", "path", {"type": "string"}, "a catalog name from GET /v1/catalogs")],
                "responses": _responses({"200": _json(_ref("Catalog"), "the catalog")}, "404"),
            }
        },
        "/v1/evaluate": {
            "post": {
                "operationId": "evaluate",
                "summary": "metrics, spread, yield and ratings of a design you have",
                "requestBody": {"required": True, "content": {"application/json": {"schema": _ref("EvaluateRequest")}}},
                "responses": _responses(
                    {"200": _json(_ref("Candidate"), "the candidate record")}, "400", "413", "415", "422"
                ),
            }
        },
        "/v1/searches": {
            "post": {
                "operationId": "createSearch",
                "summary": "queue a search for a spec (YAML or JSON); its budget is the spec's search.trials",
                "parameters": [
                    _param(
                        "wait",
                        "query",
                        {"type": "number", "minimum": 0, "maximum": 3600},
                        "seconds to wait for the result (clamped to STAGEFIT_MAX_WAIT, default 60); 200 "
                        "with the ranked candidates if the search finishes in time, else 202. At most "
                        "STAGEFIT_MAX_WAITERS requests wait at once (default half the request threads); "
                        "past that the answer is 202 at once: poll the Location",
                    ),
                    TOP,
                ],
                "requestBody": spec_body,
                "responses": {
                    **_responses(
                        {
                            "200": {
                                **_json(_ref("SearchResult"), "finished within ?wait=: the ranked candidates"),
                                "links": _links("$response.body#/search/id"),
                            },
                            "202": {
                                "description": "queued (or still running); Location is the search's URL",
                                "headers": {
                                    "Location": {"schema": {"type": "string"}, "description": "the search's URL"}
                                },
                                "content": {"application/json": {"schema": _ref("SearchStatus")}},
                                "links": _links("$response.body#/id"),
                            },
                        },
                        "400",
                        "413",
                        "415",
                        "422",
                    ),
                    "429": {
                        **_problem("429"),
                        "headers": {"Retry-After": {"schema": {"type": "string"}, "description": "seconds"}},
                    },
                },
            },
            "get": {
                "operationId": "listSearches",
                "summary": "stored searches, newest first, paged",
                "parameters": [
                    _param(
                        "limit", "query", {"type": "integer", "minimum": 1, "maximum": 200, "default": 50}, "page size"
                    ),
                    _param("offset", "query", {"type": "integer", "minimum": 0, "default": 0}, "how many to skip"),
                ],
                "responses": _responses({"200": _json(_ref("SearchList"), "one page of searches")}, "400"),
            },
        },
        "/v1/searches/{search_id}": {
            "parameters": [SEARCH_ID],
            "get": {
                "operationId": "getSearch",
                "summary": "status, progress, best so far, elapsed",
                "responses": _responses({"200": _json(_ref("SearchStatus"), "the search")}, "404"),
            },
            "delete": {
                "operationId": "cancelSearch",
                "summary": "cancel (finished trials are kept); ?purge=true deletes the record",
                "parameters": [
                    _param("purge", "query", {"type": "boolean"}, "delete the stored search instead of only cancelling")
                ],
                "responses": _responses(
                    {
                        "200": _json(_ref("SearchStatus"), "cancelled (or already over)"),
                        "204": {"description": "deleted"},
                    },
                    "400",
                    "404",
                ),
            },
        },
        "/v1/searches/{search_id}/candidates": {
            "get": {
                "operationId": "candidates",
                "summary": "ranked candidates (JSON, or CSV with Accept: text/csv)",
                "parameters": [
                    SEARCH_ID,
                    TOP,
                    _param("feasible", "query", {"type": "boolean"}, "only feasible (true) or only infeasible (false)"),
                ],
                "responses": _responses(
                    {"200": _json(_ref("SearchResult"), "the ranked list", csv=True)}, "400", "404"
                ),
            }
        },
        "/v1/searches/{search_id}/front": {
            "get": {
                "operationId": "front",
                "summary": "the Pareto front over the spec's objectives",
                "parameters": [SEARCH_ID],
                "responses": _responses({"200": _json(_ref("Front"), "front records")}, "404"),
            }
        },
        "/v1/searches/{search_id}/front.svg": {
            "get": {
                "operationId": "frontPlot",
                "summary": "the Pareto front as SVG",
                "parameters": [SEARCH_ID],
                "responses": _responses({"200": {"description": "SVG plot", **svg}}, "404", "501"),
            }
        },
        "/v1/searches/{search_id}/candidates/{rank}": {
            "get": {
                "operationId": "candidate",
                "summary": "one ranked candidate",
                "parameters": [SEARCH_ID, RANK],
                "responses": _responses({"200": _json(_ref("Candidate"), "the candidate")}, "404"),
            }
        },
        "/v1/searches/{search_id}/candidates/{rank}/bom": {
            "get": {
                "operationId": "bom",
                "summary": "bill of materials for N units (JSON, or CSV with Accept: text/csv)",
                "parameters": [
                    SEARCH_ID,
                    RANK,
                    _param(
                        "units",
                        "query",
                        {"type": "integer", "minimum": 1, "maximum": 100000, "default": 1},
                        "how many stages to kit",
                    ),
                ],
                "responses": _responses({"200": _json(_ref("Kit"), "the kit", csv=True)}, "400", "404"),
            }
        },
        "/v1/searches/{search_id}/candidates/{rank}/netlist": {
            "get": {
                "operationId": "netlist",
                "summary": "SPICE netlist of the candidate",
                "parameters": [SEARCH_ID, RANK],
                "responses": _responses(
                    {
                        "200": {
                            "description": "SPICE netlist",
                            "content": {"text/plain": {"schema": {"type": "string"}}},
                        }
                    },
                    "404",
                ),
            }
        },
        "/v1/searches/{search_id}/candidates/{rank}/response.svg": {
            "get": {
                "operationId": "responsePlot",
                "summary": "frequency response of the candidate as SVG",
                "parameters": [SEARCH_ID, RANK],
                "responses": _responses({"200": {"description": "SVG plot", **svg}}, "404", "501"),
            }
        },
        "/v1/searches/{search_id}/candidates/{rank}/transfer.svg": {
            "get": {
                "operationId": "transferPlot",
                "summary": "static transfer curve of the candidate (load against source voltage) as SVG",
                "parameters": [SEARCH_ID, RANK],
                "responses": _responses({"200": {"description": "SVG plot", **svg}}, "404", "501"),
            }
        },
    }


@functools.lru_cache(maxsize=1)
def _document() -> dict:
    return {
        "openapi": "3.1.0",
        "info": {
            "title": "stagefit",
            "version": VERSION,
            "description": "Search preferred-value parts and topologies for small-signal transistor "
            "stages. Errors are application/problem+json (RFC 9457). When the service "
            "has STAGEFIT_API_TOKEN set, every route but /healthz needs "
            "Authorization: Bearer <token>. " + limits_text(),
        },
        "servers": [{"url": "/"}],
        "security": [{}, {"bearer": []}],
        "paths": _paths(),
        "components": {"schemas": _schemas(), "securitySchemes": {"bearer": {"type": "http", "scheme": "bearer"}}},
    }


def openapi_document() -> dict:
    """The OpenAPI 3.1 document (a fresh copy)."""
    return copy.deepcopy(_document())
