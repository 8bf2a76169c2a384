"""REST service speed, through a real `stagefit serve` process on a loopback port.

    .venv/bin/python benchmarks/bench_api.py [--runs 3] [--clients 20] [--seconds 30]

Measures (issue 5's targets):
- ``POST /v1/searches?wait=`` for each example spec (specs/*.yaml, their own budgets):
  median time to the ranked list (target < 5 s);
- ``GET /v1/searches/{id}/candidates`` on a finished 5,000-trial search: median latency
  (target < 100 ms);
- 20 concurrent clients for 30 s mixing good and bad requests while a search runs: zero
  5xx, no lost trial (every search posted finishes with exactly its budget of finished
  trials and none failed), p50/p95/p99 latency.
Writes benchmarks/results/api.md.
"""

from __future__ import annotations

import argparse
import http.client
import json
import os
import platform
import random
import re
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from collections import Counter
from pathlib import Path

import optuna
import yaml

ROOT = Path(__file__).resolve().parent.parent
RESULTS = ROOT / "benchmarks" / "results" / "api.md"


class Server:
    """`stagefit serve --port 0` in a subprocess (killed on exit)."""

    def __init__(self, workdir: Path, env: dict[str, str], *, threads: int = 24, log: str = "server.log") -> None:
        self.storage = workdir / "bench.journal"
        self.log = workdir / log
        environment = {k: v for k, v in os.environ.items() if not k.startswith("STAGEFIT_")} | env
        with open(self.log, "w") as out:
            self.proc = subprocess.Popen(
                [
                    sys.executable,
                    "-m",
                    "optimizer.cli",
                    "serve",
                    "--port",
                    "0",
                    "--threads",
                    str(threads),
                    "--storage",
                    str(self.storage),
                ],
                cwd=ROOT,
                env=environment,
                stdout=out,
                stderr=subprocess.STDOUT,
            )
        deadline = time.monotonic() + 60
        while not (found := re.search(r"serving on http://([\d.]+):(\d+)/", self.log.read_text())):
            if self.proc.poll() is not None or time.monotonic() > deadline:
                raise SystemExit(f"server did not start:\n{self.log.read_text()}")
            time.sleep(0.05)
        self.host, self.port = found.group(1), int(found.group(2))

    def close(self) -> None:
        if self.proc.poll() is None:
            self.proc.kill()
        self.proc.wait(30)


class Client:
    """One keep-alive connection; ``call`` returns (status, body bytes, seconds)."""

    def __init__(self, server: Server) -> None:
        self.server = server
        self.conn = http.client.HTTPConnection(server.host, server.port, timeout=600)

    def call(self, method: str, path: str, body: bytes | None = None, headers: dict | None = None):
        start = time.perf_counter()
        for attempt in (0, 1):
            try:
                self.conn.request(method, path, body=body, headers=headers or {})
                response = self.conn.getresponse()
                data = response.read()
                break
            except (http.client.HTTPException, ConnectionError):
                self.conn.close()  # the server closed a kept-alive connection: reconnect once
                self.conn = http.client.HTTPConnection(self.server.host, self.server.port, timeout=600)
                if attempt:
                    raise
        return response.status, data, time.perf_counter() - start, dict(response.getheaders())


def post_spec(client: Client, spec: dict, wait: float = 0) -> tuple[int, dict, float]:
    status, data, seconds, _ = client.call(
        "POST", f"/v1/searches?wait={wait}", json.dumps(spec).encode(), {"Content-Type": "application/json"}
    )
    return status, json.loads(data), seconds


def example_specs() -> dict[str, dict]:
    return {p.stem: yaml.safe_load(p.read_text()) for p in sorted((ROOT / "specs").glob("*.yaml"))}


