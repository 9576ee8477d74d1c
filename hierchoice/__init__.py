"""hierchoice: Bayesian hierarchical (panel mixed) logit models for choice panels."""

from .exceptions import ArchiveError, DataError, FitError, HierchoiceError, SpecError
from .panel import ChoicePanel, Term, ValidationSummary, load_panel, long_to_wide, read_table, wide_to_long
from .simulate import SimAttribute, SimulatedPanel, benchmark_scenario, ferry_scenario, simulate_panel
from .spec import Spec, load_spec

__version__ = "0.1.0"

__all__ = [
    "ArchiveError",
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
