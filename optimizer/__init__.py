"""stagefit's engine: requirements spec -> search space -> vectorised stage models
-> constraints and objectives -> Optuna -> ranked candidates.

Pure computation; no web code lives here (the REST service in ``api`` calls in).

    >>> from optimizer import load_spec, load_catalog, assess
    >>> spec = load_spec("specs/contact_pickup_buffer.yaml")
    >>> record = assess(spec, load_catalog(spec.parts.catalog), "divider_ce",
    ...                 {"r_top": 270e3, "r_bottom": 51e3, "r_collector": 11e3, "r_emitter": 1.3e3})

The names below are imported on first use (PEP 562), so that importing one light module
(``optimizer.cli`` for ``stagefit --help``, ``optimizer.errors``) does not pull in Optuna,
SciPy, pandas and pydantic.
"""

from __future__ import annotations

import importlib
import sys
import types
from typing import Any

#: public name -> the module that defines it
_EXPORTS = {
    "assess": "optimizer.candidates",
    "list_catalogs": "optimizer.catalog",
    "load_catalog": "optimizer.catalog",
    "search": "optimizer.search",
    "load_spec": "optimizer.spec",
    "parse_spec": "optimizer.spec",
    "TOPOLOGIES": "optimizer.topologies",
    "get_topology": "optimizer.topologies",
}

__all__ = list(_EXPORTS)


def __getattr__(name: str) -> Any:
    if name not in _EXPORTS:
        raise AttributeError(f"module 'optimizer' has no attribute {name!r}")
    value = getattr(importlib.import_module(_EXPORTS[name]), name)
    globals()[name] = value  # the function itself from now on, as an eager import gave it
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))


class _Package(types.ModuleType):
    """``optimizer.search`` is the API function, as it was when this file imported it eagerly:
    the import system's binding of the submodule ``optimizer.search`` to the package is
    ignored (the module stays in ``sys.modules["optimizer.search"]``)."""

    def __setattr__(self, name: str, value: Any) -> None:
        if name == "search" and isinstance(value, types.ModuleType):
            return
        super().__setattr__(name, value)


sys.modules[__name__].__class__ = _Package
