"""Stored searches read back: status, the ranked result, listing, cancelling, extending, deleting."""

from __future__ import annotations

import csv
import io
import math
import time
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import optuna
from optuna.storages import BaseStorage

from optimizer.errors import InputError
from optimizer.search.ranking import (
    SHORTLIST_SAMPLES,
    SHORTLIST_SIZE,
    candidate_from_record,
    candidates_from_records,
    fold_variants,
    rank_records,
    trial_record,
)
from optimizer.search.space import SearchSpace
from optimizer.search.study import (
    completed_records,
    load_study,
    ranked,
    same_design,
    stored_attrs,
    stored_spec,
    study_attrs,
    summarise,
    trial_counts,
    trial_tally,
)
from optimizer.spec import Spec
from optimizer.storage import TrialTally, journal_summary

if TYPE_CHECKING:  # pandas is imported by candidates_frame only: a search runs without it
    import pandas as pd

STATUSES = ("queued", "running", "done", "failed", "cancelled")


@dataclass
class SearchResult:
    """A search's ranked candidates (rank 1 first), Pareto front, status and the study."""

    id: str
    spec: Spec
    study: optuna.Study
    candidates: list[dict]
    front: list[dict]
    status: dict = field(default_factory=dict)
    infeasible: dict | None = None  # when no design meets the spec: the limit that binds (relax_one_limit)

    def candidate(self, rank: int) -> dict:
        """The candidate at ``rank`` (1 = best); InputError if there is none."""
        if not isinstance(rank, int) or not 1 <= rank <= len(self.candidates):
            raise InputError.single("rank", rank, f"a rank from 1 to {len(self.candidates)}", title="no such candidate")
        return self.candidates[rank - 1]

    def dataframe(self) -> pd.DataFrame:
        """One row per ranked candidate: rank, topology, device, part values (SI), metrics."""
        return candidates_frame(self.candidates)


def candidates_frame(candidates: list[dict], *, labels: bool = False) -> pd.DataFrame:
    """Ranked candidate records as a flat table, one row each: rank, feasible, score,
    binding, topology, device, then each part (SI value, or its label such as "68k" with
    ``labels``) and each metric (SI)."""
    import pandas as pd

    return pd.DataFrame(_candidate_rows(candidates, labels))


def candidates_csv(candidates: list[dict], *, labels: bool = True) -> str:
    """:func:`candidates_frame` as CSV text (lines ending in \\n), the same text pandas'
    ``to_csv(index=False)`` writes of it (tests/test_search.py compares them), made with the
    csv module: the command line's and the REST service's CSV without importing pandas
    (about 0.25 s CPU). Columns in order of first appearance; a column of numbers that has a
    float or a gap is written as floats (pandas' float64: 1 -> 1.0), one of whole numbers
    without a gap as integers; gaps, None and NaN as empty cells; anything else as str()."""
    rows = _candidate_rows(candidates, labels)
    columns = list(dict.fromkeys(key for row in rows for key in row))

    def empty(v: object) -> bool:
        return v is None or (isinstance(v, float) and math.isnan(v))

    def number(v: object) -> bool:
        return isinstance(v, (int, float)) and not isinstance(v, bool)

    cells = []
    for column in columns:
        values = [row.get(column) for row in rows]
        present = [v for v in values if not empty(v)]
        if (
            present
            and all(number(v) for v in present)
            and (len(present) < len(values) or any(isinstance(v, float) for v in present))
        ):
            cells.append(["" if empty(v) else repr(float(v)) for v in values])
        else:
            cells.append(["" if empty(v) else str(v) for v in values])
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(columns)
    writer.writerows(zip(*cells))
    return out.getvalue()


def _candidate_rows(candidates: list[dict], labels: bool) -> list[dict]:
    """The rows of :func:`candidates_frame`, as dicts."""
    rows = []
    for c in candidates:
        row = {
            "rank": c.get("rank"),
            "feasible": c.get("feasible"),
            "score": c.get("score"),
            "binding": c.get("binding", ""),
            "topology": c.get("topology"),
            "device": (c.get("transistor") or {}).get("id"),
        }
        row.update({role: p["label" if labels else "value"] for role, p in c.get("parts", {}).items()})
        row.update(c.get("metrics", {}))
        rows.append(row)
    return rows