def bench_post_wait(server: Server, runs: int) -> list[dict]:
    client = Client(server)
    rows = []
    for name, spec in example_specs().items():
        times, budget = [], None
        for _ in range(runs):
            status, body, seconds = post_spec(client, spec, wait=600)
            if status != 200:
                raise SystemExit(f"{name}: POST ?wait= answered {status}: {body}")
            times.append(seconds)
            budget = body["search"]["budget"]
        rows.append({"spec": name, "budget": budget, "median": statistics.median(times), "max": max(times)})
        print(f"POST ?wait= {name:<24} {budget:>6} trials  median {rows[-1]['median']:.2f} s", flush=True)
    return rows


def bench_candidates(server: Server, search_id: str, repeats: int = 50) -> dict:
    client = Client(server)
    out = {}
    for label, headers in (("JSON", {"Accept": "application/json"}), ("CSV", {"Accept": "text/csv"})):
        first = client.call("GET", f"/v1/searches/{search_id}/candidates?top=20", headers=headers)[2]
        times = []
        for _ in range(repeats):
            status, _, seconds, _ = client.call("GET", f"/v1/searches/{search_id}/candidates?top=20", headers=headers)
            assert status == 200
            times.append(seconds)
        times.sort()
        out[label] = {"first": first, "median": statistics.median(times), "p95": times[int(0.95 * len(times)) - 1]}
        print(
            f"GET candidates ({label}) first {first * 1e3:.1f} ms, median {out[label]['median'] * 1e3:.1f} ms",
            flush=True,
        )
    return out


def load_mix(done_id: str, running_id: str, small: dict, big: dict) -> list[tuple[str, str, str, bytes | None, dict]]:
    """(label, method, path, body, headers): good and bad requests, each expected 2xx or 4xx."""
    js = {"Content-Type": "application/json"}
    base = f"/v1/searches/{done_id}"
    evaluate = json.dumps(
        {
            "spec": small,
            "topology": "divider_ce",
            "samples": 200,
            "parts": {"r_top": "270k", "r_bottom": "51k", "r_collector": "11k", "r_emitter": "1k3"},
        }
    ).encode()
    return [
        ("good", "GET", "/healthz", None, {}),
        ("good", "GET", base, None, {}),
        ("good", "GET", f"/v1/searches/{running_id}", None, {}),
        ("good", "GET", f"{base}/candidates?top=20", None, {}),
        ("good", "GET", f"{base}/candidates?top=50", None, {"Accept": "text/csv"}),
        ("good", "GET", f"{base}/candidates/1/bom?units=25", None, {"Accept": "text/csv"}),
        ("good", "GET", f"{base}/candidates/2/netlist", None, {}),
        ("good", "GET", f"{base}/front", None, {}),
        ("good", "GET", "/v1/searches?limit=20", None, {}),
        ("good", "GET", "/v1/topologies", None, {}),
        ("good", "POST", "/v1/evaluate", evaluate, js),
        ("bad", "POST", "/v1/searches", b'{"name": "x", "supply": ', js),
        ("bad", "POST", "/v1/searches", json.dumps(big).encode(), js),
        ("bad", "POST", "/v1/searches", b"name: x", {"Content-Type": "text/plain"}),
        ("bad", "POST", "/v1/evaluate", b"{" + b" " * 300_000 + b"}", js),
        ("bad", "GET", "/v1/searches/s-nothing-here", None, {}),
        ("bad", "GET", f"{base}/candidates/99999", None, {}),
        ("bad", "GET", f"{base}/candidates/1/bom?units=0", None, {}),
        ("bad", "GET", f"{base}/candidates", None, {"Accept": "image/png"}),
        ("bad", "PUT", "/v1/topologies", b"{}", js),
        ("bad", "GET", "/v1/catalogs/..%2F..%2Fetc", None, {}),
    ]


