"""hierchoice: Bayesian hierarchical (panel mixed) logit models for choice panels.

The package is laid out as the pipeline it runs, each stage importing only the stages below it::

    spec, exceptions, _io, _records      the spec and the low helpers every stage uses
    data/          table -> validated ChoicePanel
    model/         panel + spec -> PyMC model; the likelihood and its fused Op
    simulate       invented panels with known tastes (beside the pipeline)
    inference/     sampling (fit) and the result object with its results folder
    diagnostics/   convergence, predictive checks, LOO, plots, the check-folder job
    analysis/      tastes, willingness-to-pay, shares
    validation/    calibration, recovery and power (many fits, Dask)
    report/        the HTML report
    demo, cli      the command line

Importing the package loads no sampling backend (PyMC, PyTensor, nutpie, numba, JAX) and changes no global
warning filter; those load on first use.
"""

from ._version import __version__
from .analysis import (
    compare_shares,
    elasticities,
    person_tastes,
    person_wtp,
    population_tastes,
    population_wtp,
    predict_shares,
    sensitivity,
)
from .data import ChoicePanel, Term, ValidationSummary, load_panel, long_to_wide, read_table, wide_to_long
from .diagnostics import (
    Diagnostics,
    check_folder,
    compare_models,
    convergence_checks,
    diagnose,
    format_verdict,
    hit_rate,
    holdout_validation,
    person_loo,
    ppc_shares,
    prior_predictive,
    task_loo,
)
from .exceptions import ArchiveError, DataError, FitError, HierchoiceError, HierchoiceWarning, SpecError
from .inference import (
    ChoiceFit,
    fit,
    load_fit,
    population_summary,
    save_fit,
    task_log_likelihood,
)
from .model import build_model, model_layout
from .report import write_report
from .simulate import (
    SimAttribute,
    SimulatedPanel,
    benchmark_scenario,
    ferry_scenario,
    simulate_panel,
)
from .spec import Spec, load_spec
from .validation import (
    parameter_recovery,
    power_analysis,
    rank_uniformity,
    simulate_choices,
    simulation_based_calibration,
)

__all__ = [
    "__version__",
    # errors
    "ArchiveError", "DataError", "FitError", "HierchoiceError", "HierchoiceWarning", "SpecError",
    # data and spec
    "ChoicePanel", "Spec", "Term", "ValidationSummary", "load_panel", "load_spec", "long_to_wide", "read_table",
    "wide_to_long", "SimAttribute", "SimulatedPanel", "benchmark_scenario", "ferry_scenario", "simulate_panel",
    # model and inference
    "build_model", "model_layout", "ChoiceFit", "fit", "load_fit", "population_summary", "save_fit",
    "task_log_likelihood",
    # diagnostics
    "Diagnostics", "check_folder", "compare_models", "convergence_checks", "diagnose", "format_verdict", "hit_rate", "holdout_validation",
    "person_loo", "ppc_shares", "prior_predictive", "task_loo",
    # analysis and report
    "compare_shares", "elasticities", "person_tastes", "person_wtp", "population_tastes", "population_wtp",
    "predict_shares", "sensitivity", "write_report",
    # validation (many fits)
    "parameter_recovery", "power_analysis", "rank_uniformity", "simulate_choices", "simulation_based_calibration",
]
