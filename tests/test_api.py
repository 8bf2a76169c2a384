"""REST service through Flask's test client: every route, status code and content type.

External references: RFC 9457 (problem details: application/problem+json with type, title,
status, detail), RFC 9110 (405 carries Allow, 401 carries WWW-Authenticate, 406/413/415
semantics), OpenAPI 3.1 checked by the openapi-spec-validator package.
"""

from __future__ import annotations

import csv
import io
import json
import logging
import time
from pathlib import Path

import optuna
import pytest
import yaml

from api import Settings, create_app
from api.openapi import openapi_document
from optimizer.catalog import load_catalog
from optimizer.errors import InputError
from optimizer.spec import parse_spec, spec_json_schema

ROOT = Path(__file__).resolve().parents[1]
PROBLEM = "application/problem+json"
TRIALS = 96


def pickup_spec(trials: int = TRIALS, **search) -> dict:
    spec = yaml.safe_load((ROOT / "specs" / "contact_pickup_buffer.yaml").read_text())
    spec["search"] = {"trials": trials, "seed": 3, "batch_size": 32, **search}
    return spec


def assert_problem(response, status: int) -> dict:
    assert response.status_code == status, response.data
    assert response.mimetype == PROBLEM
    body = response.get_json(force=True)
    assert {"type", "title", "status", "detail"} <= set(body)
    assert body["status"] == status and body["detail"]
    return body


def stop(app) -> None:
    app.extensions["stagefit"].jobs.stop()


def wait_until(predicate, timeout: float = 60.0) -> None:
    deadline = time.monotonic() + timeout
    while not predicate():
        assert time.monotonic() < deadline, "condition not reached in time"
        time.sleep(0.1)


@pytest.fixture(scope="module")
def app(tmp_path_factory):
    app = create_app(
        {
            "STAGEFIT_DATA_DIR": str(tmp_path_factory.mktemp("runs")),
            "STAGEFIT_MAX_TRIALS": "300",
            "STAGEFIT_MAX_BODY": "65536",
        }
    )
    yield app
    stop(app)


@pytest.fixture(scope="module")
def client(app):
    return app.test_client()


@pytest.fixture(scope="module")
def done(client) -> dict:
    """A finished search (posted with ?wait=): the 200 body."""
    response = client.post("/v1/searches?wait=120&top=5", json=pickup_spec())
    assert response.status_code == 200, response.data
    assert response.mimetype == "application/json"
    return response.get_json()


# --- plain routes ---------------------------------------------------------------------


def test_healthz(client):
    response = client.get("/healthz")
    assert response.status_code == 200 and response.mimetype == "application/json"
    assert response.get_json()["status"] == "ok"


def test_topologies_are_the_registry(client):
    from optimizer.topologies import TOPOLOGIES

    response = client.get("/v1/topologies")
    assert response.status_code == 200 and response.mimetype == "application/json"
    listed = {t["name"]: t for t in response.get_json()["topologies"]}
    assert set(listed) == set(TOPOLOGIES)
    assert listed["divider_ce"]["resistors"] == list(TOPOLOGIES["divider_ce"].resistors)


def test_catalogs_by_name_only(client):
    response = client.get("/v1/catalogs")
    assert response.status_code == 200 and response.mimetype == "application/json"
    names = [c["name"] for c in response.get_json()["catalogs"]]
    assert "bench_stock" in names
    one = client.get("/v1/catalogs/bench_stock")
    assert one.status_code == 200
    body = one.get_json()
    assert body["name"] == "bench_stock"
    assert {m["id"] for m in body["transistors"]["models"]} == set(load_catalog("bench_stock").transistors["id"])
    body = assert_problem(client.get("/v1/catalogs/no_such"), 404)
    assert "bench_stock" in body["detail"]
    # a path is never read: encoded separators do not reach the catalog loader
    assert client.get("/v1/catalogs/..%2F..%2Fetc").status_code == 404


