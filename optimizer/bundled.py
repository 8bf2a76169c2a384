"""Where the bundled data lives: the example parts catalogs and the example specs.

Their source is the top of the repository (``parts_catalogs/``, ``specs/``); a built wheel
carries the same files inside the package as ``optimizer/parts_catalogs`` and
``optimizer/specs`` (pyproject.toml maps the two folders in; nothing is copied in the
repository). These functions find them in either place: the installed folder when it is there,
else the checkout's.
"""

from __future__ import annotations

import os
from pathlib import Path

_PACKAGE = Path(__file__).resolve().parent
SPEC_SUFFIXES = (".yaml", ".yml", ".json")


def bundled_dir(name: str) -> Path:
    """The bundled folder ``name`` ("parts_catalogs" or "specs"): inside the installed package,
    else at the top of the checkout (which may not exist; callers check)."""
    installed = _PACKAGE / name
    return installed if installed.is_dir() else _PACKAGE.parent / name


def catalog_dir() -> Path:
    """The folder of parts catalogs: ``STAGEFIT_CATALOG_DIR`` when set, else the bundled one."""
    return Path(os.environ.get("STAGEFIT_CATALOG_DIR") or bundled_dir("parts_catalogs"))


def example_names() -> list[str]:
    """Names (file stems) of the bundled example specs, sorted."""
    folder = bundled_dir("specs")
    if not folder.is_dir():
        return []
    return sorted(p.stem for p in folder.iterdir() if p.suffix in SPEC_SUFFIXES and p.is_file())


def example_path(name: str) -> Path | None:
    """The file of the bundled example spec called ``name`` (a stem from :func:`example_names`,
    never a path), or None when there is none."""
    if name not in example_names():
        return None
    folder = bundled_dir("specs")
    return next(folder / f"{name}{suffix}" for suffix in SPEC_SUFFIXES if (folder / f"{name}{suffix}").is_file())
