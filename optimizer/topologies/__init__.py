"""Registry of stage topologies: name -> model instance.

Every module of this package is imported here, and every :class:`Topology` subclass that
sets ``name`` registers itself when defined (:func:`base.register`): adding a stage is one
new module in this folder (docs/adding_a_topology.md), nothing else to edit.
"""

from __future__ import annotations

import importlib
import pkgutil

from optimizer.errors import InputError
from optimizer.topologies.base import REGISTRY, Conditions, Role, StageResult, Topology, register, unregister

for _module in pkgutil.iter_modules(__path__):
    importlib.import_module(f"{__name__}.{_module.name}")

TOPOLOGIES: dict[str, Topology] = REGISTRY  # name -> model, in listing order


def get_topology(name: str) -> Topology:
    """The topology registered under name (InputError listing the valid names otherwise)."""
    try:
        return TOPOLOGIES[name]
    except (KeyError, TypeError):
        raise InputError.single("topology", name, f"one of {', '.join(TOPOLOGIES)}", title="unknown topology") from None


__all__ = ["TOPOLOGIES", "Conditions", "Role", "StageResult", "Topology", "get_topology", "register", "unregister"]
