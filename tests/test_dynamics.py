"""Lag, lead, lagged choice and initial-conditions covariates, checked by hand.

The table has two persons whose tasks are given out of order (so the ordering by the task
column is exercised) and an alternative absent from one task.

    person 10, in task order:  task 1: a=4   b=5*  c=6    (* chosen)
                               task 2: a=7   b=8*         (c absent)
                               task 3: a=1   b=2*  c=3
    person 20, in task order:  task 5: a=4.5 b=5.5 c=6.5*
                               task 6: a=.5* b=.25 c=.75
                               task 7: a=1.5 b=2.5 c=3.5*
                               task 9: a=7.5* b=8.5 c=9.5
"""

from __future__ import annotations

import copy
from typing import Any

import numpy as np
import pandas as pd
import pytest

from hierchoice import ChoicePanel, DataError

ROWS = [
    (10, 3, "a", 0, 1.0), (10, 3, "b", 1, 2.0), (10, 3, "c", 0, 3.0),
    (10, 1, "a", 0, 4.0), (10, 1, "b", 1, 5.0), (10, 1, "c", 0, 6.0),
    (10, 2, "a", 0, 7.0), (10, 2, "b", 1, 8.0),
    (20, 7, "a", 0, 1.5), (20, 7, "b", 0, 2.5), (20, 7, "c", 1, 3.5),
    (20, 5, "a", 0, 4.5), (20, 5, "b", 0, 5.5), (20, 5, "c", 1, 6.5),
    (20, 9, "a", 1, 7.5), (20, 9, "b", 0, 8.5), (20, 9, "c", 0, 9.5),
    (20, 6, "a", 1, 0.5), (20, 6, "b", 0, 0.25), (20, 6, "c", 0, 0.75),
]
TABLE = pd.DataFrame(ROWS, columns=["pid", "task", "alt", "ch", "x"])


def spec_with(**dynamics: Any) -> dict[str, Any]:
    return {
        "columns": {"person": "pid", "task": "task", "alternative": "alt", "chosen": "ch"},
        "attributes": {"x": {}},
        "dynamics": dynamics,
    }


LAGS = dict(lagged_choice=True, lag=["x"], lead=["x"])
FULL = LAGS | dict(initial_conditions=True, initial_means=["x"])
ABC = ["a", "b", "c"]


def term(panel: ChoicePanel, name: str) -> np.ndarray:
    return panel.X[..., panel.attributes.index(name)]


# --------------------------------------------------------------------------- first_task = "flag"


@pytest.fixture
def flagged() -> ChoicePanel:
    # without initial conditions: with them, "flag" removes each person's first task (the initial condition)
    return ChoicePanel.from_frame(TABLE, spec_with(first_task="flag", **LAGS))


def test_flag_keeps_every_task_in_task_order(flagged: ChoicePanel) -> None:
    assert flagged.persons == (10, 20)
    assert flagged.task_ids.tolist() == [[1, 2, 3, None], [5, 6, 7, 9]]
    np.testing.assert_array_equal(flagged.chosen, [[1, 1, 1, -1], [2, 0, 2, 0]])
    assert flagged.attributes == ("x", "lagged_choice", "x_lag", "x_lead")
    assert [t.kind for t in flagged.terms] == ["numeric", "lagged_choice", "lag", "lead"]


def test_flag_lag_missing_by_hand(flagged: ChoicePanel) -> None:
    # 10/1: first task; 10/3: c was absent from 10/2 (no lag) and it is the last task (no lead);
    # 20/5: first; 20/9: last. 10/2 has no c row, so nothing of it is missing.
    np.testing.assert_array_equal(flagged.lag_missing, [[True, False, True, False], [True, False, False, True]])
    assert flagged.summary.filled == {
        'tasks kept with lag/lead set to 0 (dynamics.first_task = "flag"; see the panel\'s lag_missing mask)': 4
    }
    assert flagged.summary.removed == {}


