"""Regression tests for the faults found by probing the service and the CLI (F1-F8): each is
named for what it guards and failed on the code before the fix.

External references: RFC 9457 (problem details as application/problem+json), RFC 9110
(413, 429 with Retry-After), RFC 8259 (JSON: numbers are ASCII digits), YAML 1.1 aliases
(the "billion laughs" expansion is common practice in fuzzing parsers), Unicode (a lone
UTF-16 surrogate is not a character and cannot be encoded as UTF-8).
"""

from __future__ import annotations

import importlib
import json
import logging
import threading
from pathlib import Path

import optuna
import pytest
import yaml

from api import create_app
from optimizer.cli import main
from optimizer.errors import InputError
from optimizer.spec import load_spec, parse_spec, spec_to_dict

ROOT = Path(__file__).resolve().parents[1]
PROBLEM = "application/problem+json"
# the documented exit codes (README, `stagefit --help`): a contract, so written out here
EXIT_OK, EXIT_BAD_INPUT, EXIT_INFEASIBLE, EXIT_ENVIRONMENT = 0, 2, 3, 4


def pickup(trials: int = 24, **changes) -> dict:
    spec = yaml.safe_load((ROOT / "specs" / "contact_pickup_buffer.yaml").read_text())
    spec["search"] = {"trials": trials, "seed": 1, "batch_size": 8}
    spec.update(changes)
    return spec


def problem(response, status: int) -> dict:
    assert response.status_code == status, response.data[:400]
    assert response.mimetype == PROBLEM
    return json.loads(response.data)


@pytest.fixture
def app(tmp_path):
    made = []

    def build(**config):
        settings = {"STAGEFIT_DATA_DIR": str(tmp_path), **{k: str(v) for k, v in config.items()}}
        made.append(create_app(settings))
        return made[-1]

    yield build
    for one in made:
        one.extensions["stagefit"].jobs.stop()


def bomb(levels: int) -> str:
    """A YAML alias bomb: ``levels`` anchors, each a list of nine aliases of the one before
    (9**levels leaves from a few hundred bytes)."""
    lines = ["l0: &l0 [lol, lol, lol, lol, lol, lol, lol, lol, lol]"]
    lines += [f"l{i}: &l{i} [{', '.join([f'*l{i - 1}'] * 9)}]" for i in range(1, levels + 1)]
    return "\n".join(lines) + "\n"


# --- F1: a torn journal line ---------------------------------------------------------------


def _journal_with_trials(path: Path, trials: int) -> None:
    from optimizer.storage import open_storage

    study = optuna.create_study(study_name="s", storage=open_storage(path))
    study.optimize(lambda t: t.suggest_float("x", 0, 1), n_trials=trials)


def _fresh_trials(path: Path) -> list[optuna.trial.FrozenTrial]:
    from optimizer import storage

    storage._cache.clear()  # replay the file as a new process would
    return optuna.load_study(study_name="s", storage=storage.open_storage(path)).trials


def test_torn_journal_line_is_skipped_with_its_offset_and_later_records_stay_readable(tmp_path, caplog):
    path = tmp_path / "s.journal"
    _journal_with_trials(path, 4)
    data = path.read_bytes()
    torn_at = len(data) - 25
    path.write_bytes(data[:torn_at])  # a crash mid-write: the last record torn
    before = [t.params for t in _fresh_trials(path) if t.state.is_finished()]
    from optimizer.storage import open_storage

    study = optuna.load_study(study_name="s", storage=open_storage(path))
    study.optimize(lambda t: t.suggest_float("x", 0, 1), n_trials=3)  # written after the torn line
    caplog.set_level(logging.WARNING, logger="stagefit.storage")
    after = _fresh_trials(path)
    finished = [t.params for t in after if t.state == optuna.trial.TrialState.COMPLETE]
    assert finished[: len(before)] == before and len(finished) == len(before) + 3
    offset = data.rfind(b"\n", 0, torn_at) + 1
    assert any(f"byte offset {offset}" in r.getMessage() for r in caplog.records)