def test_spec_schema_is_the_spec_modules(client):
    response = client.get("/v1/spec-schema")
    assert response.status_code == 200 and response.mimetype == "application/json"
    assert response.get_json() == spec_json_schema()


def test_openapi_is_valid_and_lists_every_route(client, app):
    from openapi_spec_validator import validate

    response = client.get("/v1/openapi.json")
    assert response.status_code == 200 and response.mimetype == "application/json"
    document = response.get_json()
    validate(document)  # OpenAPI 3.1 (openapi-spec-validator)
    assert document["openapi"].startswith("3.1")
    routes = {}
    for rule in app.url_map.iter_rules():
        if rule.endpoint == "static" or rule.endpoint.startswith("pages."):
            continue  # the browser pages (HTML) are not part of the REST API
        path = rule.rule.replace("<int(signed=True):", "{").replace("<", "{").replace(">", "}")
        routes.setdefault(path, set()).update(m.lower() for m in rule.methods - {"HEAD", "OPTIONS"})
    documented = {
        path: {m for m in item if m in ("get", "post", "delete", "put", "patch")}
        for path, item in document["paths"].items()
    }
    assert routes == documented
    # the spec body is the spec module's own schema
    assert document["components"]["schemas"]["Spec"]["properties"].keys() == spec_json_schema()["properties"].keys()


def test_unknown_route_and_method_are_problems(client):
    body = assert_problem(client.get("/v1/nothing"), 404)
    assert body["instance"] == "/v1/nothing"
    response = client.put("/v1/topologies")
    assert_problem(response, 405)
    assert "GET" in response.headers["Allow"]


def test_not_acceptable(client):
    body = assert_problem(client.get("/v1/topologies", headers={"Accept": "text/csv"}), 406)
    assert "application/json" in body["detail"]
    # a wildcard or a list that includes JSON is fine
    assert client.get("/v1/topologies", headers={"Accept": "text/*;q=0.5, */*;q=0.1"}).status_code == 200


# --- auth -----------------------------------------------------------------------------


def test_bearer_token(tmp_path):
    app = create_app(
        {"STAGEFIT_DATA_DIR": str(tmp_path), "STAGEFIT_API_TOKEN": "s3cret-token", "STAGEFIT_QUEUE_ONLY": "1"}
    )
    client = app.test_client()
    assert client.get("/healthz").status_code == 200  # always open
    response = client.get("/v1/topologies")
    assert_problem(response, 401)
    assert response.headers["WWW-Authenticate"].startswith("Bearer")
    assert_problem(client.get("/v1/topologies", headers={"Authorization": "Bearer wrong"}), 401)
    assert_problem(client.get("/v1/topologies", headers={"Authorization": "Basic s3cret-token"}), 401)
    assert_problem(client.post("/v1/searches", json=pickup_spec()), 401)
    ok = client.get("/v1/topologies", headers={"Authorization": "Bearer s3cret-token"})
    assert ok.status_code == 200


# --- evaluate -------------------------------------------------------------------------

HAND = {"r_top": "270k", "r_bottom": "51k", "r_collector": "11k", "r_emitter": "1k3"}


def test_evaluate_matches_assess(client):
    from optimizer.candidates import assess

    spec = pickup_spec()
    response = client.post("/v1/evaluate", json={"spec": spec, "topology": "divider_ce", "parts": HAND, "samples": 200})
    assert response.status_code == 200 and response.mimetype == "application/json"
    record = response.get_json()
    parsed = parse_spec(spec)
    direct = assess(
        parsed,
        load_catalog(parsed.parts.catalog),
        "divider_ce",
        {"r_top": 270e3, "r_bottom": 51e3, "r_collector": 11e3, "r_emitter": 1.3e3},
        samples=200,
    )
    assert record["parts"]["r_top"]["label"] == "270k"
    assert record["metrics"]["gain"] == pytest.approx(direct["metrics"]["gain"])
    assert record["feasible"] == direct["feasible"]
    assert set(record["violations"]) == set(direct["violations"])


