"""Stage 3, inference: sampling the model and the fit result with its results folder.

Owns: :func:`fit` (NUTS through PyMC, nutpie or numpyro; ADVI), :class:`ChoiceFit`, the results folder
(:func:`save_fit`, :func:`load_fit`). New samplers land here.
May import: ``hierchoice.model``, ``hierchoice.data``, ``hierchoice.spec``, the low modules (``_io``, ``_records``,
``exceptions``).
"""

from __future__ import annotations

from .results import POSTERIOR_FILE, ChoiceFit, load_fit, population_summary, save_fit
from .sampling import (
    REPORTED_VARS,
    add_log_likelihood,
    add_posterior_predictive,
    fit,
    resolve_backend,
    task_log_likelihood,
)

__all__ = [
    "POSTERIOR_FILE", "REPORTED_VARS", "ChoiceFit", "add_log_likelihood", "add_posterior_predictive", "fit", "load_fit", "population_summary",
    "resolve_backend", "save_fit", "task_log_likelihood",
]
