"""Stage 4a, diagnostics: is the posterior trustworthy, and does the model predict?

Owns: convergence checks as records (:mod:`~hierchoice.diagnostics.checks`), predictive checks and holdout
validation (:mod:`~hierchoice.diagnostics.predictive`), PSIS-LOO and model comparison
(:mod:`~hierchoice.diagnostics.loo`), their plots (:mod:`~hierchoice.diagnostics.plots`), and the
``hierchoice check`` folder job (:mod:`~hierchoice.diagnostics.folder`, the one module here that uses all others).
May import: ``hierchoice.inference`` and everything below it.
"""

from __future__ import annotations

from .checks import (
    EBFMI_MIN,
    ESS_FAIL,
    ESS_MIN,
    LOG_SD_COLLAPSED,
    LOG_SD_LARGE,
    MAX_TREE_DEPTH,
    RHAT_FAIL,
    RHAT_MAX,
    VERDICTS,
    Check,
    checks_frame,
    convergence_checks,
    lognormal_sd_checks,
    overall_verdict,
    parameter_diagnostics,
    person_checks,
    population_checks,
    population_draws,
    sampler_checks,
)
from .folder import THRESHOLDS, check_folder, format_verdict
from .loo import (
    PARETO_K_UNUSABLE,
    PERSON_LOGLIK,
    compare_models,
    pareto_k_checks,
    person_log_marginal,
    person_loo,
    task_loo,
)
from .predictive import (
    HoldoutResult,
    fixed_taste_spec,
    hit_rate,
    holdout_split,
    holdout_validation,
    posterior_choice_probabilities,
    ppc_shares,
    prior_predictive,
    reliability,
    score_tasks,
    taste_draws,
)

__all__ = [
    "RHAT_MAX",
    "RHAT_FAIL",
    "ESS_MIN",
    "ESS_FAIL",
    "EBFMI_MIN",
    "MAX_TREE_DEPTH",
    "LOG_SD_COLLAPSED",
    "LOG_SD_LARGE",
    "VERDICTS",
    "Check",
    "population_draws",
    "parameter_diagnostics",
    "population_checks",
    "sampler_checks",
    "person_checks",
    "lognormal_sd_checks",
    "convergence_checks",
    "checks_frame",
    "overall_verdict",
    "taste_draws",
    "posterior_choice_probabilities",
    "hit_rate",
    "reliability",
    "ppc_shares",
    "prior_predictive",
    "holdout_split",
    "fixed_taste_spec",
    "score_tasks",
    "HoldoutResult",
    "holdout_validation",
    "PERSON_LOGLIK",
    "PARETO_K_UNUSABLE",
    "task_loo",
    "person_log_marginal",
    "person_loo",
    "pareto_k_checks",
    "compare_models",
    "check_folder",
    "format_verdict",
    "THRESHOLDS",
]
