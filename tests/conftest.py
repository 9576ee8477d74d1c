"""Shared fixtures for the data-layer tests: a small, valid long table and its spec."""

from __future__ import annotations

import copy
from typing import Any

import pandas as pd
import pytest
from hypothesis import HealthCheck, settings

# Property tests keep example counts modest and have no per-example deadline (pandas is slow
# to warm up); each test sets its own max_examples.
settings.register_profile(
    "hierchoice", deadline=None, suppress_health_check=[HealthCheck.too_slow], print_blob=True
)
settings.load_profile("hierchoice")


SIMPLE_SPEC: dict[str, Any] = {
    "columns": {"person": "respondent", "task": "task", "alternative": "option", "chosen": "chosen"},
    "attributes": {"fare": {"taste": "lognormal", "sign": "negative"}, "minutes": {"taste": "normal"}},
}


def _simple_rows() -> list[dict[str, Any]]:
    """Two respondents, two tasks each, three options; one chosen per task (hand-made)."""
    rows = []
    picks = {(1, 1): "b", (1, 2): "a", (2, 1): "c", (2, 2): "b"}
    for person in (1, 2):
        for task in (1, 2):
            for j, option in enumerate(("a", "b", "c")):
                rows.append({
                    "respondent": person, "task": task, "option": option,
                    "chosen": int(picks[person, task] == option),
                    "fare": 2.0 + j + task, "minutes": 30.0 - 5 * j + person,
                })
    return rows


@pytest.fixture
def simple_long() -> pd.DataFrame:
    return pd.DataFrame(_simple_rows())


@pytest.fixture
def simple_spec() -> dict[str, Any]:
    return copy.deepcopy(SIMPLE_SPEC)