def search_status(storage: BaseStorage, search_id: str) -> dict:
    """Status, progress and best so far of a search (JSON-ready). A stored search that can
    no longer be read (its creation cut short, or a spec this version rejects) is reported
    as failed with its reason rather than raising, so it can still be seen and deleted.

    A journal file this process has not replayed is answered from its snapshot and the
    records after it (storage.journal_summary), without replaying the journal."""
    summary = journal_summary(storage, ranked, same_design)
    if summary is not None:
        found = summary.study_id(search_id)
        if found is None:
            raise InputError.single("search", search_id, "the id of an existing search", title="unknown search")
        attrs = summary.studies[found]["user_attrs"]
        try:
            spec = stored_spec(search_id, attrs)
        except InputError as error:
            return _unreadable_status(search_id, attrs, str(error))
        counted = summary.tallies[found]
        return _status(search_id, attrs, spec, summary.counts(found), _best_so_far(attrs, spec, counted))
    try:
        study, spec = load_study(storage, search_id)
    except InputError as error:
        if error.title == "unknown search":
            raise
        return _unreadable_status(
            search_id, storage.get_study_user_attrs(storage.get_study_id_from_name(search_id)), str(error)
        )
    attrs = study_attrs(study)
    finished, running = trial_counts(study)
    best = _best_so_far(attrs, spec, None if attrs.get("ranking") else trial_tally(study, best=True))
    return _status(search_id, attrs, spec, (finished, running, trial_tally(study).feasible), best)


def _best_so_far(attrs: dict, spec: Spec, counted: TrialTally | None) -> dict | None:
    """The stored ranking's first candidate; before the ranking, the best so far kept on the
    tally ``counted`` (the first of rank_records over every finished trial), its candidate
    made once per new best."""
    ranking = attrs.get("ranking")
    if ranking:
        return ranking["candidates"][0] if ranking["candidates"] else None
    assert counted is not None, "a search without its ranking needs its tally"
    top = counted.best
    if top is None:
        return None
    if counted.memo.get("best", (None,))[0] != top.number:  # a new best: its record
        record = trial_record(top)
        counted.memo["best"] = (
            top.number,
            {**candidate_from_record(SearchSpace.build(spec), {**record, "trial": top.number}), "rank": 1}
            if record
            else None,
        )
    return counted.memo["best"][1]


def _unreadable_status(search_id: str, attrs: dict, why: str) -> dict:
    name = attrs.get("spec", {}).get("name") if isinstance(attrs.get("spec"), dict) else None
    budget = attrs.get("budget")
    return {
        "id": search_id,
        "name": name if isinstance(name, str) else None,
        "status": "failed",
        "reason": attrs.get("reason") or f"the stored search cannot be read: {why}",
        "trials_done": 0,
        "trials_running": 0,
        "trials_feasible": 0,
        "budget": budget if isinstance(budget, int) and not isinstance(budget, bool) else 0,
        "elapsed": 0.0,
        "created": attrs.get("created"),
        "best": None,
    }


def _status(search_id: str, attrs: dict, spec: Spec, counts: tuple[int, int, int], best: dict | None) -> dict:
    """The status document; ``counts``: (finished, running, feasible) trials."""
    finished, running, feasible = counts
    started = attrs.get("started")
    elapsed = attrs.get("elapsed") if attrs.get("status") == "done" else (time.time() - started if started else 0.0)
    return {
        "id": search_id,
        "name": spec.name,
        "status": attrs.get("status") or "failed",
        "reason": attrs.get("reason") if attrs.get("status") else "its creation was cut short",
        "trials_done": finished,
        "trials_running": running,
        "trials_feasible": feasible,
        "budget": int(attrs["budget"]),
        "elapsed": float(elapsed or 0.0),
        "created": attrs.get("created"),
        "best": best,
    }