def test_evaluate_reports_every_problem_with_field_paths(client):
    body = {
        "spec": pickup_spec(),
        "topology": "divider_ce",
        "parts": {"r_top": "lots", "r_bottom": "51k", "r_collector": "11k", "c_oops": "1u"},
        "device": "no-such-device",
        "samples": 0,
    }
    problem = assert_problem(client.post("/v1/evaluate", json=body), 422)
    fields = {e["field"] for e in problem["errors"]}
    assert {"parts.r_top", "parts.c_oops", "parts.r_emitter", "device", "samples"} <= fields
    bad_spec = {**pickup_spec(), "supply": "twelve"}
    problem = assert_problem(
        client.post("/v1/evaluate", json={"spec": bad_spec, "topology": "divider_ce", "parts": HAND}), 422
    )
    assert [e["field"] for e in problem["errors"]] == ["spec.supply"]
    problem = assert_problem(
        client.post("/v1/evaluate", json={"spec": bad_spec, "topology": "divider_ce", "parts": {**HAND, "r_top": "-"}}),
        422,
    )
    assert [e["field"] for e in problem["errors"]] == ["spec.supply", "parts.r_top"]  # all at once
    problem = assert_problem(
        client.post("/v1/evaluate", json={"spec": pickup_spec(), "topology": "tube", "parts": HAND}), 422
    )
    assert problem["errors"][0]["field"] == "topology"
    problem = assert_problem(client.post("/v1/evaluate", json={"topology": "divider_ce", "extra": 1}), 422)
    assert {"spec", "parts", "extra"} <= {e["field"] for e in problem["errors"]}


@pytest.mark.parametrize(
    "data, content_type, status",
    [
        ("{not json", "application/json", 400),
        ('{"spec": NaN}', "application/json", 400),
        (b"\xff\xfe", "application/json", 400),
        ("[1, 2]", "application/json", 422),
        ("spec: {}", "text/plain", 415),
        ("{}", None, 415),
    ],
)
def test_evaluate_body_errors(client, data, content_type, status):
    assert_problem(client.post("/v1/evaluate", data=data, content_type=content_type), status)


def test_body_over_the_limit(client):
    body = json.dumps({"spec": pickup_spec(), "padding": "x" * 70000})
    problem = assert_problem(client.post("/v1/evaluate", data=body, content_type="application/json"), 413)
    assert "65536" in problem["detail"]


# --- searches ---------------------------------------------------------------------------


def test_post_with_wait_returns_the_ranked_result(done):
    status = done["search"]
    assert status["status"] == "done"
    assert status["trials_done"] == status["budget"] == TRIALS
    assert status["url"] == f"/v1/searches/{status['id']}"
    assert 1 <= len(done["candidates"]) <= 5
    assert [c["rank"] for c in done["candidates"]] == list(range(1, len(done["candidates"]) + 1))
    first = done["candidates"][0]
    assert {"topology", "parts", "transistor", "metrics", "feasible"} <= set(first)


def test_post_without_wait_is_202_with_location(tmp_path):
    app = create_app({"STAGEFIT_DATA_DIR": str(tmp_path), "STAGEFIT_QUEUE_ONLY": "1"})
    client = app.test_client()
    response = client.post("/v1/searches", json=pickup_spec())
    assert response.status_code == 202 and response.mimetype == "application/json"
    body = response.get_json()
    assert response.headers["Location"].endswith(f"/v1/searches/{body['id']}")
    assert body["status"] == "queued" and body["trials_done"] == 0
    # queue only: nothing runs it here; ?wait= gives up and answers 202
    response = client.post("/v1/searches?wait=0.3", json=pickup_spec())
    assert response.status_code == 202
    # YAML body, as the spec files are written
    response = client.post(
        "/v1/searches",
        data=(ROOT / "specs" / "contact_pickup_buffer.yaml").read_text(),
        content_type="application/yaml",
    )
    assert response.status_code == 202
    assert client.get(response.headers["Location"]).get_json()["name"] == "contact_pickup_buffer"


