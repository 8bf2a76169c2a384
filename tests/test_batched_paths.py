"""The batched paths of the search against their plain one-at-a-time counterparts: the same
figures whichever way they are computed (no timing here; speed lives in benchmarks/)."""

from __future__ import annotations

import json

import optuna

from optimizer.candidates import assess, assess_many
from optimizer.catalog import load_catalog
from optimizer.search import SearchSpace, create_search, open_storage, run_search
from optimizer.search.ranking import (
    SHORTLIST_REACH,
    design_key,
    fold_variants,
    front_records,
    rank_records,
    shortlist_candidates,
)
from optimizer.search.study import completed_records, load_study, summarise
from optimizer.spec import load_spec

SAMPLES = 40  # Monte Carlo builds per design: enough to tell designs apart, quick

# A -3 dB corner is refined by iteration until it stops moving (physics._corners), so whether a
# design is solved alone or among others can move it within that tolerance, not beyond;
# every other figure, verdict and part agrees exactly.
REL = 1e-4


def same(a: object, b: object, path: str = "") -> list[str]:
    """Where two records differ: numbers beyond REL (relative), anything else at all."""
    if isinstance(a, dict) and isinstance(b, dict):
        return [d for k in a.keys() | b.keys() for d in same(a.get(k), b.get(k), f"{path}.{k}")]
    if isinstance(a, list) and isinstance(b, list) and len(a) == len(b):
        return [d for k, (x, y) in enumerate(zip(a, b)) for d in same(x, y, f"{path}[{k}]")]
    if isinstance(a, float) and isinstance(b, float):
        close = a == b or (a != a and b != b) or abs(a - b) <= REL * max(abs(a), abs(b))
        return [] if close else [f"{path}: {a} != {b}"]
    return [] if a == b else [f"{path}: {a!r} != {b!r}"]


def _designs(spec, count: int) -> list[tuple[str, dict[str, float], str]]:
    """The first ``count`` ranked designs of a short seeded search of ``spec``: several
    topologies and devices, some meeting the spec and some not."""
    storage = open_storage(None)
    search_id = create_search(spec, storage)
    run_search(storage, search_id, finish=False)
    study, _ = load_study(storage, search_id)
    ranked = rank_records(completed_records(study))
    picked = ranked[: count // 2] + ranked[-(count - count // 2) :]  # best and worst
    return [(r["topology"], dict(r["parts"]), r["device"]) for r in picked]


def test_assess_many_gives_each_design_what_assess_gives_it_alone() -> None:
    spec = load_spec("specs/bench_stock_preamp.yaml")
    spec = spec.model_copy(update={"search": spec.search.model_copy(update={"trials": 256})})
    catalog = load_catalog(spec.parts.catalog)
    designs = _designs(spec, 10)
    assert len({(t, d) for t, _, d in designs}) > 1  # more than one group: grouping is exercised
    together = assess_many(spec, catalog, designs, samples=SAMPLES)
    alone = [assess(spec, catalog, t, parts, d, samples=SAMPLES) for t, parts, d in designs]
    assert same(together, alone) == []
    assert {c["feasible"] for c in alone} == {True, False}  # both verdicts compared


def test_the_shortlist_stops_where_one_at_a_time_stops() -> None:
    """summarise assesses several ranked designs per call; the plain loop (one design per
    call, stop once `top` meet the spec or SHORTLIST_REACH were tried) picks the same ones."""
    spec, study, _ = _searched("specs/bench_stock_preamp.yaml", 256)
    space = SearchSpace.build(spec)
    every = rank_records(completed_records(study))
    ranked = fold_variants(space, every, keep={design_key(r) for r in front_records(space, every)})  # as summarise
    for top in (1, 4):
        plain: list[dict] = []
        for r in ranked[: max(top, SHORTLIST_REACH)]:
            plain += shortlist_candidates(space, [r], SAMPLES)
            if len(plain) >= top and sum(c["feasible"] for c in plain) >= top:
                break
        plain.sort(key=lambda c: (not c["feasible"], -c["score"] if c["feasible"] else c["total_violation"]))
        summary = summarise(space, study, top, SAMPLES, tail=False)
        assert same([{**c, "rank": None} for c in summary["candidates"]], [{**c, "rank": None} for c in plain]) == []
    assert isinstance(study, optuna.Study)


def test_the_records_a_search_made_here_are_those_its_journal_gives() -> None:
    """completed_records takes the records this process made from study.made_records rather
    than decoding their JSON again: the same records, type for type, as the journal's text
    decodes to; the finishing step leaves none behind."""
    from optimizer.search.study import made_records

    _, study, (storage, search_id) = _searched("specs/contact_pickup_buffer.yaml", 200)
    remembered = completed_records(study)
    made = study.get_trials(deepcopy=False)[-1].user_attrs["record"]
    assert made_records.get(made) is not None
    assert remembered[-1]["metrics"] is made_records.get(made)["metrics"]  # taken, not decoded
    made_records.clear()
    decoded = completed_records(study)
    assert remembered[-1]["metrics"] is not decoded[-1]["metrics"]
    assert [json.dumps(r) for r in remembered] == [json.dumps(r) for r in decoded]
    assert [_types(r) for r in remembered] == [_types(r) for r in decoded]
    run_search(storage, search_id)  # the budget is met: the finishing step alone
    assert made_records.get(made) is None


def _searched(path: str, trials: int) -> tuple:
    """The spec at ``path`` with a budget of ``trials``, its study searched in memory (not
    finished) and (storage, search id)."""
    spec = load_spec(path)
    spec = spec.model_copy(update={"search": spec.search.model_copy(update={"trials": trials})})
    storage = open_storage(None)
    search_id = create_search(spec, storage)
    run_search(storage, search_id, finish=False)
    study, _ = load_study(storage, search_id)
    return spec, study, (storage, search_id)


def _types(x: object) -> object:
    """The type of every leaf of a record, in its shape."""
    if isinstance(x, dict):
        return {k: _types(v) for k, v in x.items()}
    if isinstance(x, list):
        return [_types(v) for v in x]
    return type(x).__name__


def test_a_batch_asks_batch_size_for_each_topology_device_pair_within_the_cap() -> None:
    """batch_trials against its rule worked out by hand here, and run_search asking exactly
    that many trials per batch (the finished count at each batch, via progress) until the
    budget is met."""
    from optimizer.search.study import MIN_BATCHES, batch_trials

    spec = load_spec("specs/contact_pickup_buffer.yaml")
    space = SearchSpace.build(spec)
    pairs = sum(len(space.devices_of(t)) for t in space.topologies)
    assert pairs > 1
    size = spec.search.batch_size
    assert batch_trials(space, 100 * size * pairs * MIN_BATCHES) == size * pairs  # plenty of budget
    assert batch_trials(space, size * MIN_BATCHES) == size  # capped, never below batch_size
    budget = 24 * MIN_BATCHES + 5  # small: batch_size 8 per pair would be 8 * pairs, capped at 24
    small = spec.model_copy(update={"search": spec.search.model_copy(update={"trials": budget, "batch_size": 8})})
    per_batch = batch_trials(SearchSpace.build(small), budget)
    assert per_batch == min(8 * pairs, 24) and per_batch > 8
    seen: list[int] = []
    storage = open_storage(None)
    search_id = create_search(small, storage)
    run_search(storage, search_id, progress=lambda done, _: seen.append(done), finish=False)
    assert seen == list(range(0, budget, per_batch)) + [budget]
