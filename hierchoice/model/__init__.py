"""Stage 2, the model: a panel and a spec become a PyMC panel mixed logit (a pure function).

Owns: :func:`build_model` and the internal scaling (:class:`ModelLayout`), the difference-form panel likelihood
(:mod:`~hierchoice.model.likelihood`) and its fused numba Op with exact gradient (:mod:`~hierchoice.model.logit_op`).
May import: ``hierchoice.data``, ``hierchoice.spec``, ``hierchoice.exceptions``. Samples nothing.
"""

from __future__ import annotations

from .build import POPULATION_VARS, PRIOR_SD, ModelLayout, build_model, model_layout
from .likelihood import (
    DifferenceData,
    choice_probabilities,
    difference_data,
    task_loglik_numpy,
)

__all__ = [
    "POPULATION_VARS", "PRIOR_SD", "DifferenceData", "ModelLayout", "build_model", "choice_probabilities",
    "difference_data", "model_layout", "task_loglik_numpy",
]