def test_rejected_posts_store_nothing(tmp_path):
    app = create_app({"STAGEFIT_DATA_DIR": str(tmp_path), "STAGEFIT_QUEUE_ONLY": "1", "STAGEFIT_MAX_TRIALS": "500"})
    client = app.test_client()
    problem = assert_problem(client.post("/v1/searches", json=pickup_spec(trials=501)), 422)
    assert problem["errors"][0]["field"] == "search.trials" and "500" in problem["detail"]
    spec = pickup_spec()
    spec["parts"] = {"catalog": "../../etc"}
    problem = assert_problem(client.post("/v1/searches", json=spec), 422)
    assert problem["errors"][0]["field"] == "parts.catalog"
    spec = pickup_spec()
    spec["devices"] = ["no-such-device"]
    problem = assert_problem(client.post("/v1/searches", json=spec), 422)
    assert problem["errors"][0]["field"] == "devices[0]"
    problem = assert_problem(client.post("/v1/searches", json={**pickup_spec(), "gain": "loud", "band": [20]}), 422)
    assert {"gain", "band"} <= {e["field"].split(".")[0].split("[")[0] for e in problem["errors"]}
    assert_problem(client.post("/v1/searches", data="a: &x [1]\nb: *x\n", content_type="application/yaml"), 422)
    bomb = "a: &a [x,x,x,x,x,x,x,x,x]\n" + "".join(
        f"{chr(98 + i)}: &{chr(98 + i)} [{', '.join(['*' + chr(97 + i)] * 9)}]\n" for i in range(8)
    )
    assert_problem(client.post("/v1/searches", data=bomb, content_type="application/yaml"), 400)
    assert_problem(client.post("/v1/searches", data="a: [", content_type="application/yaml"), 400)
    assert_problem(client.post("/v1/searches?wait=soon", json=pickup_spec()), 400)
    assert_problem(client.post("/v1/searches?top=0", json=pickup_spec()), 400)
    assert client.get("/v1/searches").get_json()["total"] == 0


def test_status_and_list(client, done):
    search_id = done["search"]["id"]
    response = client.get(f"/v1/searches/{search_id}")
    assert response.status_code == 200 and response.mimetype == "application/json"
    status = response.get_json()
    assert status["status"] == "done" and status["elapsed"] > 0 and status["best"]["rank"] == 1
    listing = client.get("/v1/searches?limit=1&offset=0").get_json()
    assert listing["limit"] == 1 and listing["total"] >= 1 and len(listing["searches"]) == 1
    assert search_id in [s["id"] for s in client.get("/v1/searches?limit=200").get_json()["searches"]]
    assert_problem(client.get("/v1/searches?limit=0"), 400)
    assert_problem(client.get("/v1/searches/s-nothing-here"), 404)


