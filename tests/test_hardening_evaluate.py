"""Regression tests for the second round of probing the CLI and the service (a fuzz of bad
specs, options and requests): each is named for what it guards and failed on the code before
the fix. A wrong kind of transistor, an absurd part value, a file that is not a journal, a
temperature that derates a rating to nothing, a host that is no address, a rank in full-width
digits: each is the user's input, answered with the field, the value and what is valid, never a
traceback, an HTTP 500 or a changed file.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import pytest
import yaml

from api import create_app
from optimizer.candidates import assess
from optimizer.catalog import load_catalog
from optimizer.cli import main
from optimizer.errors import InputError
from optimizer.spec import parse_spec

ROOT = Path(__file__).resolve().parents[1]
EXIT_BAD_INPUT = 2  # the documented exit code (README, `stagefit --help`)
PICKUP = ROOT / "specs" / "contact_pickup_buffer.yaml"
DIVIDER = {"r_top": 270e3, "r_bottom": 51e3, "r_collector": 11e3, "r_emitter": 1.3e3}


def _spec(**changes):
    return parse_spec({**yaml.safe_load(PICKUP.read_text()), **changes})


@pytest.fixture
def client(tmp_path):
    app = create_app({"STAGEFIT_DATA_DIR": str(tmp_path), "STAGEFIT_QUEUE_ONLY": "1"})
    yield app.test_client()
    app.extensions["stagefit"].jobs.stop()


def test_a_transistor_of_the_wrong_kind_is_named_with_the_ones_that_build_the_stage() -> None:
    spec, catalog = _spec(), load_catalog("bench_stock")
    with pytest.raises(InputError) as err:
        assess(spec, catalog, "divider_ce", DIVIDER, "SF-J1")  # a JFET for a bipolar stage
    assert err.value.problems[0].where == "device" and "npn-general" in str(err.value)
    # no device given: the first of the spec's that builds the stage; none of them does: named
    with pytest.raises(InputError, match="one that builds jfet_follower"):
        assess(
            _spec(devices=["npn-general"]),
            catalog,
            "jfet_follower",
            {"r_gate": 1e6, "r_source": 1e3, "r_follower": 10e3},
        )


def test_evaluate_with_a_jfet_for_a_bipolar_stage_is_a_422_not_a_500(client) -> None:
    parts = {k: str(v) for k, v in DIVIDER.items()}
    body = {"spec": yaml.safe_load(PICKUP.read_text()), "topology": "divider_ce", "device": "SF-J1", "parts": parts}
    response = client.post("/v1/evaluate", json=body)
    assert response.status_code == 422, response.data[:300]
    assert response.json["errors"][0]["field"] == "device"


def test_an_optional_resistor_may_be_left_out_of_an_evaluation() -> None:
    record = assess(_spec(), load_catalog("bench_stock"), "feedback_ce", {"r_feedback": 220e3, "r_collector": 10e3})
    assert record["parts"]["r_emitter"]["value"] == 0.0 and record["metrics"]["gain"] < 0


@pytest.mark.parametrize("role, value", [("r_emitter", 1e300), ("r_emitter", 1e-300), ("c_in", 1e-30), ("c_in", 1e6)])
def test_a_part_value_no_design_takes_is_refused(role: str, value: float) -> None:
    with pytest.raises(InputError) as err:
        assess(_spec(), load_catalog("bench_stock"), "divider_ce", {**DIVIDER, role: value})
    assert err.value.problems[0].where == f"--set {role}" and "a value from" in str(err.value)


def test_a_file_that_is_not_a_journal_is_refused_as_storage_and_left_as_it_is(tmp_path, capsys) -> None:
    notes = tmp_path / "notes.yaml"
    notes.write_text(PICKUP.read_text())
    before = hashlib.sha256(notes.read_bytes()).hexdigest()
    assert main(["search", str(PICKUP), "--trials", "50", "--storage", str(notes)]) == EXIT_BAD_INPUT
    assert "storage: got" in capsys.readouterr().err
    assert main(["storage", "repair", str(notes)]) == EXIT_BAD_INPUT
    assert hashlib.sha256(notes.read_bytes()).hexdigest() == before
    assert [p.name for p in tmp_path.iterdir()] == ["notes.yaml"]  # no backup, no lock, no claim file


def test_an_empty_file_still_starts_a_journal(tmp_path) -> None:
    from optimizer.storage import open_storage

    empty = tmp_path / "fresh.journal"
    empty.touch()
    open_storage(empty)  # no error: a new journal


def test_a_rating_derated_to_nothing_says_so_without_a_numpy_warning(tmp_path, capsys, recwarn) -> None:
    spec = yaml.safe_load(PICKUP.read_text())
    spec.update(temperature=[-55, 150], search={"trials": 60, "seed": 1})
    path = tmp_path / "hot.yaml"
    path.write_text(yaml.safe_dump(spec))
    main(["search", str(path), "--storage", str(tmp_path / "s.journal")])
    out = capsys.readouterr().out
    assert "inf%" not in out
    assert "derated to nothing at the spec's highest ambient, 150 °C" in out
    assert not [w for w in recwarn if issubclass(w.category, RuntimeWarning)]


def test_serve_on_a_host_that_is_no_address_is_bad_input(capsys) -> None:
    assert main(["serve", "--host", "not a host!", "--port", "0"]) == EXIT_BAD_INPUT
    assert "--host: got 'not a host!'" in capsys.readouterr().err


def test_a_rank_in_full_width_digits_is_no_route(client) -> None:
    # no route takes it (an ASCII rank reaches the search's own 404: no such search)
    wide = client.get("/v1/searches/s-x/candidates/%EF%BC%91")
    assert wide.status_code == 404 and not wide.json["type"].endswith("unknown-search")
    assert client.get("/v1/searches/s-x/candidates/1").json["type"].endswith("unknown-search")


@pytest.mark.parametrize(
    "argv, where", [(["--decade", "1e300"], "--decade"), (["--decade", "1k", "--upto", "10"], "--upto")]
)
def test_series_bounds_name_the_option(argv: list[str], where: str, capsys) -> None:
    assert main(["series", "E24", *argv]) == EXIT_BAD_INPUT
    assert f"{where}: got" in capsys.readouterr().err
