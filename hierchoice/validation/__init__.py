"""Beside the pipeline: many fits of simulated data to validate a design and a method.

Owns: simulation-based calibration, parameter recovery and power analysis (:mod:`~hierchoice.validation.calibrate`)
and running independent fits on Dask with deterministic seeds (:mod:`~hierchoice.validation.distributed`).
May import: ``hierchoice.diagnostics``, ``hierchoice.inference`` and everything below them.
"""

from __future__ import annotations

from .calibrate import (
    Fitter,
    NutsFitter,
    SdDetection,
    WtpWidth,
    ecdf_band,
    format_calibration,
    load_result,
    parameter_recovery,
    plot_ecdf_difference,
    plot_power_curve,
    plot_rank_histograms,
    power_analysis,
    rank_uniformity,
    save_result,
    simulate_choices,
    simulation_based_calibration,
)
from .distributed import (
    SINGLE_THREAD_ENV,
    TaskFailure,
    local_cluster,
    run_tasks,
    task_seed,
    task_seed_sequence,
)

__all__ = [
    "Fitter",
    "NutsFitter",
    "WtpWidth",
    "SdDetection",
    "simulate_choices",
    "simulation_based_calibration",
    "rank_uniformity",
    "ecdf_band",
    "parameter_recovery",
    "power_analysis",
    "plot_rank_histograms",
    "plot_ecdf_difference",
    "plot_power_curve",
    "save_result",
    "load_result",
    "format_calibration",
    "SINGLE_THREAD_ENV",
    "TaskFailure",
    "task_seed_sequence",
    "task_seed",
    "local_cluster",
    "run_tasks",
]
