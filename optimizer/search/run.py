"""The one-call search of the Python API and the CLI: create, run and load a search on a storage."""

from __future__ import annotations

from typing import Callable

from optuna.storages import BaseStorage

from optimizer.catalog import Catalog
from optimizer.search.ranking import SHORTLIST_SIZE
from optimizer.search.results import SearchResult, load_search
from optimizer.search.study import SamplerFactory, create_search, neighbour_sampler, run_search
from optimizer.spec import Spec, parse_spec, spec_digest, spec_to_dict
from optimizer.storage import (
    open_storage,
)


def spec_search_id(spec: Spec) -> str:
    """A stable id for a spec (its name and a hash of its canonical form): the CLI reuses
    a finished search of the very same spec instead of running it again."""
    digest = spec_digest(spec)
    slug = "".join(ch if ch.isalnum() else "-" for ch in spec.name.lower()).strip("-")[:40] or "spec"
    return f"{slug}-{digest}"


def with_search(spec: Spec, **overrides: object) -> Spec:
    """``spec`` with fields of its search section replaced (None leaves a field as it is)."""
    changed = {k: v for k, v in overrides.items() if v is not None}
    if not changed:
        return spec
    data = spec_to_dict(spec)
    data["search"] = {**data["search"], **changed}
    return parse_spec(data)


def search(
    spec: Spec,
    *,
    storage: BaseStorage | str | None = None,
    trials: int | None = None,
    seed: int | None = None,
    progress: Callable[[int, int], None] | None = None,
    top: int = SHORTLIST_SIZE,
    catalog: Catalog | None = None,
    sampler: SamplerFactory = neighbour_sampler,
) -> SearchResult:
    """Run a whole search in this process and return its ranked result (the Python API).
    ``storage`` defaults to memory; ``trials`` and ``seed`` override the spec's; ``sampler``
    makes the sampler from the space and a seed offset (default: the neighbour sampler)."""
    spec = with_search(spec, trials=trials, seed=seed)
    store = storage if isinstance(storage, BaseStorage) else open_storage(storage)
    search_id = create_search(spec, store, catalog=catalog)
    run_search(store, search_id, progress=progress, catalog=catalog, sampler=sampler)
    return load_search(store, search_id, top=top)