def bench_load(server: Server, done_id: str, clients: int, seconds: float) -> dict:
    spec = example_specs()["contact_pickup_buffer"]
    small = {**spec, "search": {"trials": 64, "seed": 1}}
    big = {**spec, "search": {"trials": 10_000_000}}
    control = Client(server)
    status, running, _ = post_spec(control, {**spec, "search": {"trials": 3000, "seed": 2}})
    assert status == 202, running
    mix = load_mix(done_id, running["id"], small, big)
    running_id_ = running["id"]
    records: list[tuple[str, int, float, str]] = []
    posted: list[str] = [running["id"]]
    lock = threading.Lock()
    stop_at = time.monotonic() + seconds

    def work(index: int) -> None:
        client = Client(server)
        rng = random.Random(index)
        count = 0
        while time.monotonic() < stop_at:
            count += 1
            if index < 2 and count % 15 == 0:  # two clients also post small searches
                status, body, took = post_spec(client, small)
                with lock:
                    records.append(("good", status, took, "POST /v1/searches (64 trials)"))
                    if status == 202:
                        posted.append(body["id"])
                continue
            label, method, path, body, headers = rng.choice(mix)
            status, _, took, _ = client.call(method, path, body, headers)
            kind = f"{method} {path.replace(done_id, '{done}').replace(running_id_, '{running}')}"
            if headers.get("Accept"):
                kind += f" ({headers['Accept']})"
            with lock:
                records.append((label, status, took, kind[:90]))

    threads = [threading.Thread(target=work, args=(i,)) for i in range(clients)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    # no lost trial: every search posted finishes with exactly its budget, nothing failed
    deadline = time.monotonic() + 900
    for search_id in posted:
        while (state := json.loads(control.call("GET", f"/v1/searches/{search_id}")[1]))["status"] != "done":
            if state["status"] in ("failed", "cancelled") or time.monotonic() > deadline:
                raise SystemExit(f"search {search_id} ended {state['status']}")
            time.sleep(0.5)
    storage = optuna.storages.journal.JournalStorage(optuna.storages.journal.JournalFileBackend(str(server.storage)))
    lost = 0
    for search_id in posted:
        study = optuna.load_study(study_name=search_id, storage=storage)
        states = Counter(t.state.name for t in study.get_trials())
        budget = study.user_attrs["budget"]
        lost += abs(states["COMPLETE"] - budget) + states["FAIL"] + states["RUNNING"]
    times = sorted(took for _, _, took, _ in records)

    def pct(q: float, values: list[float]) -> float:
        return values[min(len(values) - 1, int(q * len(values)))]

    by_label = {label: sorted(t for lab, _, t, _ in records if lab == label) for label in ("good", "bad")}
    kinds: dict[str, list[float]] = {}
    for _, _, took, kind in records:
        kinds.setdefault(kind, []).append(took)
    result = {
        "requests": len(records),
        "rate": len(records) / seconds,
        "statuses": dict(sorted(Counter(s for _, s, _, _ in records).items())),
        "server_errors": sum(1 for _, s, _, _ in records if s >= 500),
        "unexpected": sum(1 for lab, s, _, _ in records if (lab == "good") != (200 <= s < 300)),
        "kinds": {k: (len(v), statistics.median(v)) for k, v in sorted(kinds.items())},
        "p50": pct(0.5, times),
        "p95": pct(0.95, times),
        "p99": pct(0.99, times),
        "p95_good": pct(0.95, by_label["good"]),
        "p95_bad": pct(0.95, by_label["bad"]),
        "searches": len(posted),
        "lost_trials": lost,
    }
    print(
        f"load: {result['requests']} requests, statuses {result['statuses']}, 5xx {result['server_errors']}, "
        f"p95 {result['p95'] * 1e3:.0f} ms, searches {len(posted)}, lost trials {lost}",
        flush=True,
    )
    return result


def write(post_rows: list[dict], candidates: dict, load: dict, args: argparse.Namespace) -> None:
    overall = statistics.median(r["median"] for r in post_rows)
    lines = [
        "# REST service speed (`stagefit serve`, waitress, one search worker, loopback)",
        "",
        f"Machine: {platform.machine()}, {os.cpu_count()} cores, Python {platform.python_version()}. "
        "Produced by `benchmarks/bench_api.py`; the clients run on the same machine as the server.",
        "",
        f"## POST /v1/searches?wait= (each example spec {args.runs} times, its own trial budget)",
        "",
        "| spec | trials | median (s) | slowest (s) |",
        "| --- | --- | --- | --- |",
    ]
    lines += [f"| {r['spec']} | {r['budget']} | {r['median']:.2f} | {r['max']:.2f} |" for r in post_rows]
    lines += [
        "",
        f"Median over the specs: {overall:.2f} s (target < 5 s: {'met' if overall < 5 else 'not met'}).",
        "",
        "## GET /v1/searches/{id}/candidates?top=20 on a finished 5,000-trial search",
        "",
        "| format | first call (ms) | median (ms) | p95 (ms) |",
        "| --- | --- | --- | --- |",
    ]
    lines += [
        f"| {k} | {v['first'] * 1e3:.1f} | {v['median'] * 1e3:.1f} | {v['p95'] * 1e3:.1f} |"
        for k, v in candidates.items()
    ]
    met = candidates["JSON"]["median"] < 0.1
    lines += [
        "",
        f"Target < 100 ms median: {'met' if met else 'not met'}. The first call ranks the stored "
        "trials; a finished search's result is then kept in memory.",
        "",
        f"## {args.clients} concurrent clients for {args.seconds:g} s, good and bad requests mixed",
        "",
        "Good: status, candidates (JSON and CSV), BOM CSV, netlist, front, list, topologies, evaluate, "
        "and small searches posted by two clients while a 3,000-trial search runs. Bad: malformed JSON, "
        "a budget over the limit, a wrong content type, a body over the limit, unknown search and rank, "
        "units=0, an unacceptable Accept, a wrong method, a path-like catalog name.",
        "",
        "| what | value |",
        "| --- | --- |",
        f"| requests | {load['requests']} ({load['rate']:.0f}/s) |",
        f"| status codes | {', '.join(f'{k}: {v}' for k, v in load['statuses'].items())} |",
        f"| 5xx responses | {load['server_errors']} |",
        f"| responses of the wrong class (good not 2xx, bad not 4xx) | {load['unexpected']} |",
        f"| latency p50 / p95 / p99 (ms) | {load['p50'] * 1e3:.0f} / {load['p95'] * 1e3:.0f} / "
        f"{load['p99'] * 1e3:.0f} |",
        f"| p95 good / bad (ms) | {load['p95_good'] * 1e3:.0f} / {load['p95_bad'] * 1e3:.0f} |",
        f"| searches run during the load | {load['searches']} |",
        f"| lost trials (budget minus finished, plus failed or left running) | {load['lost_trials']} |",
        "",
        "Per request kind under the load:",
        "",
        "| request | count | median (ms) |",
        "| --- | --- | --- |",
    ]
    lines += [f"| `{k}` | {n} | {m * 1e3:.0f} |" for k, (n, m) in load["kinds"].items()]
    lines += [""]
    RESULTS.write_text("\n".join(lines))
    print(f"wrote {RESULTS.relative_to(ROOT)}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--runs", type=int, default=1, help="POST ?wait= runs per example spec")
    parser.add_argument("--clients", type=int, default=20)
    parser.add_argument("--seconds", type=float, default=30.0)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        server = Server(
            Path(tmp), {"STAGEFIT_MAX_TRIALS": "20000", "STAGEFIT_MAX_WAIT": "600", "STAGEFIT_MAX_BODY": "262144"}
        )
        try:
            post_rows = bench_post_wait(server, args.runs)
            spec = example_specs()["contact_pickup_buffer"]
            status, body, took = post_spec(Client(server), {**spec, "search": {"trials": 5000, "seed": 4}}, wait=600)
            assert status == 200, body
            print(f"5,000-trial search finished in {took:.1f} s", flush=True)
            candidates = bench_candidates(server, body["search"]["id"])
            load = bench_load(server, body["search"]["id"], args.clients, args.seconds)
        finally:
            server.close()
    write(post_rows, candidates, load, args)
    if load["server_errors"] or load["lost_trials"]:
        raise SystemExit("5xx responses or lost trials: see the results")


if __name__ == "__main__":
    main()
