"""Stage 4b, analysis: what the posterior says, as labelled tables with credible intervals.

Owns: population and individual tastes (:mod:`~hierchoice.analysis.tastes`), willingness-to-pay
(:mod:`~hierchoice.analysis.wtp`), what-if shares, sensitivity and elasticities (:mod:`~hierchoice.analysis.shares`).
May import: ``hierchoice.inference`` and everything below it; never diagnostics, the report or the CLI.
"""

from __future__ import annotations

from .shares import (
    PERSONS,
    compare_shares,
    elasticities,
    market_design,
    person_coefficients,
    predict_shares,
    read_market,
    sensitivity,
    share_draws,
)
from .tastes import (
    DEFAULT_PROB,
    WarningRecord,
    check_prob,
    log_records,
    person_latent_draws,
    person_tastes,
    population_taste_draws,
    population_tastes,
    simulate_population_tastes,
    summarize_draws,
    taste_shrinkage,
)
from .wtp import (
    MAX_NEAR_ZERO_MASS,
    NEAR_ZERO,
    person_wtp,
    person_wtp_draws,
    population_wtp,
    population_wtp_draws,
    price_attribute,
    wtp_units,
)

__all__ = [
    "DEFAULT_PROB",
    "WarningRecord",
    "log_records",
    "check_prob",
    "summarize_draws",
    "population_taste_draws",
    "population_tastes",
    "person_tastes",
    "person_latent_draws",
    "taste_shrinkage",
    "simulate_population_tastes",
    "NEAR_ZERO",
    "MAX_NEAR_ZERO_MASS",
    "price_attribute",
    "wtp_units",
    "person_wtp_draws",
    "population_wtp_draws",
    "person_wtp",
    "population_wtp",
    "PERSONS",
    "read_market",
    "market_design",
    "person_coefficients",
    "share_draws",
    "predict_shares",
    "sensitivity",
    "elasticities",
    "compare_shares",
]
