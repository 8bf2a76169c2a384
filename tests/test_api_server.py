"""REST service through a real server process (`stagefit serve` under waitress on a free
loopback port): HTTP round trips, the README's standard-library script, a restart after
SIGKILL mid-search, and a bounded property-based fuzz (schemathesis) against the OpenAPI
document (OpenAPI 3.1; zero 5xx and every response conforming to the document).
"""

from __future__ import annotations

import contextlib
import json
import os
import re
import signal
import subprocess
import sys
import time
import urllib.error
import urllib.request
from pathlib import Path

import optuna
import pytest
import yaml

ROOT = Path(__file__).resolve().parents[1]
STAGEFIT = [sys.executable, "-m", "optimizer.cli"]


@contextlib.contextmanager
def live_server(tmp_path: Path, storage: Path, *, env: dict[str, str] | None = None, name: str = "server"):
    """Start `stagefit serve --port 0`, yield (base URL, process); always killed at the end."""
    log = tmp_path / f"{name}.log"
    environment = {k: v for k, v in os.environ.items() if not k.startswith("STAGEFIT_")}
    environment.update(env or {})
    with open(log, "w") as out:
        proc = subprocess.Popen(
            [*STAGEFIT, "serve", "--host", "127.0.0.1", "--port", "0", "--storage", str(storage)],
            cwd=ROOT,
            env=environment,
            stdout=out,
            stderr=subprocess.STDOUT,
        )
    try:
        deadline = time.monotonic() + 60
        while True:
            found = re.search(r"serving on (http://127\.0\.0\.1:\d+)/", log.read_text())
            if found:
                break
            assert proc.poll() is None, f"server exited: {log.read_text()}"
            assert time.monotonic() < deadline, f"server did not start: {log.read_text()}"
            time.sleep(0.05)
        yield found.group(1), proc
    finally:
        if proc.poll() is None:
            proc.kill()
        proc.wait(30)


def http(
    method: str,
    url: str,
    body: bytes | None = None,
    *,
    content_type: str | None = None,
    accept: str = "application/json",
) -> tuple[int, dict, bytes]:
    request = urllib.request.Request(url, data=body, method=method, headers={"Accept": accept})
    if content_type:
        request.add_header("Content-Type", content_type)
    try:
        with urllib.request.urlopen(request, timeout=60) as response:
            return response.status, dict(response.headers), response.read()
    except urllib.error.HTTPError as error:
        return error.code, dict(error.headers), error.read()


def small_spec(trials: int, **search) -> dict:
    spec = yaml.safe_load((ROOT / "specs" / "contact_pickup_buffer.yaml").read_text())
    spec["search"] = {"trials": trials, "seed": 5, **search}
    return spec


def test_round_trip_through_a_real_server(tmp_path):
    with live_server(tmp_path, tmp_path / "s.journal") as (base, _):
        status, headers, body = http("GET", f"{base}/healthz")
        assert status == 200 and headers["Content-Type"].startswith("application/json")
        status, headers, body = http(
            "POST",
            f"{base}/v1/searches?wait=120",
            yaml.safe_dump(small_spec(64)).encode(),
            content_type="application/yaml",
        )
        assert status == 200, body
        result = json.loads(body)
        assert result["search"]["status"] == "done" and result["search"]["trials_done"] == 64
        url = f"{base}{result['search']['url']}"
        status, headers, body = http("GET", f"{url}/candidates?top=3", accept="text/csv")
        assert status == 200 and headers["Content-Type"].startswith("text/csv")
        assert body.decode().splitlines()[0].startswith("rank,")
        status, headers, body = http("GET", f"{url}/candidates/1/bom?units=25", accept="text/csv")
        header = next(line for line in body.decode().splitlines() if not line.startswith("#"))
        assert status == 200 and "part_id" in header
        status, headers, body = http("POST", f"{base}/v1/searches", b"{oops", content_type="application/json")
        assert status == 400 and headers["Content-Type"] == "application/problem+json"
        status, headers, body = http("POST", f"{base}/v1/searches", b"x" * 300_000, content_type="application/json")
        assert status == 413 and headers["Content-Type"] == "application/problem+json"
        status, headers, body = http("DELETE", f"{base}/healthz")
        assert status == 405 and "GET" in headers["Allow"]


def readme_script() -> str:
    text = (ROOT / "README.md").read_text()
    section = text[text.index("## REST service") :]
    section = section[: section.index("\n## ", 1)] if "\n## " in section[1:] else section
    return re.search(r"```python\n(.*?)```", section, re.S).group(1)


def test_readme_script_posts_polls_and_saves_the_bom(tmp_path):
    """The README's standard-library client, run as a user would, against a live server."""
    script = tmp_path / "kit.py"
    script.write_text(readme_script())
    assert not re.search(r"^\s*(import|from)\s+(requests|httpx|yaml|optimizer|api)\b", script.read_text(), re.M)
    spec = tmp_path / "spec.yaml"
    spec.write_text(yaml.safe_dump(small_spec(64)))
    out = tmp_path / "bom.csv"
    with live_server(tmp_path, tmp_path / "s.journal") as (base, _):
        done = subprocess.run(
            [sys.executable, "-I", str(script), base, str(spec), str(out)],
            cwd=tmp_path,
            capture_output=True,
            text=True,
            timeout=180,
        )
    assert done.returncode == 0, done.stderr
    lines = [line for line in out.read_text().splitlines() if not line.startswith("#")]  # identity, cautions
    assert lines[0].startswith("designators,kind,roles,part_id,value")
    assert len(lines) > 1 and all(",25," in line for line in lines[1:])  # qty_total for 25 units of one-per-unit parts