def test_flag_lagged_choice_by_hand(flagged: ChoicePanel) -> None:
    lc = term(flagged, "lagged_choice")
    np.testing.assert_array_equal(lc[0, :3], [[0, 0, 0], [0, 1, 0], [0, 1, 0]])
    np.testing.assert_array_equal(lc[1], [[0, 0, 0], [0, 0, 1], [1, 0, 0], [0, 0, 1]])


def test_flag_lag_by_hand(flagged: ChoicePanel) -> None:
    lag = term(flagged, "x_lag")
    np.testing.assert_array_equal(lag[0, :3], [[0, 0, 0], [4, 5, 0], [7, 8, 0]])  # (10, 3, c): absent before
    np.testing.assert_array_equal(lag[1], [[0, 0, 0], [4.5, 5.5, 6.5], [0.5, 0.25, 0.75], [1.5, 2.5, 3.5]])


def test_flag_lead_by_hand(flagged: ChoicePanel) -> None:
    lead = term(flagged, "x_lead")
    np.testing.assert_array_equal(lead[0, :3], [[7, 8, 0], [1, 2, 0], [0, 0, 0]])  # (10, 1, c): absent after
    np.testing.assert_array_equal(lead[1], [[0.5, 0.25, 0.75], [1.5, 2.5, 3.5], [7.5, 8.5, 9.5], [0, 0, 0]])


def test_initial_conditions_by_hand() -> None:
    # Wooldridge (2005, J. Applied Econometrics 20(1)): condition on the first observed choice and
    # the person means of the exogenous attributes. Reference alternative: the first, "a".
    flagged = ChoicePanel.from_frame(TABLE, spec_with(first_task="flag", **FULL))
    assert flagged.covariates == ("first_choice:b", "first_choice:c", "mean:x")
    # person 10 first chose b (task 1), person 20 first chose c (task 5)
    np.testing.assert_array_equal(flagged.Z[:, :2], [[1, 0], [0, 1]])
    # the first task is conditioned on, not modelled: it leaves the panel; the other tasks without a lead stay
    assert flagged.task_ids.tolist() == [[2, 3, None], [6, 7, 9]]
    np.testing.assert_array_equal(flagged.lag_missing, [[False, True, False], [False, False, True]])
    # means over the tasks kept in the panel
    assert flagged.Z[0, 2] == pytest.approx((7 + 8 + 1 + 2 + 3) / 5)
    assert flagged.Z[1, 2] == pytest.approx((0.5 + 0.25 + 0.75 + 1.5 + 2.5 + 3.5 + 7.5 + 8.5 + 9.5) / 9)


def test_to_long_carries_dynamic_terms(flagged: ChoicePanel) -> None:
    long = flagged.to_long().set_index(["pid", "task", "alt"])
    assert long.loc[(20, 7, "a"), "lagged_choice"] == 1.0
    assert long.loc[(20, 7, "a"), "x_lag"] == 0.5
    assert long.loc[(10, 2, "b"), "x_lead"] == 2.0
    assert len(long) == len(TABLE)


# --------------------------------------------------------------------------- first_task = "drop"


@pytest.fixture
def dropped() -> ChoicePanel:
    return ChoicePanel.from_frame(TABLE, spec_with(first_task="drop", **FULL))


def test_drop_removes_tasks_without_lag_or_lead(dropped: ChoicePanel) -> None:
    # removed: 10/1 (first), 10/3 (c has no lag; last), 20/5 (first), 20/9 (last)
    assert dropped.task_ids.tolist() == [[2, None], [6, 7]]
    np.testing.assert_array_equal(dropped.task_mask, [[True, False], [True, True]])
    assert not dropped.lag_missing.any()
    assert dropped.summary.removed == {
        'tasks without a previous/next task for the lag, lead or lagged choice (dynamics.first_task = "drop")': 4
    }
    assert dropped.summary.tasks == 3 and dropped.summary.tasks_per_person == (1, 1.5, 2)
    assert any("initial condition" in note for note in dropped.summary.notes)