def test_candidates_json_and_csv(client, done):
    search_id = done["search"]["id"]
    response = client.get(f"/v1/searches/{search_id}/candidates?top=7")
    assert response.status_code == 200 and response.mimetype == "application/json"
    ranked = response.get_json()["candidates"]
    assert len(ranked) == 7 and [c["rank"] for c in ranked] == list(range(1, 8))
    response = client.get(f"/v1/searches/{search_id}/candidates?top=7", headers={"Accept": "text/csv"})
    assert response.status_code == 200 and response.mimetype == "text/csv"
    rows = list(csv.DictReader(io.StringIO(response.data.decode())))
    assert [int(r["rank"]) for r in rows] == list(range(1, 8))
    assert rows[0]["topology"] == ranked[0]["topology"]
    role = next(iter(ranked[0]["parts"]))
    assert rows[0][role] == ranked[0]["parts"][role]["label"]
    assert float(rows[0]["supply_current"]) == pytest.approx(ranked[0]["metrics"]["supply_current"])
    every = client.get(f"/v1/searches/{search_id}/candidates?top=50").get_json()["candidates"]
    assert every
    for flag in (True, False):  # reference: the unfiltered list, filtered here
        only = client.get(f"/v1/searches/{search_id}/candidates?top=50&feasible={str(flag).lower()}").get_json()
        assert [c["parts"] for c in only["candidates"]] == [c["parts"] for c in every if c["feasible"] is flag]
    assert_problem(client.get(f"/v1/searches/{search_id}/candidates?feasible=maybe"), 400)
    assert_problem(client.get(f"/v1/searches/{search_id}/candidates", headers={"Accept": "image/png"}), 406)
    assert_problem(client.get("/v1/searches/s-nothing-here/candidates"), 404)


def test_one_candidate_and_its_files(client, done):
    base = f"/v1/searches/{done['search']['id']}/candidates"
    response = client.get(f"{base}/1")
    assert response.status_code == 200 and response.mimetype == "application/json"
    record = response.get_json()
    assert record["rank"] == 1 and record == done["candidates"][0]
    for rank in (0, -1, 100000):
        assert_problem(client.get(f"{base}/{rank}"), 404)
    netlist = client.get(f"{base}/1/netlist")
    assert netlist.status_code == 200 and netlist.mimetype == "text/plain"
    text = netlist.data.decode()
    assert text.rstrip().endswith(".end")
    for role, part in record["parts"].items():
        if part["value"] > 0:
            assert f"{role} = " in text  # every part is in the netlist's header
    for path in (f"{base}/1/response.svg", f"/v1/searches/{done['search']['id']}/front.svg"):
        response = client.get(path)
        assert response.status_code == 200 and response.mimetype == "image/svg+xml", path
        assert b"<svg" in response.data[:1000]
    assert_problem(client.get(f"{base}/1/netlist", headers={"Accept": "application/json"}), 406)


def test_bom_for_25_units(client, done):
    base = f"/v1/searches/{done['search']['id']}/candidates/1/bom"
    response = client.get(f"{base}?units=25")
    assert response.status_code == 200 and response.mimetype == "application/json"
    kit = response.get_json()
    assert kit["units"] == 25
    assert kit["lines"] and all(line["qty_total"] == 25 * line["qty_per_unit"] for line in kit["lines"])
    response = client.get(f"{base}?units=25", headers={"Accept": "text/csv"})
    assert response.status_code == 200 and response.mimetype == "text/csv"
    assert "attachment" in response.headers["Content-Disposition"]
    text = response.data.decode()
    assert text.startswith("# stagefit BOM: spec ") and f"# basis: {kit['basis']}" in text.splitlines()
    rows = list(csv.DictReader(line for line in io.StringIO(text) if not line.startswith("#")))
    assert len(rows) == len(kit["lines"]) and {"designators", "part_id", "qty_total"} <= set(rows[0])
    for units in ("0", "-3", "many", "100001"):
        problem = assert_problem(client.get(f"{base}?units={units}"), 400)
        assert problem["errors"][0]["field"] == "query.units"


