"""The search: a spec and a catalog become an Optuna study over stock values and topologies.

Flow: :class:`SearchSpace` (ordered indices into each resistor's allowed values, the
topology, the device) -> a batch of trials asked from Optuna -> one vectorised evaluation
per topology, its devices stacked (:func:`evaluate_designs`: capacitors sized after the
resistors, every metric, hard limits and ratings as normalised violations, the
desirability score) -> told back with the spec's objectives and one constraint (the summed
violation, 0 = feasible) -> ranking and Pareto front.

A stored study is the whole record: the spec, status and budget are study user attrs and
every design's metrics, violations and score are the trial's user attr ``record``, so the
CLI, the REST service and remote workers read the same storage. Reproducible with a seed:
the same spec, seed and budget give the same trials in a single process.

Submodules, in the order of the flow: space, evaluation, enumeration (seeds of a small space), ranking,
study, results, run.
"""

from optimizer.scoring import pareto_mask
from optimizer.search.evaluation import evaluate_designs, evaluate_group
from optimizer.search.ranking import fold_variants, rank_key, rank_records, relax_one_limit, trial_record
from optimizer.search.results import (
    SearchResult,
    cancel_search,
    candidates_csv,
    candidates_frame,
    delete_search,
    extend_search,
    list_searches,
    load_search,
    search_status,
)
from optimizer.search.run import search, spec_search_id, with_search
from optimizer.search.space import ABSENT, Design, SearchSpace
from optimizer.search.study import (
    INTERRUPTED,
    SamplerFactory,
    create_search,
    fail_search,
    finish_search,
    neighbour_sampler,
    run_search,
)
from optimizer.storage import open_storage

__all__ = [
    "SearchSpace",
    "SearchResult",
    "open_storage",
    "create_search",
    "run_search",
    "finish_search",
    "neighbour_sampler",
    "SamplerFactory",
    "load_search",
    "search_status",
    "list_searches",
    "cancel_search",
    "delete_search",
    "extend_search",
    "fail_search",
    "search",
    "evaluate_designs",
    "evaluate_group",
    "rank_records",
    "pareto_mask",
    "trial_record",
    "candidates_csv",
    "candidates_frame",
    "INTERRUPTED",
    "spec_search_id",
    "with_search",
    "ABSENT",
    "rank_key",
    "fold_variants",
    "relax_one_limit",
    "Design",
]
