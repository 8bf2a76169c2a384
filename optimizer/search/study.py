"""The Optuna study: creating a search, running it in batches (ask, evaluate, tell), finishing it."""

from __future__ import annotations

import contextlib
import gc
import json
import math
import threading
import time
import uuid
from datetime import datetime, timezone
from typing import Any, Callable, Iterator

import numpy as np
import optuna
from optuna.storages import BaseStorage
from optuna.trial import TrialState

from optimizer.catalog import Catalog
from optimizer.errors import InputError, StorageError
from optimizer.sampler import NeighbourSampler
from optimizer.search.enumeration import bound_seeds
from optimizer.search.evaluation import evaluate_designs
from optimizer.search.ranking import (
    FRONT_YIELD_POINTS,
    SHORTLIST_REACH,
    SHORTLIST_SAMPLES,
    SHORTLIST_SIZE,
    FullAssessments,
    candidate_from_record,
    design_key,
    designer_order,
    fold_variants,
    front_records,
    rank_key,
    rank_records,
    relax_one_limit,
    trial_record,
)
from optimizer.search.space import Design, SearchSpace
from optimizer.spec import Spec, parse_spec, spec_to_dict
from optimizer.storage import (
    SNAPSHOT_EVERY,
    SYNC_EVERY,
    TrialHeartbeat,
    TrialTally,
    batched_writes,
    claim_batch,
    create_trials,
    quiet_optuna,
    record_trial,
    recover_stale_trials,
    save_snapshot,
    study_id,
    study_storage,
    sync,
    tally,
    trial_count,
)


def _now() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


class _Recorded:
    """A stand-in for a finished trial that carries its record parsed (what rank_key reads)."""

    def __init__(self, record: dict) -> None:
        self.user_attrs = {"record": record}


#: a finished trial's user attr holding its rank key (a list), written beside its record
RANK_KEY_ATTR = "rank_key"


class TextMemo:
    """Values kept by the text of a trial's record, at most ``limit`` of them (cleared whole
    when full: a long-lived process runs many searches)."""

    def __init__(self, limit: int) -> None:
        self.limit = limit
        self._by_text: dict[str, Any] = {}

    def keep(self, text: str, value: Any) -> Any:
        """Keep ``value`` for ``text``; returns it."""
        if len(self._by_text) >= self.limit:
            self._by_text.clear()
        self._by_text[text] = value
        return value

    def get(self, text: str) -> Any:
        return self._by_text.get(text)

    def clear(self) -> None:
        self._by_text.clear()


class RankMemo:
    """``rank_key(trial)``, read from the key stored beside the trial's record (user attr
    RANK_KEY_ATTR, written by :func:`run_search` with the record) or else kept by the text of
    the record: the sampler ranks every finished trial and the snapshot's tally ranks them
    again, and parsing the record's JSON for it was a third of the sampler's refresh, and in a
    shared search most of what reading another runner's trial cost (25 us or more each).
    Trials stored without the key (by an older version) are ranked from their record; a
    search's repeated designs carry the same text, and the search remembers each record it
    makes as it makes it (:meth:`remember`). At most LIMIT texts are kept (:class:`TextMemo`)."""

    LIMIT = 1 << 16

    def __init__(self, key: Callable[[Any], tuple]) -> None:
        self._key = key
        self._by_text = TextMemo(self.LIMIT)

    def __call__(self, trial: optuna.trial.FrozenTrial) -> tuple:
        stored = trial.user_attrs.get(RANK_KEY_ATTR)
        if stored is not None:
            return tuple(stored)
        text = trial.user_attrs.get("record")
        if not isinstance(text, str):
            return self._key(trial)
        found = self._by_text.get(text)
        return found if found is not None else self._by_text.keep(text, self._key(trial))

    def remember(self, text: str, record: dict) -> list:
        """The rank of a trial whose record is ``record``, stored as ``text``; returns it as
        the list stored beside the record (RANK_KEY_ATTR)."""
        return list(self._by_text.keep(text, self._key(_Recorded(record))))


#: rank_key of the search's own trials (the sampler's, the tallies' and the snapshots' one key)
ranked = RankMemo(rank_key)


