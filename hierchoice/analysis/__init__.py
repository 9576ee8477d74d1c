"""Stage 4b, analysis: what the posterior says, as labelled tables with credible intervals.

Owns: population and individual tastes (:mod:`~hierchoice.analysis.tastes`), willingness-to-pay
(:mod:`~hierchoice.analysis.wtp`), what-if shares, sensitivity and elasticities (:mod:`~hierchoice.analysis.shares`).
May import: ``hierchoice.inference`` and everything below it; never diagnostics, the report or the CLI.
"""

from __future__ import annotations

from .shares import compare_shares, elasticities, predict_shares, read_market, sensitivity, share_draws
from .tastes import person_tastes, population_tastes, simulate_population_tastes, taste_shrinkage
from .wtp import person_wtp, population_wtp, price_attribute

__all__ = [
    "compare_shares", "elasticities", "person_tastes", "person_wtp", "population_tastes", "population_wtp",
    "predict_shares", "price_attribute", "read_market", "sensitivity", "share_draws", "simulate_population_tastes",
    "taste_shrinkage",
]