def test_service_keeps_serving_a_journal_with_a_damaged_line(app, tmp_path):
    path = tmp_path / "stagefit.journal"
    first = app(STAGEFIT_STORAGE=path, STAGEFIT_QUEUE_ONLY=1).test_client()
    search_id = first.post("/v1/searches", json=pickup()).get_json()["id"]
    lines = path.read_bytes().splitlines(keepends=True)
    lines.insert(len(lines) // 2, b'{"op_code": 7, "study_id": 0, "us\n')  # a damaged record mid-file
    path.write_bytes(b"".join(lines))
    from optimizer import storage

    storage._cache.clear()
    client = app(STAGEFIT_STORAGE=path, STAGEFIT_QUEUE_ONLY=1).test_client()
    assert client.get("/v1/searches").status_code == 200
    assert client.get(f"/v1/searches/{search_id}").get_json()["status"] == "queued"
    assert client.get("/healthz").status_code == 200


def test_storage_check_and_repair_report_the_offset_and_keep_a_backup(tmp_path, capsys):
    path = tmp_path / "s.journal"
    _journal_with_trials(path, 3)
    good = path.read_bytes()
    path.write_bytes(good + b'{"op_code": 5, "wor\n' + good.splitlines(keepends=True)[-1])
    assert main(["storage", "check", str(path)]) == EXIT_ENVIRONMENT
    assert f"byte offset {len(good)}" in capsys.readouterr().out
    assert main(["storage", "repair", str(path)]) == EXIT_OK
    backups = list(tmp_path.glob("s.journal.bak-*"))
    assert len(backups) == 1 and backups[0].read_bytes().startswith(good)
    assert main(["storage", "check", str(path)]) == EXIT_OK
    assert len(_fresh_trials(path)) == 3


# --- F2: no half-made searches ---------------------------------------------------------------


def test_default_thd_level_is_judged_against_a_low_supply():
    data = pickup(supply="0.5 V")
    data.pop("limits")
    spec = parse_spec(data)
    assert spec.limits.thd_level <= spec.supply / 2
    assert parse_spec(json.loads(json.dumps(spec_to_dict(spec)))) == spec  # what is stored reads back


def test_low_supply_post_leaves_no_stuck_or_undeletable_search(app):
    data = pickup(supply="0.5 V")
    data.pop("limits")
    client = app(STAGEFIT_QUEUE_ONLY=1).test_client()
    response = client.post("/v1/searches", json=data)
    assert response.status_code in (202, 422), response.data
    for search in client.get("/v1/searches").get_json()["searches"]:
        assert client.get(search["url"]).status_code == 200
        assert client.delete(search["url"]).status_code == 200
        assert client.delete(search["url"] + "?purge=true").status_code == 204
    assert client.get("/v1/searches").get_json()["total"] == 0


def _plant(storage, name: str, attrs: dict) -> None:
    study = optuna.create_study(study_name=name, storage=storage)
    for key, value in attrs.items():
        study.set_user_attr(key, value)


def test_unreadable_or_half_made_search_is_failed_with_its_reason_and_deletable(app):
    client_app = app(STAGEFIT_QUEUE_ONLY=1)
    storage = client_app.extensions["stagefit"].storage
    _plant(
        storage,
        "bad-spec",
        {
            "spec": {"name": "x", "supply": "lots"},
            "budget": 10,
            "status": "queued",
            "created": "2026-01-01T00:00:00+00:00",
        },
    )
    _plant(storage, "half-made", {"spec": pickup(), "budget": 10})  # creation cut short: no status
    client = client_app.test_client()
    listed = {s["id"]: s["status"] for s in client.get("/v1/searches").get_json()["searches"]}
    assert listed == {"bad-spec": "queued", "half-made": "failed"}
    for name in listed:
        status = client.get(f"/v1/searches/{name}").get_json()
        assert status["status"] == "failed" and status["reason"], status
        assert client.delete(f"/v1/searches/{name}").status_code == 200
        assert client.delete(f"/v1/searches/{name}?purge=true").status_code == 204
    assert client.get("/v1/searches").get_json()["total"] == 0


def test_a_search_that_cannot_run_is_stored_failed_with_its_reason(tmp_path):
    from optimizer.search import list_searches, search_status
    from optimizer.storage import open_storage
    from optimizer.worker import work_once

    storage = open_storage(tmp_path / "s.journal")
    _plant(
        storage,
        "cannot-run",
        {
            "spec": {"name": "x", "supply": "lots"},
            "budget": 10,
            "status": "queued",
            "created": "2026-01-01T00:00:00+00:00",
        },
    )
    work_once(storage, should_stop=lambda: False)
    assert [s["status"] for s in list_searches(storage)] == ["failed"]
    assert "cannot run" in search_status(storage, "cannot-run")["reason"]


# --- F3: ?wait= must not take every request thread ------------------------------------------


def test_waiters_are_capped_below_the_request_threads(app):
    client_app = app(STAGEFIT_QUEUE_ONLY=1, STAGEFIT_THREADS=4, STAGEFIT_MAX_WAIT=30)
    assert client_app.extensions["stagefit"].settings.max_waiters == 2
    pool = client_app.extensions["stagefit"].jobs
    answers: list[int] = []

    def post() -> None:
        answers.append(client_app.test_client().post("/v1/searches?wait=30", json=pickup()).status_code)

    waiting = [threading.Thread(target=post) for _ in range(2)]
    for thread in waiting:
        thread.start()
    deadline = threading.Event()
    while pool._waiters._value and not deadline.wait(0.05):  # both waiters parked
        pass
    third = threading.Thread(target=post)
    third.start()
    third.join(10)  # the cap answers at once (202) instead of parking a third request thread
    assert not third.is_alive() and answers == [202]
    client = client_app.test_client()
    for search in client.get("/v1/searches").get_json()["searches"]:
        client.delete(search["url"])  # a cancel wakes the parked waiters
    for thread in waiting:
        thread.join(10)
        assert not thread.is_alive()
    assert answers == [202, 202, 202]


# --- F4: one safe loader on both doors -------------------------------------------------------


def test_cli_refuses_a_yaml_alias_bomb_like_the_service(app, tmp_path, capsys):
    path = tmp_path / "bomb.yaml"
    path.write_text(bomb(6))  # 531,441 leaves from 300 bytes
    assert main(["check", str(path)]) == EXIT_BAD_INPUT
    err = capsys.readouterr().err
    assert "alias" in err and len(err.strip().splitlines()) == 1, err
    body = problem(
        app(STAGEFIT_QUEUE_ONLY=1).test_client().post("/v1/searches", data=bomb(6), content_type="application/yaml"),
        400,
    )
    assert "alias" in body["detail"]


def test_a_few_yaml_anchors_are_still_read(tmp_path):
    path = tmp_path / "spec.yaml"
    text = (ROOT / "specs" / "contact_pickup_buffer.yaml").read_text()
    path.write_text(text.replace("band: [30 Hz, 15 kHz]", "band: &band [30 Hz, 15 kHz]\nlimits_note: *band"))
    with pytest.raises(InputError) as error:  # the alias is read; the unknown key is what is wrong
        load_spec(path)
    assert [p.where for p in error.value.problems] == ["limits_note"]


# --- F5: hostile JSON gets a 4xx, never a 500 --------------------------------------------------


def test_deep_json_nesting_is_a_400_not_a_500(app):
    client = app(STAGEFIT_QUEUE_ONLY=1).test_client()
    problem(client.post("/v1/searches", data="[" * 60_000 + "]" * 60_000, content_type="application/json"), 400)
    deep = pickup()
    node = deep
    for _ in range(40):
        node["description"] = {}
        node = node["description"]
    problem(client.post("/v1/searches", json=deep), 400)


def test_huge_integer_is_a_422_not_a_500(app):
    client = app(STAGEFIT_QUEUE_ONLY=1).test_client()
    body = problem(
        client.post(
            "/v1/searches", data=json.dumps(pickup()).replace('"9 V"', "1" + "0" * 400), content_type="application/json"
        ),
        422,
    )
    assert body["errors"][0]["field"] == "supply" and len(body["detail"]) < 400


def test_lone_surrogate_is_a_400_not_a_500(app):
    client = app(STAGEFIT_QUEUE_ONLY=1).test_client()
    text = json.dumps(pickup()).replace('"contact_pickup_buffer"', '"pickup \\ud800"')
    body = problem(client.post("/v1/searches", data=text, content_type="application/json"), 400)
    assert "surrogate" in body["detail"]


@pytest.mark.parametrize("device", [["npn-general"], {"id": "npn-general"}, 7])
def test_unhashable_or_odd_device_is_a_422_not_a_500(app, device):
    client = app(STAGEFIT_QUEUE_ONLY=1).test_client()
    body = problem(
        client.post(
            "/v1/evaluate",
            json={
                "spec": pickup(),
                "topology": "divider_ce",
                "device": device,
                "parts": {"r_top": "1M", "r_bottom": "330k", "r_collector": "10k", "r_emitter": "2k2"},
            },
        ),
        422,
    )
    assert [e["field"] for e in body["errors"]] == ["device"]


@pytest.mark.parametrize("value", ["²", "٣", "３", "1_0"])
def test_unicode_digits_in_a_query_are_a_400_not_a_500(app, value):
    client = app(STAGEFIT_QUEUE_ONLY=1).test_client()
    body = problem(client.get(f"/v1/searches/s-x/candidates/1/bom?units={value}"), 400)
    assert body["errors"][0]["field"] == "query.units"
    problem(client.get(f"/v1/searches?limit={value}"), 400)
    problem(client.post(f"/v1/searches?wait={value}", json=pickup()), 400)


def test_nan_in_a_response_plot_is_a_422_not_a_500(app, monkeypatch):
    import numpy as np

    from optimizer.topologies import TOPOLOGIES

    client = app().test_client()
    done = client.post("/v1/searches?wait=120", json=pickup(trials=16))
    assert done.status_code == 200, done.data[:300]
    search_id = done.get_json()["search"]["id"]
    for topology in TOPOLOGIES.values():
        monkeypatch.setattr(
            type(topology),
            "frequency_response",
            lambda self, parts, device, conditions, freqs: np.full((1, len(freqs)), np.nan + 0j),
        )
    problem(client.get(f"/v1/searches/{search_id}/candidates/1/response.svg"), 422)


# --- F6: CLI exit codes and bounded options ---------------------------------------------------


@pytest.mark.parametrize("option", [["--top", "0"], ["--top", "-5"], ["--top", "٣"], ["--trials", "0"]])
def test_cli_search_options_are_bounded(tmp_path, capsys, option):
    assert (
        main(
            [
                "search",
                str(ROOT / "specs" / "contact_pickup_buffer.yaml"),
                "--storage",
                str(tmp_path / "s.journal"),
                *option,
            ]
        )
        == EXIT_BAD_INPUT
    )
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1 and option[0] in err


def test_cli_samples_are_bounded(capsys):
    assert (
        main(
            [
                "evaluate",
                str(ROOT / "specs" / "contact_pickup_buffer.yaml"),
                "--topology",
                "divider_ce",
                "--set",
                "r_top=1M",
                "--samples",
                str(10**8),
            ]
        )
        == EXIT_BAD_INPUT
    )
    assert "--samples" in capsys.readouterr().err


def test_cli_exit_code_4_for_a_storage_it_cannot_write(tmp_path, capsys):
    blocker = tmp_path / "file"
    blocker.write_text("not a directory")
    code = main(
        [
            "search",
            str(ROOT / "specs" / "contact_pickup_buffer.yaml"),
            "--trials",
            "8",
            "--storage",
            str(blocker / "s.journal"),
        ]
    )
    assert code == EXIT_ENVIRONMENT and "Traceback" not in capsys.readouterr().err


def test_cli_exit_code_3_for_an_infeasible_spec_with_ranked_misses(tmp_path, capsys):
    spec = pickup(trials=16)
    spec["limits"]["supply_current_max"] = "1 nA"  # no transistor stage biases on a nanoamp
    path = tmp_path / "impossible.yaml"
    path.write_text(yaml.safe_dump(spec))
    assert main(["search", str(path), "--storage", str(tmp_path / "s.journal"), "--top", "3"]) == EXIT_INFEASIBLE
    out = capsys.readouterr().out
    assert "no design meets every limit" in out and "misses" in out


# --- F7: bounded batch and queue; concurrent CLI runs share a search ---------------------------


def test_batch_size_is_bounded():
    with pytest.raises(InputError) as error:
        parse_spec(pickup(search={"batch_size": 100_000}))
    assert error.value.problems[0].where == "search.batch_size"


def test_job_queue_is_bounded_with_429_and_retry_after(app):
    client = app(STAGEFIT_QUEUE_ONLY=1, STAGEFIT_MAX_QUEUE=2).test_client()
    for _ in range(2):
        assert client.post("/v1/searches", json=pickup()).status_code == 202
    response = client.post("/v1/searches", json=pickup())
    problem(response, 429)
    assert int(response.headers["Retry-After"]) > 0
    assert client.get("/v1/searches").get_json()["total"] == 2


def test_a_cli_run_that_finds_its_search_just_created_joins_it(tmp_path, capsys, monkeypatch):
    search_module = importlib.import_module("optimizer.search")
    from optimizer.storage import open_storage

    path = tmp_path / "spec.yaml"
    path.write_text(yaml.safe_dump(pickup(trials=16)))
    storage = tmp_path / "s.journal"
    spec = search_module.with_search(load_spec(path))
    search_module.create_search(spec, open_storage(storage), search_id=search_module.spec_search_id(spec))
    monkeypatch.setattr(search_module, "list_searches", lambda storage: [])  # the other run created it meanwhile
    code = main(["search", str(path), "--storage", str(storage)])
    assert code in (EXIT_OK, EXIT_INFEASIBLE), capsys.readouterr().err
    assert "joining" in capsys.readouterr().err
    study = optuna.load_study(study_name=search_module.spec_search_id(spec), storage=open_storage(storage))
    assert len(study.get_trials(states=(optuna.trial.TrialState.COMPLETE,))) == 16


# --- F8: 413, double slashes, foreign digits, long names ------------------------------------


def test_double_slash_path_is_a_404_problem_not_a_redirect(app):
    client = app(STAGEFIT_QUEUE_ONLY=1).test_client()
    problem(client.get("/v1/searches//candidates"), 404)


def test_arabic_indic_digits_are_not_numbers(app):
    with pytest.raises(InputError) as error:
        parse_spec(pickup(supply="١٢ V"))
    assert error.value.problems[0].where == "supply"
    problem(app(STAGEFIT_QUEUE_ONLY=1).test_client().post("/v1/searches", json=pickup(supply="٩ V")), 422)


def test_long_search_name_is_refused(app):
    body = problem(app(STAGEFIT_QUEUE_ONLY=1).test_client().post("/v1/searches", json=pickup(name="n" * 200_000)), 422)
    assert body["errors"][0]["field"] == "name" and len(body["detail"]) < 500


def test_oversized_body_is_a_413_problem_from_the_app(app):
    client = app(STAGEFIT_QUEUE_ONLY=1, STAGEFIT_MAX_BODY=65536).test_client()
    problem(client.post("/v1/searches", data=b"{" + b" " * 100_000 + b"}", content_type="application/json"), 413)


def test_exit_codes_are_documented_in_the_help(capsys):
    assert main(["--help"]) == EXIT_OK
    out = capsys.readouterr().out
    assert "exit codes" in out and all(f"  {code} " in out for code in "01234")
