"""Faults and load through real processes, in bounded sizes for CI (the full runs, with
their figures, are benchmarks/bench_reliability.py -> benchmarks/results/reliability.md):
SIGKILL of the server and a worker during searches with one torn journal line, /healthz
while ?wait= posts would fill every request thread, waitress's own 413 as problem+json,
and a short load mix with no 5xx. No assertion here is on time.
"""

from __future__ import annotations

import importlib.util
import json
import socket
import threading
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
_spec = importlib.util.spec_from_file_location("bench_reliability", ROOT / "benchmarks" / "bench_reliability.py")
bench = importlib.util.module_from_spec(_spec)
_spec.loader.exec_module(bench)

PROBLEM = "application/problem+json"


def test_sigkills_and_a_torn_journal_line_lose_no_finished_trial(tmp_path):
    result = bench.chaos(tmp_path, kills=3, searches=2, trials=200, log=lambda *_: None)
    assert result["finished_seen"] > 0 and result["torn_bytes"] > 0
    assert result["lost"] == 0
    assert set(result["states"].values()) == {"done"}
    assert set(result["per_search"].values()) == {200}  # the budget exactly, nothing lost or doubled


def test_healthz_answers_while_wait_posts_would_fill_every_request_thread(tmp_path):
    server = bench.Server(tmp_path, {"STAGEFIT_QUEUE_ONLY": "1", "STAGEFIT_MAX_WAIT": "20"}, threads=4)
    try:
        answers: list[int] = []

        def post() -> None:
            client = bench.Client(server)
            answers.append(
                client.call("POST", "/v1/searches?wait=20", json.dumps(bench.small_spec(16)).encode(), bench.JSON)[0]
            )

        posts = [threading.Thread(target=post) for _ in range(8)]  # twice the request threads
        for thread in posts:
            thread.start()
        probe = bench.Client(server)
        probe.conn.timeout = 10  # waitress queues a request while every thread is held: it would time out
        for _ in range(5):
            assert probe.call("GET", "/healthz")[0] == 200
        for thread in posts:
            thread.join(60)
        assert answers.count(202) == 8
    finally:
        server.close()


def test_waitress_refuses_an_oversized_body_with_a_problem_document(tmp_path):
    server = bench.Server(tmp_path, {"STAGEFIT_QUEUE_ONLY": "1"}, threads=4)
    try:
        with socket.create_connection((server.host, server.port), timeout=30) as raw:
            raw.sendall(
                b"POST /v1/searches HTTP/1.1\r\nHost: x\r\nContent-Type: application/json\r\n"
                b"Content-Length: 20971520\r\n\r\n"
            )
            reply = b""
            while b"\r\n\r\n" not in reply or not reply.rstrip().endswith(b"}"):
                chunk = raw.recv(65536)
                if not chunk:
                    break
                reply += chunk
        head, _, body = reply.decode().partition("\r\n\r\n")
        assert head.split()[1] == "413" and f"content-type: {PROBLEM}" in head.lower()
        assert json.loads(body)["status"] == 413
    finally:
        server.close()


def test_a_short_load_mix_answers_no_5xx_and_every_health_check(tmp_path):
    rows = bench.load(tmp_path, clients=10, seconds=6, log=lambda *_: None)
    assert rows["GET /healthz (prober)"]["codes"] == {200: rows["GET /healthz (prober)"]["n"]}
    assert not [code for row in rows.values() for code in row["codes"] if code >= 500]
    assert rows["GET /v1/searches/{id}/candidates"]["codes"].get(200)
