"""stagefit's engine: requirements spec -> search space -> vectorised stage models
-> constraints and objectives -> Optuna -> ranked candidates.

Pure computation; no web code lives here (the REST service in ``api`` calls in).

    >>> from optimizer import load_spec, load_catalog, assess
    >>> spec = load_spec("specs/contact_pickup_buffer.yaml")
    >>> record = assess(spec, load_catalog(spec.parts.catalog), "divider_ce",
    ...                 {"r_top": 270e3, "r_bottom": 51e3, "r_collector": 11e3, "r_emitter": 1.3e3})
"""
from optimizer.candidates import assess
from optimizer.catalog import list_catalogs, load_catalog
from optimizer.search import search  # the function; the module's names: from optimizer.search import ...
from optimizer.spec import load_spec, parse_spec
from optimizer.topologies import TOPOLOGIES, get_topology

__all__ = ["assess", "search", "list_catalogs", "load_catalog", "load_spec", "parse_spec", "TOPOLOGIES", "get_topology"]
