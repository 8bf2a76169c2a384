"""The built wheel is the whole program: installed outside the checkout, it finds its bundled catalogs
and example specs and runs `stagefit search` on an example by name.

The wheel is built the way a user's pip builds it (`pip wheel --no-deps`, setuptools from the package
index in an isolated build environment) and installed into a fresh virtual environment in a temporary
folder; the runtime dependencies come from this test's own environment through a path file, so no
dependency is downloaded twice.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import sysconfig
import zipfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def _run(args: list[str], cwd: Path, timeout: float = 600) -> subprocess.CompletedProcess:
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "STAGEFIT_CATALOG_DIR", "VIRTUAL_ENV")}
    return subprocess.run(args, cwd=cwd, env=env, capture_output=True, text=True, timeout=timeout)


@pytest.fixture(scope="module")
def installed(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path, str]:
    """(the wheel, the venv's bin folder, the build's output): the wheel built from the checkout and
    installed into a fresh venv outside it."""
    base = tmp_path_factory.mktemp("wheel")
    # built from the files a clone has (git's list: tracked and not ignored), copied out of the checkout,
    # so a stray local file or a build/ folder left in the checkout cannot reach the wheel
    source = base / "source"
    for name in _source_files():
        (source / name).parent.mkdir(parents=True, exist_ok=True)
        shutil.copy2(ROOT / name, source / name)
    built = _run(
        [sys.executable, "-m", "pip", "wheel", "--no-deps", "--quiet", "-w", str(base / "dist"), str(source)], cwd=base
    )
    assert built.returncode == 0, built.stderr
    (wheel,) = (base / "dist").glob("stagefit-*.whl")
    venv = base / "venv"
    made = _run([sys.executable, "-m", "venv", "--without-pip", str(venv)], cwd=base)
    assert made.returncode == 0, made.stderr
    bin_dir = venv / ("Scripts" if os.name == "nt" else "bin")
    purelib = Path(
        _run(
            [str(bin_dir / "python"), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"], cwd=base
        ).stdout.strip()
    )
    # the dependencies: this environment's site-packages, after the venv's own (the wheel's code wins)
    (purelib / "_stagefit_test_deps.pth").write_text(sysconfig.get_paths()["purelib"] + "\n", encoding="utf-8")
    install = _run(
        [
            sys.executable,
            "-m",
            "pip",
            "--python",
            str(bin_dir / "python"),
            "install",
            "--no-deps",
            "--no-index",
            str(wheel),
        ],
        cwd=base,
    )
    assert install.returncode == 0, install.stderr
    return wheel, bin_dir, built.stdout + built.stderr + install.stdout + install.stderr


def _source_files(folder: str = ".") -> set[str]:
    """Files of ``folder`` in the checkout as a clone has them, as paths relative to the repository root
    (git's list of tracked and not-ignored files; every file but caches where git is absent)."""
    listed = _run(["git", "ls-files", "--cached", "--others", "--exclude-standard", folder], cwd=ROOT)
    if listed.returncode == 0 and listed.stdout.strip():
        return {name for name in listed.stdout.splitlines() if (ROOT / name).is_file()}
    skip = {"__pycache__", ".git", ".venv", "build", ".mypy_cache", ".ruff_cache", ".pytest_cache"}
    return {str(p.relative_to(ROOT)) for p in (ROOT / folder).rglob("*") if p.is_file() and not skip & set(p.parts)}


def test_wheel_holds_every_module_catalog_and_example(installed: tuple[Path, Path, str]) -> None:
    wheel, _, _ = installed
    names = set(zipfile.ZipFile(wheel).namelist())
    # hand-built expectation: every source file of the two packages at its own path, the two data folders
    # moved inside the package; a subpackage missing from pyproject.toml's list shows up here
    expected = {p for p in _source_files("optimizer") | _source_files("api") if not p.endswith(".md")}
    expected |= {"optimizer/" + p for p in _source_files("parts_catalogs") | _source_files("specs")}
    assert expected, "found no source files"
    missing = sorted(expected - names)
    assert not missing, f"not in the wheel: {missing}"
    assert {
        "optimizer/parts_catalogs/bench_stock/transistors.csv",
        "optimizer/specs/contact_pickup_buffer.yaml",
        "api/templates/spec.html",
    } <= names
    # the repository holds one copy: nothing was generated into the package folder of the checkout
    assert not (ROOT / "optimizer" / "parts_catalogs").exists() and not (ROOT / "optimizer" / "specs").exists()


def test_build_and_install_print_no_warning_banner(installed: tuple[Path, Path, str]) -> None:
    _, _, output = installed
    for banner in ("Deprecat", "BuildBackendWarning", "SetuptoolsWarning", "!!"):
        assert banner not in output, output


def test_installed_wheel_searches_a_bundled_spec_by_name(installed: tuple[Path, Path, str], tmp_path: Path) -> None:
    _, bin_dir, _ = installed
    where = _run([str(bin_dir / "python"), "-c", "import optimizer; print(optimizer.__file__)"], cwd=tmp_path)
    assert Path(where.stdout.strip()).is_relative_to(bin_dir.parent), where  # the wheel's code, not the checkout's
    catalogs = _run([str(bin_dir / "stagefit"), "catalogs"], cwd=tmp_path)
    assert catalogs.returncode == 0, catalogs.stderr
    assert "bench_stock" in catalogs.stdout and "eseries_full" in catalogs.stdout
    found = _run(
        [
            str(bin_dir / "stagefit"),
            "search",
            "bench_stock_preamp",
            "--trials",
            "48",
            "--top",
            "3",
            "--quiet",
            "--storage",
            str(tmp_path / "searches.journal"),
        ],
        cwd=tmp_path,
    )
    # 0: a design meets the spec; 3: the nearest misses are listed (48 trials may not be enough)
    assert found.returncode in (0, 3), found.stdout + found.stderr
    lines = found.stdout.splitlines()
    header = next(i for i, line in enumerate(lines) if line.startswith("rank"))
    ranks = [line.split()[0] for line in lines[header + 1 :] if line[:1].isdigit()]
    assert ranks == ["1", "2", "3"], found.stdout
    missing = _run([str(bin_dir / "stagefit"), "check", "no_such_example"], cwd=tmp_path)
    assert missing.returncode == 2 and "contact_pickup_buffer" in missing.stderr, missing.stderr
