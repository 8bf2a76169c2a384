"""`stagefit search` and `stagefit bom`: formats, reuse of a stored search, plots, errors."""

from __future__ import annotations

import csv
import io
import json
from pathlib import Path

import pytest
import yaml

from optimizer.cli import EXIT_BAD_INPUT, EXIT_OK, main

SPEC = {
    "name": "cli search",
    "supply": "15 V",
    "gain": {"target": -30, "tolerance": "2 dB"},
    "source_impedance": "2k2",
    "load_impedance": "22k",
    "band": ["20 Hz", "20 kHz"],
    "limits": {"swing_min": "4 V", "supply_current_max": "2 mA"},
    "parts": {"catalog": "bench_stock", "in_stock_only": True, "resistor_series": "E12"},
    "topologies": ["feedback_ce", "divider_ce"],
    "search": {"trials": 256, "seed": 5},
}


@pytest.fixture(scope="module")
def workspace(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A spec file and a journal storage with the spec's search already run once."""
    root = tmp_path_factory.mktemp("cli")
    (root / "spec.yaml").write_text(yaml.safe_dump(SPEC), encoding="utf-8")
    assert main(["search", str(root / "spec.yaml"), "--storage", str(root / "s.journal"), "--top", "3"]) == EXIT_OK
    return root


def _run(
    workspace: Path, capsys: pytest.CaptureFixture[str], *extra: str, command: str = "search"
) -> tuple[int, str, str]:
    code = main([command, str(workspace / "spec.yaml"), "--storage", str(workspace / "s.journal"), *extra])
    out = capsys.readouterr()
    return code, out.out, out.err


def test_table_shows_ranked_designs_and_reuses_the_stored_search(workspace: Path, capsys) -> None:
    code, out, err = _run(workspace, capsys, "--top", "3", "--front")
    assert code == EXIT_OK
    assert "reusing the stored search" in err
    assert "rank" in out and "Pareto front" in out and "caution:" in out
    assert out.count("meets every limit") >= 1


def test_json_candidates_follow_the_documented_shape(workspace: Path, capsys) -> None:
    code, out, _ = _run(workspace, capsys, "--format", "json", "--top", "2")
    assert code == EXIT_OK
    data = json.loads(out)
    first = data["candidates"][0]
    for key in (
        "rank",
        "topology",
        "feasible",
        "score",
        "conditions",
        "parts",
        "transistor",
        "metrics",
        "worst_case",
        "violations",
    ):
        assert key in first
    assert first["rank"] == 1 and set(first["transistor"]["model"]) >= {"IS", "BF", "VAF"}
    assert first["parts"] and all(set(p) >= {"value", "label", "part_id"} for p in first["parts"].values())


def test_csv_and_markdown(workspace: Path, capsys) -> None:
    code, out, _ = _run(workspace, capsys, "--format", "csv", "--top", "4")
    assert out.startswith("# stagefit candidates: spec ")  # identity, basis and cautions lead as comments
    rows = list(csv.DictReader(line for line in io.StringIO(out) if not line.startswith("#")))
    assert code == EXIT_OK and len(rows) == 4 and rows[0]["rank"] == "1" and "supply_current" in rows[0]
    code, out, _ = _run(workspace, capsys, "--format", "markdown", "--top", "2")
    lines = out.splitlines()
    assert code == EXIT_OK and lines[1].startswith("basis: ") and lines[2].startswith("| rank |")


def test_plots_are_written(workspace: Path, capsys) -> None:
    front, response = workspace / "plots" / "front.svg", workspace / "plots" / "response.png"
    code, _, _ = _run(workspace, capsys, "--top", "1", "--plot", str(front), "--plot", str(response))
    assert code == EXIT_OK
    assert front.read_text(encoding="utf-8").lstrip().startswith("<?xml")
    assert response.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_bad_plot_name_and_rank_are_bad_input(workspace: Path, capsys) -> None:
    code, _, err = _run(workspace, capsys, "--plot", str(workspace / "x.pdf"))
    assert code == EXIT_BAD_INPUT and "--plot" in err
    code, _, err = _run(workspace, capsys, "--plot", str(workspace / "front.svg"), "--rank", "99999")
    assert code == EXIT_BAD_INPUT and "rank" in err and "Traceback" not in err


def test_bom_for_a_kit_of_units(workspace: Path, capsys) -> None:
    code, out, _ = _run(workspace, capsys, "--rank", "1", "--units", "25", "--format", "csv", command="bom")
    assert code == EXIT_OK
    lines = list(csv.DictReader(line for line in io.StringIO(out) if not line.startswith("#")))
    assert lines and all(int(row["qty_total"]) == 25 * int(row["qty_per_unit"]) for row in lines)
    code, out, _ = _run(workspace, capsys, "--units", "3", command="bom")
    assert code == EXIT_OK and "kit for 3" in out and "total" in out
    code, _, err = _run(workspace, capsys, "--units", "0", command="bom")
    assert code == EXIT_BAD_INPUT and "units" in err


def test_ctrl_c_fails_the_running_trials_and_the_search_resumes(tmp_path) -> None:
    """SIGINT to a running `stagefit search`: the batch in hand is failed (no trial left
    running, status failed with the reason), and running the command again resumes the
    search to exactly its budget."""
    import os
    import signal
    import subprocess
    import sys
    import time

    from optimizer.search import open_storage, search_status, spec_search_id, with_search
    from optimizer.spec import load_spec

    journal = tmp_path / "runs.journal"
    spec_file = Path(__file__).resolve().parents[1] / "specs" / "line_driver_24v.yaml"
    command = [
        sys.executable,
        "-m",
        "optimizer.cli",
        "search",
        str(spec_file),
        "--storage",
        str(journal),
        "--trials",
        "1500",
        "--seed",
        "4",
        "--top",
        "1",
        "--format",
        "json",
    ]
    search_id = spec_search_id(with_search(load_spec(spec_file), trials=1500, seed=4))
    run = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        deadline = time.monotonic() + 120
        while True:  # wait until the search has told some trials
            assert run.poll() is None, run.communicate()
            assert time.monotonic() < deadline, "the search did not start"
            if journal.exists():
                try:
                    if search_status(open_storage(str(journal)), search_id)["trials_done"] > 0:
                        break
                except Exception:  # noqa: BLE001 (the journal is still being created)
                    pass
            time.sleep(0.2)
        os.kill(run.pid, signal.SIGINT)
        _, err = run.communicate(timeout=60)
    finally:
        if run.poll() is None:
            run.kill()
    assert run.returncode == 1 and "run the same command again to resume" in err
    status = search_status(open_storage(str(journal)), search_id)
    assert status["status"] == "failed" and "interrupted" in status["reason"]
    assert status["trials_running"] == 0 and 0 < status["trials_done"] < 1500

    again = subprocess.run(command, capture_output=True, text=True, timeout=600)
    assert "resuming the interrupted search" in again.stderr
    assert again.returncode in (0, 3), again.stderr  # 3: no design meets every limit (still an answer)
    status = search_status(open_storage(str(journal)), search_id)
    assert status["status"] == "done" and status["trials_done"] == 1500 and status["trials_running"] == 0