def test_drop_values_by_hand(dropped: ChoicePanel) -> None:
    np.testing.assert_array_equal(term(dropped, "x_lag")[0, 0], [4, 5, 0])
    np.testing.assert_array_equal(term(dropped, "x_lead")[0, 0], [1, 2, 0])
    np.testing.assert_array_equal(term(dropped, "lagged_choice")[1], [[0, 0, 1], [1, 0, 0]])
    np.testing.assert_array_equal(dropped.available[0, 0], [True, True, False])


def test_drop_initial_conditions_by_hand(dropped: ChoicePanel) -> None:
    # the first choice comes from the dropped first task; the means from the kept tasks only
    np.testing.assert_array_equal(dropped.Z[:, :2], [[1, 0], [0, 1]])
    assert dropped.Z[0, 2] == pytest.approx((7 + 8) / 2)
    assert dropped.Z[1, 2] == pytest.approx((0.5 + 0.25 + 0.75 + 1.5 + 2.5 + 3.5) / 6)


def test_lagged_choice_alone_drops_only_first_tasks() -> None:
    p = ChoicePanel.from_frame(TABLE, spec_with(lagged_choice=True))
    assert p.task_ids.tolist() == [[2, 3, None], [6, 7, 9]]
    assert sum(p.summary.removed.values()) == 2
    np.testing.assert_array_equal(term(p, "lagged_choice")[0, :2], [[0, 1, 0], [0, 1, 0]])


def test_lead_alone_drops_last_tasks_and_gaps() -> None:
    p = ChoicePanel.from_frame(TABLE, spec_with(lead=["x"]))
    # 10/1: c absent from 10/2; 10/3 and 20/9: last
    assert p.task_ids.tolist() == [[2, None, None], [5, 6, 7]]
    assert sum(p.summary.removed.values()) == 3
    assert p.attributes == ("x", "x_lead")


def test_dynamics_taste_and_attribute_taste() -> None:
    spec = spec_with(lagged_choice=True, lag=["x"], taste="normal")
    spec["attributes"]["x"] = {"taste": "normal"}
    p = ChoicePanel.from_frame(TABLE, spec)
    assert {t.name: t.taste for t in p.terms} == {"x": "normal", "lagged_choice": "normal", "x_lag": "normal"}
    assert {t.name: t.source for t in p.terms}["x_lag"] == "x"


def test_drop_that_removes_everything_is_an_error() -> None:
    one_task = TABLE[TABLE["task"].isin([1, 5])]
    with pytest.raises(DataError, match="removes every task"):
        ChoicePanel.from_frame(one_task, spec_with(lagged_choice=True))


def test_task_order_follows_the_task_column_not_the_rows() -> None:
    shuffled = TABLE.sample(frac=1.0, random_state=11).reset_index(drop=True)
    spec = spec_with(first_task="flag", **FULL)
    spec["data"] = {"alternatives": ABC}
    a = ChoicePanel.from_frame(TABLE, spec).to_xarray()
    b = ChoicePanel.from_frame(shuffled, spec).to_xarray().sel(person=[10, 20])
    for name in ("x", "available", "chosen", "lag_missing", "task_id", "z"):
        np.testing.assert_array_equal(a[name].values, b[name].values, err_msg=name)


def test_text_task_ids_are_ordered_as_text() -> None:
    table = TABLE.assign(task=TABLE["task"].map(lambda t: f"t{t}"))
    p = ChoicePanel.from_frame(table, spec_with(lagged_choice=True, first_task="flag"))
    assert p.task_ids.tolist() == [["t1", "t2", "t3", None], ["t5", "t6", "t7", "t9"]]


# --------------------------------------------------------------------------- availability and opt-out