#: the design records this process made, by the text stored for each: the finishing step reads
#: every trial's record, and decoding the JSON of 4,000 records took some 0.13 s of a search whose
#: records were all made here moments before. A record is kept as it was made (JSON-ready: it
#: decodes from its text to an equal record) and never changed; at most 8,192 (some 6 kB each),
#: and none past a search's finishing step
made_records = TextMemo(1 << 13)

#: makes a search's sampler from its space and a seed offset (each runner of a shared search its own)
SamplerFactory = Callable[[SearchSpace, int], optuna.samplers.BaseSampler]


def neighbour_sampler(space: SearchSpace, seed_offset: int = 0) -> optuna.samplers.BaseSampler:
    """The search's own sampler: neighbour moves along the ordered indices from the best and
    the front designs."""
    return NeighbourSampler(
        ranked,
        [d for _, d in space.spec.objective_directions],
        space.distributions,
        seed=space.spec.search.seed + seed_offset,
    )


def study_attrs(study: optuna.Study) -> dict:
    """The study's user attrs as the storage holds them, not copied (read them, do not change
    them): Study.user_attrs deep-copies them, the finished ranking included, on every read."""
    return study_storage(study).get_study_user_attrs(study_id(study))


def load_study(storage: BaseStorage, search_id: str) -> tuple[optuna.Study, Spec]:
    try:
        study = optuna.load_study(study_name=search_id, storage=storage, sampler=optuna.samplers.RandomSampler())
    except KeyError:
        raise InputError.single("search", search_id, "the id of an existing search", title="unknown search") from None
    return study, stored_spec(search_id, study_attrs(study))


def stored_spec(search_id: str, attrs: dict) -> Spec:
    """The spec of a stored search from its study user attrs; InputError if its record was
    not written in full or the spec no longer parses."""
    if not isinstance(attrs.get("spec"), dict) or not isinstance(attrs.get("budget"), int):
        raise InputError.single(
            "search",
            search_id,
            "a search whose record was written in full (its creation was cut short; delete it)",
            title="incomplete search",
        )
    return parse_spec(attrs["spec"])


def create_search(
    spec: Spec,
    storage: BaseStorage,
    *,
    search_id: str | None = None,
    catalog: Catalog | None = None,
    seeds: bool = True,
) -> str:
    """Create the study for ``spec`` (status 'queued'), the hand method's seeds and, for a small
    space, the best designs by the core bound (enumeration.bound_seeds) enqueued (unless
    ``seeds`` is False: a baseline without them); returns its id.

    Everything is checked before anything is stored: the space is built (the spec fits its
    catalog) and the spec as it will be stored reads back. The status is written last: it is
    the search record's commit mark, so a creation cut short by a crash leaves a study
    without a status, which :func:`list_searches` shows as failed, :func:`delete_search`
    removes and a new creation under the same id replaces."""
    quiet_optuna()
    space = SearchSpace.build(spec, catalog)
    stored = spec_to_dict(spec)
    parse_spec(stored)  # what is stored must load again (InputError otherwise, nothing written)
    search_id = search_id or f"s-{uuid.uuid4().hex[:12]}"
    directions = ["minimize" if d == "minimise" else "maximize" for _, d in spec.objective_directions]
    with claim_batch(storage, search_id):  # one creator at a time: a record without status is then never in the making
        try:
            if storage.get_study_user_attrs(storage.get_study_id_from_name(search_id)).get("status") is None:
                optuna.delete_study(study_name=search_id, storage=storage)  # a half-made record: replaced
        except KeyError:
            pass
        study = optuna.create_study(study_name=search_id, storage=storage, directions=directions)
        for key, value in (
            ("spec", stored),
            ("budget", spec.search.trials),
            ("created", _now()),
            ("objectives", [list(o) for o in spec.objective_directions]),
        ):
            study.set_user_attr(key, value)
        for design in (space.seeds() + bound_seeds(space, spec.search.trials) if seeds else [])[: spec.search.trials]:
            study.enqueue_trial(space.params_of(design), skip_if_exists=True)
        study.set_user_attr("status", "queued")  # the commit mark
    return search_id


def same_design(a: optuna.trial.FrozenTrial, b: optuna.trial.FrozenTrial) -> bool:
    """Two trials of one design (equal parameters)."""
    return a.params == b.params


