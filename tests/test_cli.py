"""The `stagefit` command: exit codes and what a newcomer sees."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from optimizer.cli import EXIT_BAD_INPUT, EXIT_OK, main

SPECS = sorted(Path(__file__).resolve().parent.parent.joinpath("specs").glob("*.yaml"))


@pytest.mark.parametrize("spec", SPECS, ids=lambda p: p.name)
def test_check_accepts_every_example_spec(spec: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["check", str(spec)]) == EXIT_OK
    assert "valid" in capsys.readouterr().out


def test_there_are_at_least_four_example_specs() -> None:
    assert len(SPECS) >= 4


def test_check_reports_every_problem_with_its_path(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    broken = tmp_path / "broken.yaml"
    broken.write_text(
        "name: broken\nsupply: 12 Q\ngain: {target: -10, tolerance: 1 dB}\n"
        "source_impedance: 600\nload_impedance: 47k\nband: [20 kHz, 20 Hz]\nfavourite_colour: blue\n",
        encoding="utf-8",
    )
    assert main(["check", str(broken)]) == EXIT_BAD_INPUT
    err = capsys.readouterr().err
    for path in ("supply", "band", "favourite_colour"):
        assert path in err, err
    assert "Traceback" not in err


def test_check_missing_file_is_bad_input(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["check", str(tmp_path / "nope.yaml")]) == EXIT_BAD_INPUT
    assert "nope.yaml" in capsys.readouterr().err


def test_series_prints_one_decade_of_e12(capsys: pytest.CaptureFixture[str]) -> None:
    # IEC 60063 E12 (from memory): 1.0 1.2 1.5 1.8 2.2 2.7 3.3 3.9 4.7 5.6 6.8 8.2
    assert main(["series", "E12", "--decade", "1k"]) == EXIT_OK
    assert capsys.readouterr().out.split() == [
        "1k",
        "1.2k",
        "1.5k",
        "1.8k",
        "2.2k",
        "2.7k",
        "3.3k",
        "3.9k",
        "4.7k",
        "5.6k",
        "6.8k",
        "8.2k",
    ]


def test_series_unknown_name_is_bad_input(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["series", "E13"]) == EXIT_BAD_INPUT
    assert "E13" in capsys.readouterr().err


def test_catalogs_lists_the_shipped_catalogs(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["catalogs", "--format", "json"]) == EXIT_OK
    names = json.loads(capsys.readouterr().out)
    assert {"eseries_full", "bench_stock"} <= set(names)


def test_unknown_catalog_is_bad_input(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["catalogs", "no_such_shelf"]) == EXIT_BAD_INPUT
    assert "bench_stock" in capsys.readouterr().err


def test_help_exits_cleanly(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["--help"]) == EXIT_OK
    out = capsys.readouterr().out
    assert "check" in out and "exit codes" in out


def test_schema_is_printed_as_json(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["schema"]) == EXIT_OK
    schema = json.loads(capsys.readouterr().out)
    assert "supply" in schema["properties"]


def test_serve_open_names_the_page_to_open(monkeypatch) -> None:
    import api.server
    from optimizer.cli import main

    seen = []
    monkeypatch.setattr(api.server, "serve", lambda host, port, **kw: seen.append(kw["open_path"]))
    assert main(["serve", "--open"]) == 0 and main(["serve", "--open", "s-1234"]) == 0 and main(["serve"]) == 0
    assert seen == ["/", "/searches/s-1234", None]


def test_help_imports_none_of_the_heavy_libraries() -> None:
    """`stagefit --help` builds the whole parser without Optuna, SciPy, pandas, pydantic,
    matplotlib or Flask (start-up time: benchmarks/bench_startup.py). Checked in a fresh
    interpreter, since this one has imported them already."""
    heavy = ("optuna", "scipy", "pandas", "pydantic", "matplotlib", "flask", "sqlalchemy")
    code = (
        "import sys\nfrom optimizer.cli import build_parser\nbuild_parser().format_help()\n"
        f"print(','.join(m for m in {heavy!r} if m in sys.modules))"
    )
    imported = _fresh_python(code)
    assert imported == "", f"imported for --help: {imported}"


def _fresh_python(code: str) -> str:
    """The last line ``code`` prints, run in a fresh interpreter from the checkout."""
    done = subprocess.run(
        [sys.executable, "-c", code],
        capture_output=True,
        text=True,
        check=True,
        cwd=Path(__file__).resolve().parent.parent,
    )
    return (done.stdout.strip().splitlines() or [""])[-1]


def test_search_imports_no_pandas_plotting_or_server(tmp_path: Path) -> None:
    """A whole `stagefit search` (spec and catalog read, trials, ranked table with the why and
    verdict columns) imports neither pandas nor matplotlib nor Flask: the catalog is read with
    the stdlib csv module, the BOM and plots load only for the commands that make them; nor the
    Redis client, which Optuna would import for its own Redis backend (cli._RedisForItsStorageOnly;
    the redis:// storage itself, which imports it, is run by test_redis_storage's CLI workers).
    Checked in a fresh interpreter after the command has run."""
    code = (
        "import sys\nfrom optimizer.cli import main\n"
        f"code = main(['search', 'specs/contact_pickup_buffer.yaml', '--trials', '64', '--quiet', "
        f"'--storage', {str(tmp_path / 's.journal')!r}, '--columns', 'rank,topology,parts,gain,why,verdict'])\n"
        "print(code, ','.join(m for m in ('pandas', 'matplotlib', 'flask', 'redis') if m in sys.modules))"
    )
    status, _, imported = _fresh_python(code).partition(" ")
    assert status in ("0", "3"), status  # 3: answered, nothing meets every limit
    assert imported == "", f"imported by stagefit search: {imported}"


def test_package_names_are_the_api_functions_after_lazy_import() -> None:
    """optimizer's names load on first use, and `optimizer.search` stays the API function even
    after the submodule of the same name is imported (as the eager package import gave it)."""
    import importlib

    import optimizer

    module = importlib.import_module("optimizer.search")
    assert optimizer.search is module.search and callable(optimizer.search)
    from optimizer import assess, load_spec  # noqa: F401  (each resolves to its module's function)

    assert optimizer.assess is importlib.import_module("optimizer.candidates").assess
    with pytest.raises(AttributeError):
        optimizer.no_such_name  # noqa: B018


def test_check_takes_a_bundled_example_by_name(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    monkeypatch.chdir(tmp_path)  # no such file here: the name is the bundled example's
    assert main(["check", "contact_pickup_buffer"]) == EXIT_OK
    assert "valid" in capsys.readouterr().out


def test_a_missing_extra_is_named(tmp_path: Path) -> None:
    # flask made unimportable in a fresh interpreter: `stagefit serve` says which extra brings it (exit 4)
    code = (
        "import sys; sys.modules['flask'] = None\n"
        "from optimizer.cli import main; sys.exit(main(['serve', '--port', '0']))"
    )
    done = subprocess.run([sys.executable, "-c", code], cwd=tmp_path, capture_output=True, text=True, timeout=120)
    assert done.returncode == 4, done.stderr
    assert "stagefit[server]" in done.stderr and "Traceback" not in done.stderr