def _finished(storage_path: Path, search_id: str) -> dict[int, tuple]:
    storage = optuna.storages.journal.JournalStorage(  # read afresh, not through a process cache
        optuna.storages.journal.JournalFileBackend(str(storage_path))
    )
    study = optuna.load_study(study_name=search_id, storage=storage)
    return {
        t.number: (tuple(t.values), tuple(sorted(t.params.items())))
        for t in study.get_trials(states=(optuna.trial.TrialState.COMPLETE,))
    }


def test_restart_after_sigkill_resumes_and_keeps_finished_trials(tmp_path):
    storage = tmp_path / "s.journal"
    env = {"STAGEFIT_STALE_AFTER": "0"}
    with live_server(tmp_path, storage, env=env, name="first") as (base, proc):
        status, headers, body = http(
            "POST",
            f"{base}/v1/searches",
            json.dumps(small_spec(300, batch_size=16)).encode(),
            content_type="application/json",
        )
        assert status == 202
        url = base + headers["Location"]
        deadline = time.monotonic() + 120
        while json.loads(http("GET", url)[2])["trials_done"] < 48:
            assert time.monotonic() < deadline
            time.sleep(0.02)
        proc.send_signal(signal.SIGKILL)  # no clean-up at all, mid-search
        proc.wait(30)
    search_id = headers["Location"].rsplit("/", 1)[1]
    before = _finished(storage, search_id)
    assert 48 <= len(before) < 300
    with live_server(tmp_path, storage, env=env, name="second") as (base, _):
        deadline = time.monotonic() + 180
        while (state := json.loads(http("GET", f"{base}/v1/searches/{search_id}")[2]))["status"] != "done":
            assert state["status"] == "running" and time.monotonic() < deadline, state
            time.sleep(0.2)
        assert state["trials_done"] >= 300 and state["trials_running"] == 0
    after = _finished(storage, search_id)
    assert all(after.get(number) == record for number, record in before.items())  # nothing lost or changed


# --- property-based fuzz against the OpenAPI document ------------------------------------

schemathesis = pytest.importorskip("schemathesis")
from hypothesis import HealthCheck, Phase, settings  # noqa: E402  (after the importorskip)

from api.openapi import openapi_document  # noqa: E402

SCHEMA = schemathesis.openapi.from_dict(openapi_document())
CHECKS = [
    schemathesis.checks.not_a_server_error,
    schemathesis.checks.status_code_conformance,
    schemathesis.checks.content_type_conformance,
    schemathesis.checks.response_schema_conformance,
    schemathesis.checks.response_headers_conformance,
    schemathesis.checks.negative_data_rejection,
]


FUZZ_EXAMPLES = int(os.environ.get("STAGEFIT_FUZZ_EXAMPLES", "80"))  # per operation; `make fuzz` raises it
CASES = {"stateless": 0, "stateful": 0}


@pytest.fixture(scope="module")
def fuzz_server(tmp_path_factory):
    """A server with small limits: valid fuzzed posts are run (32 trials at most, 8 queued at
    once, so the queue's 429 is exercised too)."""
    tmp = tmp_path_factory.mktemp("fuzz")
    env = {"STAGEFIT_MAX_WAIT": "0.2", "STAGEFIT_MAX_TRIALS": "32", "STAGEFIT_MAX_QUEUE": "8"}
    with live_server(tmp, tmp / "s.journal", env=env) as (base, _):
        yield base


@SCHEMA.parametrize()
@settings(
    max_examples=FUZZ_EXAMPLES,
    deadline=None,
    phases=[Phase.explicit, Phase.generate],
    suppress_health_check=list(HealthCheck),
    derandomize=True,
)
def test_fuzz_against_the_openapi_document(case, fuzz_server):
    CASES["stateless"] += 1
    case.call_and_validate(base_url=fuzz_server, checks=CHECKS, timeout=30)


def test_fuzz_stateful_create_poll_candidates_delete(fuzz_server):
    """Sequences of calls along the document's links (create -> poll -> candidates / front /
    a candidate's BOM, netlist and plot -> cancel or delete), every response checked."""

    class Workflow(SCHEMA.as_state_machine()):
        def get_call_kwargs(self, case):
            return {"base_url": fuzz_server, "timeout": 30}

        def validate_response(self, response, case, additional_checks=None, **kwargs):
            CASES["stateful"] += 1
            case.validate_response(response, checks=CHECKS)

    Workflow.run(
        settings=settings(
            max_examples=max(FUZZ_EXAMPLES // 2, 10),
            stateful_step_count=8,
            deadline=None,
            suppress_health_check=list(HealthCheck),
            derandomize=True,
        )
    )
    assert CASES["stateful"] > 0


def test_fuzz_ran_enough_cases():
    """At least 2,000 generated requests between the two runs (unless only some ran)."""
    if not CASES["stateless"] or not CASES["stateful"]:
        pytest.skip("only part of the fuzz ran")
    print(f"fuzz: {CASES['stateless']} stateless + {CASES['stateful']} stateful cases, no 5xx, no schema violation")
    assert CASES["stateless"] + CASES["stateful"] >= 2000 * min(FUZZ_EXAMPLES, 80) // 80