def load_search(
    storage: BaseStorage,
    search_id: str,
    *,
    top: int = SHORTLIST_SIZE,
    samples: int = SHORTLIST_SAMPLES,
    limit: int | None = None,
) -> SearchResult:
    """The ranked candidates and front of a stored search (finished or not): at least ``top``
    candidates assessed in full, and with ``limit`` at most that many candidates (None: every
    ranked design). A finished search whose stored shortlist holds ``limit`` candidates is
    answered from it alone: the trials' records are not read back, nor the tail re-ranked
    (what the command line does after a search: it shows --top of them)."""
    study, spec = load_study(storage, search_id)
    space = SearchSpace.build(spec)
    ranking = study.user_attrs.get("ranking")
    if ranking and top <= len(ranking["candidates"]):
        summary = {k: ranking[k] for k in ("front", "infeasible") if k in ranking}
        summary["candidates"] = list(ranking["candidates"])
        if limit is None or limit > len(summary["candidates"]):
            shortlisted = {c.get("trial") for c in summary["candidates"]}
            ranked = fold_variants(space, rank_records(completed_records(study)))
            wanted = None if limit is None else limit - len(summary["candidates"])
            tail = candidates_from_records(space, [r for r in ranked if r["trial"] not in shortlisted][:wanted])
            for rank, c in enumerate(tail, len(summary["candidates"]) + 1):
                c["rank"] = rank
            summary["candidates"] += tail
    else:
        summary = summarise(space, study, top, samples)
    summary["candidates"] = summary["candidates"][:limit]
    best = summary["candidates"][0] if summary["candidates"] else None
    finished, running = trial_counts(study)
    status = _status(search_id, study_attrs(study), spec, (finished, running, trial_tally(study).feasible), best)
    return SearchResult(
        search_id,
        spec,
        study,
        summary["candidates"],
        summary["front"],
        status,
        summary.get("infeasible"),
    )


def list_searches(storage: BaseStorage) -> list[dict]:
    """Status of every search in ``storage``, newest first (without the best design). A
    search whose creation was cut short (no status yet) is listed as failed."""
    out = []
    summary = journal_summary(storage, ranked, same_design)  # a journal not replayed here: from its snapshot
    studies = (
        [(s["name"], s["user_attrs"]) for s in list(summary.studies.values())]  # copied at once: polls may add
        if summary is not None
        else [(s.study_name, s.user_attrs) for s in storage.get_all_studies()]  # study records only, no trials read
    )
    for name, attrs in studies:
        if "spec" not in attrs:
            continue  # not a stagefit search
        spec = attrs["spec"] if isinstance(attrs["spec"], dict) else {}
        out.append(
            {
                "id": name,
                "name": spec.get("name"),
                "status": attrs.get("status") or "failed",
                "budget": attrs.get("budget"),
                "created": attrs.get("created"),
            }
        )
    return sorted(out, key=lambda s: s.get("created") or "", reverse=True)


def cancel_search(storage: BaseStorage, search_id: str) -> None:
    """Stop a search at its next batch; finished trials are kept. Works in every state
    (a finished search stays as it is)."""
    study_id, attrs = stored_attrs(storage, search_id)
    if attrs.get("status") in ("queued", "running", None):
        storage.set_study_user_attr(study_id, "status", "cancelled")


def extend_search(storage: BaseStorage, search_id: str, trials: int) -> None:
    """Raise a search's budget by ``trials`` (0: as it was) and queue it again (resume or extend)."""
    if not isinstance(trials, int) or isinstance(trials, bool) or trials < 0:
        raise InputError.single("trials", trials, "a whole number of extra trials, 0 or more")
    study, _ = load_study(storage, search_id)
    study.set_user_attr("budget", int(study.user_attrs["budget"]) + trials)
    study.set_user_attr("reason", None)
    study.set_user_attr("status", "queued")


def delete_search(storage: BaseStorage, search_id: str) -> None:
    """Remove a search and its trials from the storage, whatever its state."""
    stored_attrs(storage, search_id)
    optuna.delete_study(study_name=search_id, storage=storage)
