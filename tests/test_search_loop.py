"""The search loop's own shortcuts against the plain path they stand for: the rank kept by a
record's text against ranking.rank_key parsing the record."""

from __future__ import annotations

import json
from pathlib import Path

import optuna
import pytest
from optuna.trial import TrialState

from optimizer.search import create_search, rank_key, run_search, study as study_module, with_search
from optimizer.spec import load_spec
from optimizer.storage import open_storage

SPEC = Path(__file__).resolve().parents[1] / "specs" / "bench_stock_preamp.yaml"


@pytest.mark.parametrize("limit", [3, 1 << 16])
def test_the_rank_memo_ranks_every_trial_as_rank_key(limit: int, monkeypatch: pytest.MonkeyPatch) -> None:
    store = open_storage(None)
    search_id = create_search(with_search(load_spec(SPEC), trials=400, seed=0), store)
    run_search(store, search_id, finish=False)  # the module's memo, remembered as the search made each record
    trials = optuna.load_study(study_name=search_id, storage=store).get_trials(deepcopy=False)
    done = [t for t in trials if t.state == TrialState.COMPLETE]
    assert len(done) == 400
    monkeypatch.setattr(study_module.RankMemo, "LIMIT", limit)  # a small one is cleared again and again
    fresh, remembered = study_module.RankMemo(rank_key), study_module.RankMemo(rank_key)
    for t in done[::2]:
        remembered.remember(t.user_attrs["record"], json.loads(t.user_attrs["record"]))
    for t in done:
        assert study_module.ranked(t) == fresh(t) == remembered(t) == fresh(t) == rank_key(t)  # twice: kept
    feasible = {rank_key(t)[0] for t in done}
    assert feasible == {0, 1}  # both kinds of key met (feasible by score, infeasible by violation)
    assert study_module.RankMemo(rank_key)(optuna.trial.create_trial(value=1.0)) == rank_key(
        optuna.trial.create_trial(value=1.0)
    )  # a trial without a record