def test_front(client, done):
    response = client.get(f"/v1/searches/{done['search']['id']}/front")
    assert response.status_code == 200 and response.mimetype == "application/json"
    body = response.get_json()
    assert [o["metric"] for o in body["objectives"]] == ["supply_current", "swing_vpp"]
    # a search that does find designs meeting its spec (the bench preamp at this budget): its front is
    # not empty, every point met the spec, and no point dominates another (dominance written out here)
    spec = yaml.safe_load((ROOT / "specs" / "bench_stock_preamp.yaml").read_text())
    spec["search"] = {"trials": TRIALS, "seed": 3, "batch_size": 32}
    posted = client.post("/v1/searches?wait=120", json=spec)
    assert posted.status_code == 200, posted.data
    body = client.get(f"/v1/searches/{posted.get_json()['search']['id']}/front").get_json()
    sense = [1.0 if o["direction"] == "minimise" else -1.0 for o in body["objectives"]]
    points = [[s * v for s, v in zip(sense, c["objectives"])] for c in body["front"]]  # all minimised

    def dominates(a: list[float], b: list[float]) -> bool:
        return all(x <= y for x, y in zip(a, b)) and any(x < y for x, y in zip(a, b))

    assert points and all(c["feasible"] for c in body["front"])
    assert not any(dominates(a, b) for a in points for b in points)


def test_cancel_keeps_finished_trials_and_purge_deletes(tmp_path):
    app = create_app({"STAGEFIT_DATA_DIR": str(tmp_path), "STAGEFIT_MAX_TRIALS": "300"})
    client = app.test_client()
    try:
        created = client.post("/v1/searches", json=pickup_spec(trials=300, batch_size=16))
        assert created.status_code == 202
        url = created.headers["Location"]
        wait_until(lambda: client.get(url).get_json()["trials_done"] >= 16)
        response = client.delete(url)
        assert response.status_code == 200 and response.mimetype == "application/json"
        assert response.get_json()["status"] == "cancelled"
        jobs = app.extensions["stagefit"].jobs
        wait_until(lambda: not jobs.active(created.get_json()["id"]))
        status = client.get(url).get_json()
        assert status["status"] == "cancelled"
        assert 16 <= status["trials_done"] < 300  # stopped within a batch, finished trials kept
        assert client.delete(url).get_json()["status"] == "cancelled"  # idempotent
        assert client.get(f"{url}/candidates?top=3").status_code == 200  # the record stays readable
        gone = client.delete(f"{url}?purge=true")
        assert gone.status_code == 204 and gone.data == b""
        assert_problem(client.get(url), 404)
        assert_problem(client.delete(url), 404)
    finally:
        stop(app)


def test_pool_resumes_stored_searches_on_start(tmp_path):
    settings = {"STAGEFIT_DATA_DIR": str(tmp_path)}
    queued = create_app({**settings, "STAGEFIT_QUEUE_ONLY": "1"})
    search_id = queued.test_client().post("/v1/searches", json=pickup_spec(trials=64)).get_json()["id"]
    app = create_app(settings)  # a new server on the same storage picks the search up
    try:
        client = app.test_client()
        wait_until(lambda: client.get(f"/v1/searches/{search_id}").get_json()["status"] == "done")
        assert client.get(f"/v1/searches/{search_id}").get_json()["trials_done"] == 64
    finally:
        stop(app)


def test_trials_left_running_by_a_dead_process_are_asked_again(tmp_path):
    """A trial asked and never told (its process was killed) would hold the budget forever."""
    from optimizer.search import create_search, run_search
    from optimizer.storage import open_storage

    storage = open_storage(str(tmp_path / "s.journal"))
    search_id = create_search(parse_spec(pickup_spec(trials=64)), storage)
    run_search(storage, search_id, max_batches=1)
    study = optuna.load_study(study_name=search_id, storage=storage)
    orphan = study.ask()  # as a killed process leaves it: RUNNING, never told
    app = create_app({"STAGEFIT_STORAGE": str(tmp_path / "s.journal"), "STAGEFIT_STALE_AFTER": "0"})
    try:
        client = app.test_client()
        wait_until(lambda: client.get(f"/v1/searches/{search_id}").get_json()["status"] == "done")
        status = client.get(f"/v1/searches/{search_id}").get_json()
        assert status["trials_done"] == 64 and status["trials_running"] == 0
        states = {t.number: t.state for t in study.get_trials()}
        assert states[orphan.number] == optuna.trial.TrialState.FAIL
    finally:
        stop(app)