def test_initial_means_skip_unavailable_and_opt_out_rows() -> None:
    # a third person (first choice a), so that every first-choice dummy varies across persons
    third = pd.DataFrame([(30, 1, "a", 1, 1.0), (30, 1, "b", 0, 2.0), (30, 1, "c", 0, 3.0),
                          (30, 2, "a", 0, 2.0), (30, 2, "b", 1, 3.0), (30, 2, "c", 0, 1.0)], columns=TABLE.columns)
    table = pd.concat([TABLE, third], ignore_index=True).assign(av=1)
    # mark (10, 3, c) unavailable: its x must not enter person 10's mean
    table.loc[(table.pid == 10) & (table.task == 3) & (table.alt == "c"), "av"] = 0
    none_rows = table[["pid", "task"]].drop_duplicates().assign(alt="none", ch=0, x=np.nan, av=1)
    table = pd.concat([table, none_rows], ignore_index=True)
    spec = spec_with(first_task="flag", **FULL)
    spec["columns"]["available"] = "av"
    spec["constants"] = {"reference": "none"}
    spec["data"] = {"opt_out": "none"}
    p = ChoicePanel.from_frame(table, spec)
    assert p.covariates == ("first_choice:a", "first_choice:b", "first_choice:c", "mean:x")
    np.testing.assert_array_equal(p.Z[:, :3], [[0, 1, 0], [0, 0, 1], [1, 0, 0]])
    # the first tasks are only the initial condition (not in the panel), so the means skip them too
    assert p.Z[0, 3] == pytest.approx((7 + 8 + 1 + 2) / 4)
    assert p.Z[1, 3] == pytest.approx(34.5 / 9)
    assert p.Z[2, 3] == pytest.approx(6 / 3)
    # the unavailable (10, 3, c) needs no lag, so person 10's task 3 is complete; its lead is missing (last)
    np.testing.assert_array_equal(p.lag_missing[0], [False, True, False])
    # the opt-out's lag is 0 (its attributes are never used) and it is never "missing"
    none = p.alternatives.index("none")
    assert (term(p, "x_lag")[..., none] == 0).all()


def test_lagged_choice_of_the_opt_out() -> None:
    table = TABLE.copy()
    none_rows = table[["pid", "task"]].drop_duplicates().assign(alt="none", ch=0, x=np.nan)
    table = pd.concat([table, none_rows], ignore_index=True)
    # person 20 takes the opt-out in task 6 instead of a
    table.loc[(table.pid == 20) & (table.task == 6), "ch"] = 0
    table.loc[(table.pid == 20) & (table.task == 6) & (table.alt == "none"), "ch"] = 1
    spec = spec_with(lagged_choice=True, first_task="flag")
    spec["constants"] = {"reference": "none"}
    spec["data"] = {"opt_out": "none"}
    p = ChoicePanel.from_frame(table, spec)
    lc = p.to_xarray()["x"].sel(attribute="lagged_choice", person=20)
    assert lc.sel(task=2, alternative="none").item() == 1.0
    assert lc.sel(task=2).sum().item() == 1.0


def test_spec_copy_is_not_modified() -> None:
    spec = spec_with(first_task="flag", **FULL)
    before = copy.deepcopy(spec)
    ChoicePanel.from_frame(TABLE, spec)
    assert spec == before


def test_initial_mean_undefined_when_only_the_opt_out_is_offered() -> None:
    table = TABLE.assign(av=1)
    none_rows = table[["pid", "task"]].drop_duplicates().assign(alt="none", ch=0, x=np.nan, av=1)
    # person 30 is only ever offered the opt-out, so has no value of x to average
    third = pd.DataFrame([(30, t, a, int(a == "none"), np.nan, int(a == "none")) for t in (1, 2)
                          for a in ("a", "none")], columns=["pid", "task", "alt", "ch", "x", "av"])
    table = pd.concat([table, none_rows, third], ignore_index=True)
    spec = spec_with(first_task="flag", **FULL)
    spec["columns"]["available"] = "av"
    spec["constants"] = {"reference": "none"}
    spec["data"] = {"opt_out": "none"}
    with pytest.raises(DataError, match=r"initial_means: persons 30 have no available alternative"):
        ChoicePanel.from_frame(table, spec)