def trial_tally(study: optuna.Study, *, best: bool = False) -> TrialTally:
    """Finished (failed ones do not count: they are retried), running and feasible trials,
    and with ``best`` the best so far (by rank_key), read incrementally (storage.tally)."""
    return tally(study_storage(study), study_id(study), *((ranked, same_design) if best else ()))


def trial_counts(study: optuna.Study) -> tuple[int, int]:
    """(finished, running) trials."""
    counted = trial_tally(study)
    return counted.complete, counted.running


MIN_BATCHES = 32  # a search runs at least this many batches (budget allowing): the sampler learns between them


def batch_trials(space: SearchSpace, budget: int) -> int:
    """Trials asked per batch: the spec's ``batch_size`` for each (topology, device) pair of the
    space, at most ``budget`` / MIN_BATCHES and never fewer than ``batch_size``. A batch makes
    one vectorised model call per topology (its devices stacked: evaluate_designs), and below
    some 64 designs a call costs mostly its fixed overhead: a spec offering several pairs would
    otherwise pay that overhead on a few designs each (benchmarks/results/startup.md). Fewer,
    larger batches (MIN_BATCHES 16) cut a 4,000-trial search's CPU by a quarter but found
    worse designs on some specs (the sampler learns between batches): kept at 32."""
    size = space.spec.search.batch_size
    pairs = sum(len(space.devices_of(t)) for t in space.topologies)
    return max(size, min(size * pairs, budget // MIN_BATCHES))


LOOP_GC_THRESHOLD = 20_000  # allocations between the cyclic collector's youngest passes while a search runs
_collections_lock = threading.Lock()
_collections_held: list[
    tuple[int, ...]
] = []  # the threshold before the first search that raised it, per search running


@contextlib.contextmanager
def fewer_collections() -> Iterator[None]:
    """Python's cyclic garbage collector passes less often while a search runs: the loop makes
    many objects that live on (trials, records) and few reference cycles, and at the default
    threshold (700 allocations) the collector traversed them about 400 times in a 4,000-trial
    search, some 0.2 s (4 %) of its CPU. The threshold is restored when the last search running
    in the process ends (searches may run in threads of one process)."""
    with _collections_lock:
        before = gc.get_threshold()
        _collections_held.append(before)
        if len(_collections_held) == 1:
            gc.set_threshold(max(before[0], LOOP_GC_THRESHOLD), *before[1:])
    try:
        yield
    finally:
        with _collections_lock:
            first = _collections_held[0]
            _collections_held.pop()
            if not _collections_held:
                gc.set_threshold(*first)


@fewer_collections()
def run_search(
    storage: BaseStorage,
    search_id: str,
    *,
    should_stop: Callable[[], bool] | None = None,
    progress: Callable[[int, int], None] | None = None,
    max_batches: int | None = None,
    seed_offset: int = 0,
    catalog: Catalog | None = None,
    sampler: SamplerFactory = neighbour_sampler,
    finish: bool = True,
) -> int:
    """Run batches (ask, evaluate in one vectorised call, tell) until the budget is met, the
    search is cancelled or ``should_stop()`` is true; then, with ``finish``, rank and assess
    the shortlist (:func:`finish_search`). ``sampler(space, seed_offset)`` makes the sampler
    (the benchmarks pass their baselines in). Several processes may share a search:
    counting and asking is one claimed step (storage.claim_batch), so together they finish
    exactly the budget; running trials carry heartbeats and a dead runner's trials are failed
    and retried at the next batch of any runner (storage.TrialHeartbeat). Returns the trials
    this runner told."""
    try:
        study, spec = load_study(storage, search_id)
        space = SearchSpace.build(spec, catalog)
    except InputError as error:
        if error.title != "unknown search":  # stored, but it cannot run: say so, never leave it queued
            fail_search(storage, search_id, f"cannot run: {error}")
        raise
    quiet_optuna()
    study.sampler = sampler(space, seed_offset)
    budget = int(study.user_attrs["budget"])
    if study.user_attrs.get("status") in ("queued", "failed"):
        study.set_user_attr("status", "running")
        study.set_user_attr("started", time.time())
    with _deleted_meanwhile(storage, study, search_id):
        per_batch = batch_trials(space, budget)
        batches = told = number = 0  # number: of the next trial to be made (at least)
        # designs this runner has evaluated (samplers revisit them): (record as stored, violation, objectives, rank key)
        known: dict[Design, tuple[str, float, list[float], list]] = {}
        open_trials: list[optuna.Trial] = []  # asked and not yet told (failed if the run is interrupted)
        try:
            while True:
                if study_attrs(study).get("status") == "cancelled" or (should_stop and should_stop()):
                    return told
                recover_stale_trials(storage, study)  # a dead runner's trials (heartbeats): failed, queued again
                with TrialHeartbeat(storage) as heartbeat:
                    with claim_batch(storage, search_id):
                        finished, running = trial_counts(study)
                        if progress:
                            progress(finished, budget)
                        wanted = min(per_batch, budget - finished - running)
                        if wanted <= 0 or (max_batches is not None and batches >= max_batches):
                            break
                        open_trials, given = [], []  # given: the parameters each trial was made with (or None)
                        with batched_writes(storage):  # a journal file: one append for the batch's new trials
                            number = trial_count(storage, study_id(study), number)
                            for trial, params in ask(study, number, wanted):
                                open_trials.append(heartbeat.add(trial))
                                given.append(params)
                                number = max(number, trial.number + 1)
                    trials = list(open_trials)
                    with batched_writes(storage):  # ... one for the parameters asked (the seeds')
                        designs = [space.design_of(p) if p else space.suggest(t) for t, p in zip(trials, given)]
                    try:
                        fresh = list(dict.fromkeys(d for d in designs if d not in known))
                        for d, r in zip(fresh, evaluate_designs(space, fresh)):
                            text = json.dumps(r)
                            made_records.keep(text, r)
                            known[d] = (text, r["total_violation"], r["objectives"], ranked.remember(text, r))
                        records = [known[d] for d in designs]
                    except Exception as error:
                        _fail_trials(study, open_trials)
                        fail_search(storage, search_id, f"evaluation failed: {type(error).__name__}: {error}")
                        raise
                    with batched_writes(storage):  # ... and one for their records and results
                        for t, (record, violation, objectives, key) in zip(trials, records):
                            record_trial(
                                study, t, {"record": record, RANK_KEY_ATTR: key}, {"violation": violation}, objectives
                            )
                            open_trials.remove(t)
                    told += len(trials)
                sync(storage, SYNC_EVERY)  # the batches of the last second are on disk
                save_snapshot(storage, ranked, same_design, every=SNAPSHOT_EVERY)  # reopening reads a short tail
                batches += 1
        except KeyboardInterrupt:  # Ctrl-C: the batch in hand is failed, the search stays resumable
            _fail_trials(study, open_trials)
            fail_search(storage, search_id, INTERRUPTED)
            raise
        finally:
            sync(storage)  # everything this runner wrote is on disk
        if finish:
            _finish_when_done(study, space, budget)
        save_snapshot(storage, ranked, same_design)
    return told


@contextlib.contextmanager
def _deleted_meanwhile(storage: BaseStorage, study: optuna.Study, search_id: str) -> Iterator[None]:
    """A run's storage lookups fail with KeyError once another process deleted its search (a
    ``stagefit search --fresh`` of the same spec, the service's purge): said as a StorageError
    that names the search, not as an internal error. Other KeyErrors pass as they are."""
    try:
        yield
    except KeyError as error:
        try:
            gone = storage.get_study_id_from_name(search_id) != study_id(study)
        except KeyError:
            gone = True
        if gone:
            raise StorageError(
                f"search {search_id} was deleted by another process while this run was at it "
                "(a `stagefit search --fresh` of the same spec, or the service's purge): its trials are gone; "
                "run the command again to search afresh"
            ) from error
        raise


def ask(study: optuna.Study, number: int, count: int = 1) -> list[tuple[optuna.Trial, dict[str, Any] | None]]:
    """The study's next ``count`` trials, each as ``study.ask()`` makes it, and the
    parameters each was made with (None: to be asked, :meth:`SearchSpace.suggest`);
    ``number``: the number the first will have if it is made here. With the search's own
    sampler, a trial is taken from the waiting ones (a seed, a retry: as given) while there
    are any, else planned whole (the sampler's next_trial), in the order ``study.ask()``
    would make them; the planned ones are then made together with every parameter in one
    storage step (storage.create_trials: a journal's one record per trial, not one per
    parameter, and one append, on Redis one round trip for the batch, not one per trial,
    while the search's claim is held), so a shared storage shows them running with their
    parameters at once."""
    storage, sampler, sid = study_storage(study), study.sampler, study_id(study)
    slots: list[tuple[optuna.Trial, None] | optuna.trial.FrozenTrial] = []
    for _ in range(count):
        if not isinstance(sampler, NeighbourSampler) or storage.get_all_trials(
            sid, deepcopy=False, states=(TrialState.WAITING,)
        ):
            trial = study.ask()  # an enqueued trial is taken as given
            slots.append((trial, None))
            number = max(number, trial.number + 1)  # (made new if another runner took the waiting one first)
        else:
            slots.append(sampler.next_trial(study, number))
            number += 1
    made = iter(create_trials(storage, sid, [s for s in slots if isinstance(s, optuna.trial.FrozenTrial)]))
    return [
        (optuna.Trial(study, next(made)), s.params) if isinstance(s, optuna.trial.FrozenTrial) else s for s in slots
    ]


INTERRUPTED = "interrupted (Ctrl-C); finished trials are kept: run the search again to resume it"


def _fail_trials(study: optuna.Study, trials: list[optuna.Trial]) -> None:
    """Tell ``trials`` (asked, not told) failed: they are asked again when the search resumes."""
    for t in list(trials):
        try:
            study.tell(t, state=TrialState.FAIL)
        except ValueError:  # told already (the interrupt came between its tell and its removal here)
            pass
        trials.remove(t)


def _finish_when_done(study: optuna.Study, space: SearchSpace, budget: int) -> None:
    finished, running = trial_counts(study)
    if finished >= budget and running == 0 and study.user_attrs.get("status") == "running":
        _finish(study, space)


def finish_search(storage: BaseStorage, search_id: str, *, catalog: Catalog | None = None) -> None:
    """Rank a search whose budget is spent and assess its shortlist (status 'done'); nothing
    while trials are still to run. What :func:`run_search` does at its end unless told not to."""
    study, spec = load_study(storage, search_id)
    _finish_when_done(study, SearchSpace.build(spec, catalog), int(study.user_attrs["budget"]))


def completed_records(study: optuna.Study) -> list[dict]:
    """The design record of every finished trial, with its trial number. A design the sampler
    asked for again carries the very record text of its first trial: each distinct text is
    decoded once, or not at all where this process made it (:data:`made_records`); the records
    of one design share their inner dicts, and none is changed here."""
    out = []
    decoded: dict[str, dict | None] = {}
    for t in study.get_trials(deepcopy=False, states=(TrialState.COMPLETE,)):
        text = t.user_attrs.get("record")
        if isinstance(text, str):
            record = decoded.get(text) or decoded.setdefault(text, made_records.get(text) or trial_record(t))
        else:
            record = trial_record(t)
        if record:
            out.append({**record, "trial": t.number})
    return out


FRONT_ROUNDS = 4  # times the front is re-formed after points that miss the full assessment leave it


def summarise(space: SearchSpace, study: optuna.Study, top: int, samples: int, *, tail: bool = True) -> dict:
    """The shortlist and the front; with ``tail`` every other ranked design follows the
    shortlist as a nominal candidate.

    Ranked designs are assessed in full (worst case, FINAL_BUILDS builds) in rank order until
    ``top`` of them meet the spec on its basis, or SHORTLIST_REACH designs have been assessed:
    a design that passed the search's screen but misses on the full assessment drops below
    every one that meets it. The front holds only designs that meet the spec: a point assessed
    in full that misses there is left off it, and the designs it dominated are looked at again."""
    every = rank_records(completed_records(study))
    points = front_records(space, every)
    ranked = fold_variants(space, every, keep={design_key(r) for r in points})
    reach = ranked[: max(top, SHORTLIST_REACH)]
    full = FullAssessments(space, samples)
    # the first `top` and the front's yield points in one call; if fewer than `top` meet the spec,
    # the next designs of the reach, as many as the rate met so far says will make `top`, and if
    # still fewer, the rest of the reach (each call costs some 50 ms besides its designs' ~15 ms);
    # cut after the design that makes `top`: the same designs as one at a time
    full.assess(reach[:top] + [r for k, r in enumerate(points) if k in _yield_points(points)])
    shortlist = [full.candidate(r) for r in reach[:top]]
    meeting = sum(c["feasible"] for c in shortlist)
    while meeting < top and len(shortlist) < len(reach):
        rate_says = len(shortlist) == top  # the first more: the rate's estimate; then the rest
        step = math.ceil((top - meeting) * len(shortlist) / max(meeting, 1)) if rate_says else len(reach)
        more = reach[len(shortlist) : len(shortlist) + step]
        full.assess(more)
        for r in more:
            shortlist.append(full.candidate(r))
            meeting += shortlist[-1]["feasible"]
            if meeting == top:
                break
    assessed = {design_key(r): dict(c) for r, c in zip(reach, shortlist)}  # copied before ranks are set
    shortlist.sort(key=designer_order)
    candidates = shortlist + [candidate_from_record(space, r) for r in ranked[len(shortlist) :] if tail]
    for rank, c in enumerate(candidates, 1):
        c["rank"] = rank
    # the front of every feasible design (none of them folded away above); a point assessed in full that
    # misses the spec there leaves it, and the designs it hid are looked at again (FRONT_ROUNDS at most)
    missed: set = set()
    for round_ in range(FRONT_ROUNDS):
        if round_:
            points = front_records(space, [r for r in every if r["feasible"] and design_key(r) not in missed])
        with_yield = _yield_points(points)
        to_assess = [r for k, r in enumerate(points) if k in with_yield and design_key(r) not in assessed]
        full.assess(to_assess)
        assessed.update((design_key(r), full.candidate(r)) for r in to_assess)
        now_missed = {design_key(r) for k, r in enumerate(points) if k in with_yield}
        now_missed = {key for key in now_missed if not assessed[key]["feasible"]}
        if not now_missed:
            break
        missed |= now_missed
    front = []
    for k, r in enumerate(points):
        c = dict(assessed[design_key(r)]) if k in with_yield else candidate_from_record(space, r)
        if c["feasible"]:
            c["objectives"] = r["objectives"]
            front.append(c)
    summary = {"candidates": candidates, "front": front, "evaluated": len(ranked)}
    if not any(c["feasible"] for c in shortlist):
        summary["infeasible"] = relax_one_limit(space.spec, every, space.capacitors, space.resistors)
    return summary


def _yield_points(points: list[dict]) -> set[int]:
    """Positions of the front points (in objective order) that carry a yield figure: FRONT_YIELD_POINTS evenly spread."""
    return set(np.linspace(0, len(points) - 1, min(len(points), FRONT_YIELD_POINTS)).round().astype(int))


def _finish(study: optuna.Study, space: SearchSpace) -> None:
    summary = summarise(space, study, SHORTLIST_SIZE, SHORTLIST_SAMPLES, tail=False)
    made_records.clear()  # read: a long-lived process holds no search's records past its end
    study.set_user_attr("ranking", {k: summary[k] for k in ("candidates", "front", "infeasible") if k in summary})
    study.set_user_attr("finished", _now())
    study.set_user_attr("elapsed", time.time() - float(study.user_attrs.get("started", time.time())))
    study.set_user_attr("status", "done")


def stored_attrs(storage: BaseStorage, search_id: str) -> tuple[int, dict]:
    """(study id, user attrs) of a stored search, without reading its spec."""
    try:
        study_id = storage.get_study_id_from_name(search_id)
    except KeyError:
        raise InputError.single("search", search_id, "the id of an existing search", title="unknown search") from None
    return study_id, storage.get_study_user_attrs(study_id)


def fail_search(storage: BaseStorage, search_id: str, reason: str = "") -> None:
    """Mark a search 'failed' with its ``reason`` (its runner hit an error, or it cannot run);
    extend_search queues it again."""
    study_id, _ = stored_attrs(storage, search_id)
    storage.set_study_user_attr(study_id, "reason", reason[:2000] or "stopped by an unexpected error")
    storage.set_study_user_attr(study_id, "status", "failed")