# --- settings and the catch-all -----------------------------------------------------------


@pytest.mark.parametrize(
    "key, value",
    [
        ("STAGEFIT_MAX_TRIALS", "lots"),
        ("STAGEFIT_WORKERS", "0"),
        ("STAGEFIT_MAX_BODY", "12"),
        ("STAGEFIT_QUEUE_ONLY", "perhaps"),
    ],
)
def test_bad_settings_name_the_variable(key, value):
    with pytest.raises(InputError) as error:
        Settings.load({key: value, "STAGEFIT_STORAGE": ":memory:"})
    assert error.value.problems[0].where == key


def test_unexpected_errors_are_logged_problems(tmp_path, caplog):
    app = create_app({"STAGEFIT_DATA_DIR": str(tmp_path), "STAGEFIT_QUEUE_ONLY": "1"})

    @app.get("/boom")
    def boom():
        raise ZeroDivisionError("internal-detail-42")

    with caplog.at_level(logging.ERROR, logger="api"):
        body = assert_problem(app.test_client().get("/boom"), 500)
    assert "internal-detail-42" not in json.dumps(body)  # no internals in the response
    assert any("ZeroDivisionError" in (r.exc_text or "") for r in caplog.records)


def test_json_out_is_strict(client, app):
    with app.test_request_context():
        assert json.loads(app.json.dumps({"a": float("nan"), "b": [float("inf"), 1.5]})) == {
            "a": None,
            "b": [None, 1.5],
        }


def test_openapi_document_is_a_fresh_copy():
    document = openapi_document()
    document["paths"].clear()
    assert openapi_document()["paths"]


def test_every_rank_of_a_stored_search_has_its_plots_bom_and_netlist(client):
    """Every ranked candidate, shortlisted (assessed in full) or not (the nominal tail), is a
    whole record: its plots, BOM and netlist all answer (rank 13 once answered 422)."""
    response = client.post("/v1/searches?wait=300", json=pickup_spec(trials=200))
    assert response.status_code == 200, response.data
    search_id = response.get_json()["search"]["id"]
    listed = client.get(f"/v1/searches/{search_id}/candidates?top=200").get_json()
    ranks = [c["rank"] for c in listed["candidates"]]
    assert ranks == list(range(1, len(ranks) + 1)) and len(ranks) > 13  # past the shortlist of 12
    for rank in ranks:
        base = f"/v1/searches/{search_id}/candidates/{rank}"
        for path in ("/response.svg", "/transfer.svg", "/bom", "/netlist"):
            answer = client.get(base + path)
            assert answer.status_code == 200, (rank, path, answer.data[:600])


def test_served_candidates_match_the_schema_generated_from_the_record_type(client, done):
    """The OpenAPI Candidate schema comes from optimizer.record.Candidate; every record the
    service serves (shortlisted and tail ranks, front points, the best in the status) fits it,
    checked by jsonschema (an independent JSON Schema 2020-12 validator)."""
    import jsonschema

    document = openapi_document()
    validator = jsonschema.Draft202012Validator({**document, "$ref": "#/components/schemas/Candidate"})
    search_id = done["search"]["id"]
    served = client.get(f"/v1/searches/{search_id}/candidates?top=1000").get_json()["candidates"]
    served += client.get(f"/v1/searches/{search_id}/front").get_json()["front"]
    served += [
        client.get(f"/v1/searches/{search_id}/candidates/{len(served) and 1}").get_json(),
        client.get(f"/v1/searches/{search_id}").get_json()["best"],
    ]
    assert len(served) > 4
    for record in served:
        errors = [e.message for e in validator.iter_errors(record)]
        assert not errors, (record.get("rank"), errors[:3])
    # and a record missing a required block does not fit
    assert list(validator.iter_errors({k: v for k, v in served[0].items() if k != "conditions"}))
