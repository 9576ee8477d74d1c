"""Beside the pipeline: many fits of simulated data to validate a design and a method.

Three questions that one fit cannot answer, each answered by fitting the model to many simulated data sets
(independent tasks, run on ``dask.distributed``; a local cluster of single-threaded worker processes by default).
Each workload returns a labelled :class:`xarray.Dataset`.

Owns, one concern a module (after the arrow: the modules of this package that it may import):

* :mod:`~hierchoice.validation.distributed`: running independent fits on Dask with deterministic seeds;
* :mod:`~hierchoice.validation.fitters`: the :class:`Fitter` protocol and :class:`NutsFitter`, the default fitter;
* :mod:`~hierchoice.validation.results` <- ``distributed``: per-fit bookkeeping, :func:`save_result` and
  :func:`load_result` (NetCDF);
* :mod:`~hierchoice.validation.sbc` <- ``distributed``, ``fitters``, ``results``: simulation-based calibration on
  your own design;
* :mod:`~hierchoice.validation.recovery` <- ``distributed``, ``fitters``, ``results``: bias and interval coverage
  at fixed true values;
* :mod:`~hierchoice.validation.power` <- ``recovery``, ``distributed``, ``fitters``, ``results``: how a target
  improves with the number of respondents;
* :mod:`~hierchoice.validation.plots` <- ``sbc``: rank histograms, ECDF differences, power curves.

May import: ``hierchoice.diagnostics``, ``hierchoice.inference`` and everything below them.
"""

from __future__ import annotations

from .distributed import (
    SINGLE_THREAD_ENV,
    TaskFailure,
    local_cluster,
    run_tasks,
    task_seed,
    task_seed_sequence,
)
from .fitters import Fitter, NutsFitter
from .plots import plot_ecdf_difference, plot_power_curve, plot_rank_histograms
from .power import SdDetection, WtpWidth, power_analysis
from .recovery import parameter_recovery
from .results import load_result, save_result
from .sbc import (
    ecdf_band,
    format_calibration,
    rank_uniformity,
    simulate_choices,
    simulation_based_calibration,
)

__all__ = [
    "Fitter", "NutsFitter", "WtpWidth", "SdDetection", "simulate_choices", "simulation_based_calibration",
    "rank_uniformity", "ecdf_band", "parameter_recovery", "power_analysis", "plot_rank_histograms",
    "plot_ecdf_difference", "plot_power_curve", "save_result", "load_result", "format_calibration",
    "SINGLE_THREAD_ENV", "TaskFailure", "task_seed_sequence", "task_seed", "local_cluster", "run_tasks",
]
