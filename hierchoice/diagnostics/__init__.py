"""Stage 4a, diagnostics: is the posterior trustworthy, and does the model predict?

Owns: convergence checks as records (:mod:`~hierchoice.diagnostics.checks`), predictive checks and holdout
validation (:mod:`~hierchoice.diagnostics.predictive`), PSIS-LOO and model comparison
(:mod:`~hierchoice.diagnostics.loo`), their plots (:mod:`~hierchoice.diagnostics.plots`), all of them as one
object for a fit (:func:`~hierchoice.diagnostics.overview.diagnose`), and the
``hierchoice check`` folder job (:mod:`~hierchoice.diagnostics.folder`, the one module here that uses all others).
May import: ``hierchoice.inference`` and everything below it.
"""

from __future__ import annotations

from .checks import (
    checks_frame,
    convergence_checks,
    overall_verdict,
    parameter_diagnostics,
)
from .folder import check_folder, format_verdict
from .loo import (
    compare_models,
    pareto_k_checks,
    person_log_marginal,
    person_loo,
    task_loo,
)
from .overview import Diagnostics, diagnose
from .plots import save_figure, write_diagnostic_plots
from .predictive import (
    hit_rate,
    holdout_validation,
    posterior_choice_probabilities,
    ppc_shares,
    prior_predictive,
    reliability,
)

__all__ = [
    "Diagnostics", "check_folder", "diagnose", "checks_frame", "compare_models", "convergence_checks", "format_verdict", "hit_rate",
    "holdout_validation", "overall_verdict", "parameter_diagnostics", "pareto_k_checks", "person_log_marginal",
    "person_loo", "posterior_choice_probabilities", "ppc_shares", "prior_predictive", "reliability", "save_figure",
    "task_loo", "write_diagnostic_plots",
]
