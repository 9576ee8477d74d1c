"""hierchoice: Bayesian hierarchical (panel mixed) logit models for choice panels."""

import logging as _logging

# PyTensor warns at import when it links BLAS through NumPy (pip installs); the
# message is about speed, not correctness, and would be the first thing users see.
_logging.getLogger("pytensor.tensor.blas").setLevel(_logging.ERROR)
import warnings as _warnings

_warnings.filterwarnings("ignore", message="PyTensor could not link to a BLAS installation", category=UserWarning)

from .exceptions import ArchiveError, DataError, FitError, HierchoiceError, SpecError
from .panel import ChoicePanel, Term, ValidationSummary, load_panel, long_to_wide, read_table, wide_to_long
from .fit import ChoiceFit, fit, population_summary, task_log_likelihood
from .archive import load_fit, save_fit
from .model import build_model, model_layout
from .checks import check_folder, convergence_checks, format_verdict
from .compare import compare_models, person_loo, task_loo
from .predictive import hit_rate, holdout_validation, ppc_shares, prior_predictive
from .tastes import person_tastes, population_tastes
from .wtp import person_wtp, population_wtp
from .shares import compare_shares, elasticities, predict_shares, sensitivity
from .report import write_report
from .simulate import SimAttribute, SimulatedPanel, benchmark_scenario, ferry_scenario, simulate_panel
from .spec import Spec, load_spec

__version__ = "0.1.0"

__all__ = [
    "ArchiveError",
    "ChoiceFit",
    "check_folder",
    "compare_models",
    "compare_shares",
    "convergence_checks",
    "elasticities",
    "format_verdict",
    "hit_rate",
    "holdout_validation",
    "person_loo",
    "person_tastes",
    "person_wtp",
    "population_tastes",
    "population_wtp",
    "ppc_shares",
    "predict_shares",
    "prior_predictive",
    "sensitivity",
    "task_loo",
    "write_report",
    "build_model",
    "fit",
    "load_fit",
    "model_layout",
    "population_summary",
    "save_fit",
    "task_log_likelihood",
    "ChoicePanel",
    "DataError",
    "FitError",
    "HierchoiceError",
    "SimAttribute",
    "SimulatedPanel",
    "Spec",
    "SpecError",
    "Term",
    "ValidationSummary",
    "benchmark_scenario",
    "ferry_scenario",
    "load_panel",
    "load_spec",
    "long_to_wide",
    "read_table",
    "simulate_panel",
    "wide_to_long",
]
