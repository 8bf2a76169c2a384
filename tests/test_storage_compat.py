"""The Optuna boundary: the installed Optuna is inside the range pyproject.toml pins, and
every private name optimizer/storage.py relies on exists in it."""

from __future__ import annotations

import sys
from importlib.metadata import version
from pathlib import Path

from packaging.requirements import Requirement

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - Python 3.10
    import tomli as tomllib

ROOT = Path(__file__).resolve().parents[1]


def _optuna_requirement() -> Requirement:
    project = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))["project"]
    return next(Requirement(d) for d in project["dependencies"] if Requirement(d).name == "optuna")


def test_optuna_is_pinned_above_and_below_and_the_installed_one_fits() -> None:
    requirement = _optuna_requirement()
    operators = {spec.operator for spec in requirement.specifier}
    assert ">=" in operators and "<" in operators  # a floor and a ceiling
    assert requirement.specifier.contains(version("optuna"))


def test_the_private_names_storage_uses_exist() -> None:
    import optuna

    from optimizer import storage

    memory = optuna.storages.InMemoryStorage()
    study = optuna.create_study(storage=memory)
    trial = study.ask()
    assert isinstance(storage.trial_id(trial), int) and isinstance(storage.study_id(study), int)
    assert memory.get_trial(storage.trial_id(trial)).number == trial.number
    assert storage.is_heartbeat_enabled(memory) is False  # in memory: no heartbeat
    assert hasattr(storage._rdb_models(), "TrialModel")
    assert isinstance(storage.BaseJournalFileLock, type)
    # the journal's record code for a new trial, which the waiting-trial count reads (its file format)
    from optuna.storages.journal._storage import JournalOperation

    assert storage._CREATE_TRIAL == JournalOperation.CREATE_TRIAL


def test_tell_stores_what_study_tell_stores() -> None:
    """storage.tell (no returned deep copy) against Optuna's own Study.tell on twin studies:
    the same state, values and constraint stored, and the sampler's after_trial called."""
    import optuna

    from optimizer import storage

    calls: list[int] = []

    class Recording(optuna.samplers.RandomSampler):
        def after_trial(self, study, trial, state, values):  # type: ignore[no-untyped-def]
            calls.append(trial.number)
            super().after_trial(study, trial, state, values)

    stored = []
    for finish in (lambda s, t, v: s.tell(t, v), storage.tell):
        study = optuna.create_study(directions=["minimize", "maximize"], sampler=Recording(seed=3))
        trial = study.ask()
        trial.suggest_int("x", 0, 9)
        trial.set_constraint("violation", 0.25)
        finish(study, trial, [1.5, 2])
        frozen = study.get_trials(deepcopy=False)[0]
        stored.append((frozen.state, frozen.values, frozen.params, frozen.system_attrs))
    assert stored[0] == stored[1]
    assert stored[0][0] == optuna.trial.TrialState.COMPLETE and stored[0][1] == [1.5, 2.0]
    assert calls == [0, 0]


def test_the_journal_replay_names_the_snapshot_and_memory_savings_use_exist(tmp_path) -> None:
    """The journal's record codes the snapshot's summary and the name interning read, and the
    replay internals the shared distributions and the snapshot of a replayed state use."""
    import optuna
    from optuna.storages.journal._storage import JournalOperation, JournalStorageReplayResult

    from optimizer import storage

    assert storage._STUDY_OPS == (
        JournalOperation.CREATE_STUDY,
        JournalOperation.DELETE_STUDY,
        JournalOperation.SET_STUDY_USER_ATTR,
        JournalOperation.SET_STUDY_SYSTEM_ATTR,
    )
    assert storage._TRIAL_OPS == (
        JournalOperation.CREATE_TRIAL,
        JournalOperation.SET_TRIAL_PARAM,
        JournalOperation.SET_TRIAL_STATE_VALUES,
        JournalOperation.SET_TRIAL_USER_ATTR,
        JournalOperation.SET_TRIAL_SYSTEM_ATTR,
    )
    assert storage._SET_TRIAL_PARAM == JournalOperation.SET_TRIAL_PARAM
    assert set(storage._SET_TRIAL_ATTRS) == {
        JournalOperation.SET_TRIAL_USER_ATTR,
        JournalOperation.SET_TRIAL_SYSTEM_ATTR,
    }
    for name in (
        "_apply_create_trial",
        "_apply_set_trial_param",
        "_apply_set_trial_state_values",
        "_apply_set_trial_user_attr",
        "_apply_set_trial_system_attr",
        "_trial_exists_and_updatable",
        "_apply_create_study",
        "_apply_delete_study",
    ):
        assert callable(getattr(JournalStorageReplayResult, name)), name
    journal = storage.open_storage(tmp_path / "c.journal")
    study = optuna.create_study(storage=journal)
    study.ask({"x": optuna.distributions.IntDistribution(0, 9)})
    replay = journal._replay_result
    assert isinstance(replay, storage._SharedDistributions) and replay.log_number_read > 0
    assert isinstance(replay._trials, dict) and isinstance(replay._study_id_to_trial_ids, dict)
    assert isinstance(replay._trial_id_to_study_id, dict) and isinstance(replay._studies, dict)
    assert isinstance(replay._next_study_id, int) and isinstance(journal._worker_id_prefix, str)
    assert hasattr(journal, "_thread_lock") and callable(journal._sync_with_backend)
