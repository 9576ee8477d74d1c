"""The panel: padding, masks and coding checked by hand on tiny tables; every error is a DataError."""

from __future__ import annotations

import copy
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from hierchoice import ChoicePanel, DataError, HierchoiceError, ValidationSummary, load_panel, read_table

NAN = np.nan

# --------------------------------------------------------------------------- an unbalanced panel by hand

# respondent p1 has three tasks, p2 one. Choice sets vary: an explicit availability column marks
# (p1, 1, c) and (p1, 3, a) unavailable, and b is absent from (p1, 2) and (p2, 1).
UNBALANCED = pd.DataFrame(
    [
        ("p1", 1, "a", 0, 1, 2.0, 10.0),
        ("p1", 1, "b", 1, 1, 3.0, 20.0),
        ("p1", 1, "c", 0, 0, NAN, NAN),
        ("p1", 2, "a", 1, 1, 4.0, 30.0),
        ("p1", 2, "c", 0, 1, 5.0, 40.0),
        ("p1", 3, "b", 0, 1, 6.0, 50.0),
        ("p1", 3, "c", 1, 1, 7.0, 60.0),
        ("p1", 3, "a", 0, 0, 8.0, 70.0),
        ("p2", 1, "c", 0, 1, 1.5, 15.0),
        ("p2", 1, "a", 1, 1, 2.5, 25.0),
    ],
    columns=["respondent", "task", "option", "chosen", "offered", "fare", "minutes"],
)
UNBALANCED_SPEC: dict[str, Any] = {
    "columns": {"person": "respondent", "task": "task", "alternative": "option", "chosen": "chosen",
                "available": "offered"},
    "attributes": {"fare": {}, "minutes": {"taste": "normal"}},
}


@pytest.fixture
def unbalanced() -> ChoicePanel:
    return ChoicePanel.from_frame(UNBALANCED, UNBALANCED_SPEC)


def test_unbalanced_shapes_and_labels(unbalanced: ChoicePanel) -> None:
    p = unbalanced
    assert p.X.shape == (2, 3, 3, 2)
    assert p.persons == ("p1", "p2")
    assert p.alternatives == ("a", "b", "c")  # order of first appearance
    assert p.attributes == ("fare", "minutes")
    assert [t.taste for t in p.terms] == ["fixed", "normal"]
    assert p.n_persons == 2 and p.n_tasks == 4
    np.testing.assert_array_equal(p.tasks_per_person, [3, 1])


def test_unbalanced_masks_by_hand(unbalanced: ChoicePanel) -> None:
    p = unbalanced
    np.testing.assert_array_equal(p.task_mask, [[True, True, True], [True, False, False]])
    np.testing.assert_array_equal(
        p.available.astype(int),
        [[[1, 1, 0], [1, 0, 1], [0, 1, 1]],
         [[1, 0, 1], [0, 0, 0], [0, 0, 0]]],
    )
    np.testing.assert_array_equal(p.chosen, [[1, 0, 2], [0, -1, -1]])
    assert p.task_ids.tolist() == [[1, 2, 3], [1, None, None]]
    assert not p.lag_missing.any()
    assert p.Z.shape == (2, 0)


def test_unbalanced_values_by_hand(unbalanced: ChoicePanel) -> None:
    fare = unbalanced.X[..., 0]
    minutes = unbalanced.X[..., 1]
    # unavailable rows (even (p1, 3, a), which has values in the table) and padding are 0
    np.testing.assert_array_equal(fare, [[[2, 3, 0], [4, 0, 5], [0, 6, 7]], [[2.5, 0, 1.5], [0, 0, 0], [0, 0, 0]]])
    np.testing.assert_array_equal(minutes, [[[10, 20, 0], [30, 0, 40], [0, 50, 60]],
                                            [[25, 0, 15], [0, 0, 0], [0, 0, 0]]])


def test_unbalanced_summary_counts_fills(unbalanced: ChoicePanel) -> None:
    s = unbalanced.summary
    assert s.rows_in == 10 and s.persons == 2 and s.tasks == 4
    assert s.tasks_per_person == (1, 2.0, 3)
    assert s.removed == {}
    assert s.filled == {"missing 'fare' on unavailable or opt-out rows": 1,
                        "missing 'minutes' on unavailable or opt-out rows": 1}


def test_to_long_gives_back_the_available_rows(unbalanced: ChoicePanel) -> None:
    back = unbalanced.to_long()
    expected = UNBALANCED[UNBALANCED["offered"] == 1].drop(columns="offered")
    key = ["respondent", "task", "option"]
    back = back.sort_values(key).reset_index(drop=True)
    expected = expected.sort_values(key).reset_index(drop=True)
    assert list(back.columns) == ["respondent", "task", "option", "chosen", "fare", "minutes"]
    assert len(back) == 8
    pd.testing.assert_frame_equal(back, expected, check_dtype=False)


def test_to_xarray_is_labelled(unbalanced: ChoicePanel) -> None:
    ds = unbalanced.to_xarray()
    assert dict(ds.sizes) == {"person": 2, "task": 3, "alternative": 3, "attribute": 2}
    assert ds["x"].sel(person="p1", alternative="c", attribute="fare").values.tolist() == [0.0, 5.0, 7.0]
    assert ds["task_id"].sel(person="p2").values.tolist() == ["1", "", ""]
    assert ds["chosen"].sel(person="p1").values.tolist() == [1, 0, 2]
    assert "z" not in ds


def test_row_order_does_not_matter() -> None:
    shuffled = UNBALANCED.sample(frac=1.0, random_state=3).reset_index(drop=True)
    spec = copy.deepcopy(UNBALANCED_SPEC) | {"data": {"alternatives": ["a", "b", "c"]}}
    a = ChoicePanel.from_frame(UNBALANCED, spec).to_xarray()
    b = ChoicePanel.from_frame(shuffled, spec).to_xarray().sel(person=["p1", "p2"])
    for name in ("x", "available", "task_mask", "chosen", "task_id"):
        np.testing.assert_array_equal(a[name].values, b[name].values, err_msg=name)


def test_chance_rate(unbalanced: ChoicePanel) -> None:
    # every one of the four tasks offers two alternatives
    assert unbalanced.chance_rate == pytest.approx(0.5)


def test_repr_mentions_sizes(unbalanced: ChoicePanel) -> None:
    assert repr(unbalanced) == "ChoicePanel(2 persons, 4 tasks, 3 alternatives, attributes: fare, minutes)"


def test_summary_text_and_dict(unbalanced: ChoicePanel) -> None:
    text = str(unbalanced.summary)
    assert "persons              2" in text and "choice tasks         4" in text
    assert "min 1, median 2, max 3" in text and "filled with 0:" in text and "removed              nothing" in text
    d = unbalanced.summary.to_dict()
    assert d["tasks_per_person"] == {"min": 1, "median": 2.0, "max": 3}
    assert d["alternatives"] == ["a", "b", "c"] and d["attributes"] == ["fare", "minutes"]
    empty = ValidationSummary()
    empty.count_removed("nothing", 0)
    assert empty.removed == {}


# --------------------------------------------------------------------------- with_tasks


def test_with_tasks_packs_and_counts(unbalanced: ChoicePanel) -> None:
    keep = np.array([[True, False, True], [False, False, False]])
    sub = unbalanced.with_tasks(keep, "holdout")
    assert sub.persons == ("p1",)
    np.testing.assert_array_equal(sub.task_mask, [[True, True]])
    assert sub.task_ids.tolist() == [[1, 3]]
    np.testing.assert_array_equal(sub.chosen, [[1, 2]])
    np.testing.assert_array_equal(sub.X[0, 1, :, 0], [0, 6, 7])
    assert sub.summary.removed == {"holdout": 2, "persons left with no task (holdout)": 1}
    assert sub.summary.persons == 1 and sub.summary.tasks == 2
    assert unbalanced.summary.removed == {}  # the original is untouched


def test_with_tasks_ignores_padded_cells(unbalanced: ChoicePanel) -> None:
    sub = unbalanced.with_tasks(np.ones((2, 3), dtype=bool), "nothing")
    assert sub.n_tasks == 4 and "nothing" not in sub.summary.removed


def test_with_tasks_keeping_nothing_is_an_error(unbalanced: ChoicePanel) -> None:
    with pytest.raises(DataError, match="keeps no task"):
        unbalanced.with_tasks(np.zeros((2, 3), dtype=bool), "holdout")


# --------------------------------------------------------------------------- coding, constants, opt-out


def _coded_table() -> pd.DataFrame:
    return pd.DataFrame(
        [
            (1, 1, "x", 1, "open", 2.0), (1, 1, "y", 0, "lounge", 3.0), (1, 1, "none", 0, None, NAN),
            (1, 2, "x", 0, "covered", 4.0), (1, 2, "y", 0, "open", 2.0), (1, 2, "none", 1, None, NAN),
            (2, 1, "x", 0, "lounge", 5.0), (2, 1, "y", 1, "covered", 3.0), (2, 1, "none", 0, None, NAN),
        ],
        columns=["pid", "task", "alt", "ch", "deck", "fare"],
    )


def _coded_spec(coding: str) -> dict[str, Any]:
    return {
        "columns": {"person": "pid", "task": "task", "alternative": "alt", "chosen": "ch"},
        "attributes": {"deck": {"coding": coding, "base": "open", "taste": "normal"}, "fare": {}},
        "constants": {"reference": "none"},
        "data": {"opt_out": "none"},
    }


def test_dummy_coding_constants_and_opt_out_by_hand() -> None:
    p = ChoicePanel.from_frame(_coded_table(), _coded_spec("dummy"))
    assert p.attributes == ("deck:covered", "deck:lounge", "fare", "asc:x", "asc:y")
    assert [t.kind for t in p.terms] == ["dummy", "dummy", "numeric", "constant", "constant"]
    assert [t.level for t in p.terms[:2]] == ["covered", "lounge"]
    assert all(t.source == "deck" for t in p.terms[:2])
    x = p.to_xarray()["x"]
    # person 1, task 1: x is open (base), y is lounge; the opt-out row is all zeros
    assert x.sel(person=1, task=0, alternative="x").values.tolist() == [0, 0, 2, 1, 0]
    assert x.sel(person=1, task=0, alternative="y").values.tolist() == [0, 1, 3, 0, 1]
    assert x.sel(person=1, task=0, alternative="none").values.tolist() == [0, 0, 0, 0, 0]
    assert x.sel(person=2, task=0, alternative="y").values.tolist() == [1, 0, 3, 0, 1]
    assert p.summary.filled == {"missing 'deck' on unavailable or opt-out rows": 3,
                                "missing 'fare' on unavailable or opt-out rows": 3}


def test_effects_coding_by_hand() -> None:
    p = ChoicePanel.from_frame(_coded_table(), _coded_spec("effects"))
    x = p.to_xarray()["x"].sel(attribute=["deck:covered", "deck:lounge"])
    assert x.sel(person=1, task=0, alternative="x").values.tolist() == [-1, -1]  # the base level
    assert x.sel(person=1, task=1, alternative="x").values.tolist() == [1, 0]
    assert x.sel(person=2, task=0, alternative="x").values.tolist() == [0, 1]
    assert x.sel(person=1, task=0, alternative="none").values.tolist() == [0, 0]  # the opt-out is not coded


def test_categorical_base_must_be_a_level() -> None:
    spec = _coded_spec("dummy")
    spec["attributes"]["deck"]["base"] = "sundeck"
    with pytest.raises(DataError, match="'sundeck' is not a level of column 'deck'"):
        ChoicePanel.from_frame(_coded_table(), spec)


def test_categorical_with_one_level_is_not_identified() -> None:
    table = _coded_table()
    table.loc[table["alt"] != "none", "deck"] = "open"
    with pytest.raises(DataError, match="'deck' has one level"):
        ChoicePanel.from_frame(table, _coded_spec("dummy"))


def test_attribute_constant_over_designed_alternatives_with_opt_out() -> None:
    # the opt-out's zero would make "fare" look varying; it is collinear with the constants
    table = _coded_table()
    table.loc[table["alt"] != "none", "fare"] = 4.0
    with pytest.raises(DataError, match="'fare'.*constant"):
        ChoicePanel.from_frame(table, _coded_spec("dummy"))


def test_constants_without_opt_out_use_the_reference() -> None:
    table = _coded_table()
    spec = _coded_spec("dummy")
    spec["constants"] = {"reference": "y", "taste": "normal"}
    del spec["data"]
    table.loc[table["alt"] == "none", ["deck", "fare"]] = ["open", 1.0]
    p = ChoicePanel.from_frame(table, spec)
    assert [t.name for t in p.terms if t.kind == "constant"] == ["asc:x", "asc:none"]
    assert all(t.taste == "normal" for t in p.terms if t.kind == "constant")


def test_data_alternatives_fixes_order_and_rejects_unknown() -> None:
    spec = _coded_spec("dummy") | {"data": {"opt_out": "none", "alternatives": ["none", "y", "x"]}}
    p = ChoicePanel.from_frame(_coded_table(), spec)
    assert p.alternatives == ("none", "y", "x")
    assert p.attributes[-2:] == ("asc:y", "asc:x")
    np.testing.assert_array_equal(p.chosen, [[2, 0], [1, -1]])
    # an alternative that is never offered has no identified constant
    spec["data"]["alternatives"] = ["none", "y", "x", "z"]
    with pytest.raises(DataError, match="'asc:z' is constant"):
        ChoicePanel.from_frame(_coded_table(), spec)
    del spec["constants"], spec["data"]["opt_out"]
    table = _coded_table()
    table.loc[table["alt"] == "none", ["deck", "fare"]] = ["open", 1.0]
    p = ChoicePanel.from_frame(table, spec)
    assert p.alternatives == ("none", "y", "x", "z") and not p.available[..., 3].any()
    spec["data"]["alternatives"] = ["x", "none"]
    with pytest.raises(DataError, match="alternatives 'y' not listed in data.alternatives"):
        ChoicePanel.from_frame(_coded_table(), spec)


@pytest.mark.parametrize("role", ["data.opt_out", "constants.reference"])
def test_opt_out_and_reference_must_be_alternatives(role: str) -> None:
    spec = _coded_spec("dummy")
    if role == "data.opt_out":
        spec["data"]["opt_out"] = "stay"
    else:
        spec["constants"]["reference"] = "stay"
    with pytest.raises(DataError, match=f"{role} = 'stay' is not an alternative in column 'alt'"):
        ChoicePanel.from_frame(_coded_table(), spec)


def test_attribute_column_alias() -> None:
    table = _coded_table().rename(columns={"fare": "Fare (EUR)"})
    spec = _coded_spec("dummy")
    spec["attributes"]["fare"] = {"column": "Fare (EUR)"}
    p = ChoicePanel.from_frame(table, spec)
    assert "fare" in p.attributes
    del table["Fare (EUR)"]
    with pytest.raises(DataError, match=r"'Fare \(EUR\)' \(attribute fare\)"):
        ChoicePanel.from_frame(table, spec)


# --------------------------------------------------------------------------- covariates


def test_covariates_become_z(simple_long: pd.DataFrame, simple_spec: dict[str, Any]) -> None:
    table = simple_long.assign(age=simple_long["respondent"].map({1: 30.0, 2: 55.0}))
    p = ChoicePanel.from_frame(table, simple_spec | {"covariates": {"columns": ["age"]}})
    assert p.covariates == ("age",)
    np.testing.assert_array_equal(p.Z, [[30.0], [55.0]])
    assert p.to_xarray()["z"].sel(person=2, covariate="age").item() == 55.0
    assert "person covariates    age" in str(p.summary)


def test_covariate_same_for_everyone_is_not_identified(simple_long: pd.DataFrame,
                                                        simple_spec: dict[str, Any]) -> None:
    with pytest.raises(DataError, match="'age' is the same"):
        ChoicePanel.from_frame(simple_long.assign(age=40), simple_spec | {"covariates": {"columns": ["age"]}})


def test_covariate_missing_names_the_person(simple_long: pd.DataFrame, simple_spec: dict[str, Any]) -> None:
    table = simple_long.assign(age=simple_long["respondent"].map({1: 30.0, 2: NAN}))
    with pytest.raises(DataError, match=r"'age' is missing for persons 2 "):
        ChoicePanel.from_frame(table, simple_spec | {"covariates": {"columns": ["age"]}})


# --------------------------------------------------------------------------- invalid tasks


def _with_bad_tasks(simple_long: pd.DataFrame) -> pd.DataFrame:
    table = simple_long.assign(offered=1)
    table.loc[(table.respondent == 1) & (table.task == 2), "chosen"] = 0  # no choice
    table.loc[(table.respondent == 2) & (table.task == 1) & (table.option == "c"), "offered"] = 0  # chose unoffered
    return table


def test_invalid_tasks_error_by_default(simple_long: pd.DataFrame, simple_spec: dict[str, Any]) -> None:
    simple_spec["columns"]["available"] = "offered"
    with pytest.raises(DataError, match=r"marked unavailable \(\(person, task\): \(2, 1\)"):
        ChoicePanel.from_frame(_with_bad_tasks(simple_long), simple_spec)


def test_invalid_tasks_drop_counts_each_kind(simple_long: pd.DataFrame, simple_spec: dict[str, Any]) -> None:
    simple_spec["columns"]["available"] = "offered"
    simple_spec["data"] = {"invalid_tasks": "drop"}
    p = ChoicePanel.from_frame(_with_bad_tasks(simple_long), simple_spec)
    assert p.n_tasks == 2
    assert p.task_ids.tolist() == [[1], [2]]
    assert p.summary.removed == {
        'tasks with a chosen alternative that is marked unavailable (data.invalid_tasks = "drop")': 1,
        'tasks with not exactly one chosen alternative (data.invalid_tasks = "drop")': 1,
    }


def test_invalid_tasks_drop_everything_is_an_error(simple_long: pd.DataFrame, simple_spec: dict[str, Any]) -> None:
    simple_spec["data"] = {"invalid_tasks": "drop"}
    with pytest.raises(DataError, match="No valid choice task is left"):
        ChoicePanel.from_frame(simple_long.assign(chosen=0), simple_spec)


# --------------------------------------------------------------------------- specific errors


def test_missing_columns_are_all_named(simple_long: pd.DataFrame, simple_spec: dict[str, Any]) -> None:
    with pytest.raises(DataError) as err:
        ChoicePanel.from_frame(simple_long.drop(columns=["task", "fare"]), simple_spec)
    msg = str(err.value)
    assert "'task' (task)" in msg and "'fare' (attribute fare)" in msg and "'respondent'" in msg


def test_first_few_truncates_long_lists(simple_long: pd.DataFrame, simple_spec: dict[str, Any]) -> None:
    with pytest.raises(DataError, match=r"rows 0, 1, 2, 3, 4 \(and 7 more\)"):
        ChoicePanel.from_frame(simple_long.assign(chosen=0), simple_spec)


def test_nullable_boolean_indicator_with_missing(simple_long: pd.DataFrame, simple_spec: dict[str, Any]) -> None:
    table = simple_long.assign(chosen=simple_long["chosen"].astype(bool).astype("boolean"))
    ok = ChoicePanel.from_frame(table, simple_spec)
    assert ok.n_tasks == 4
    table.loc[3, "chosen"] = pd.NA
    with pytest.raises(DataError, match=r"'chosen' \(chosen indicator\) must be 0/1.*at row 3\."):
        ChoicePanel.from_frame(table, simple_spec)


def test_infinite_attribute(simple_long: pd.DataFrame, simple_spec: dict[str, Any]) -> None:
    simple_long.loc[5, "minutes"] = np.inf
    with pytest.raises(DataError, match=r"'minutes' has infinite values at row 5\."):
        ChoicePanel.from_frame(simple_long, simple_spec)


def test_text_numbers_are_read_as_numbers(simple_long: pd.DataFrame, simple_spec: dict[str, Any]) -> None:
    table = simple_long.assign(fare=simple_long["fare"].astype(str), chosen=simple_long["chosen"].astype(str))
    p = ChoicePanel.from_frame(table, simple_spec)
    np.testing.assert_array_equal(p.X, ChoicePanel.from_frame(simple_long, simple_spec).X)


@pytest.mark.parametrize("name", ["_pos", "_first_chosen", "_chosen", "_avail", "_row", "_v_fare"])
@pytest.mark.parametrize("role", ["alternative", "minutes", "covariate"])
def test_reserved_column_names(simple_long: pd.DataFrame, simple_spec: dict[str, Any], name: str,
                               role: str) -> None:
    # the build adds helper columns of these names; a user column of the same name is refused, not overwritten
    if role == "alternative":
        table = simple_long.rename(columns={"option": name})
        simple_spec["columns"]["alternative"] = name
    elif role == "minutes":
        table = simple_long.rename(columns={"minutes": name})
        simple_spec["attributes"] = {"fare": {}, name: {}}
    else:
        table = simple_long.assign(**{name: simple_long["respondent"] * 1.0})
        simple_spec["covariates"] = {"columns": [name]}
    spec = simple_spec | {"dynamics": {"lagged_choice": True, "first_task": "flag"}}
    with pytest.raises(DataError, match=f"{name!r} .*reserved"):
        ChoicePanel.from_frame(table, spec)


def test_unrelated_column_with_a_reserved_name_is_ignored(simple_long: pd.DataFrame,
                                                          simple_spec: dict[str, Any]) -> None:
    p = ChoicePanel.from_frame(simple_long.assign(_pos="junk", _row=1), simple_spec)
    assert p.n_tasks == 4


def test_not_a_frame(simple_spec: dict[str, Any]) -> None:
    with pytest.raises(DataError, match="Expected a pandas DataFrame, got list"):
        ChoicePanel.from_frame([1, 2], simple_spec)  # type: ignore[arg-type]


def test_errors_are_hierchoice_and_value_errors(simple_spec: dict[str, Any]) -> None:
    with pytest.raises(DataError) as err:
        ChoicePanel.from_frame(pd.DataFrame(), simple_spec)
    assert isinstance(err.value, HierchoiceError) and isinstance(err.value, ValueError)
    assert "empty" in str(err.value)


# --------------------------------------------------------------------------- files


def test_read_csv_and_parquet(tmp_path: Path, simple_long: pd.DataFrame, simple_spec: dict[str, Any]) -> None:
    csv = tmp_path / "t.csv"
    simple_long.to_csv(csv, index=False)
    pq = tmp_path / "t.parquet"
    simple_long.to_parquet(pq)
    a = ChoicePanel.from_file(csv, simple_spec)
    b = load_panel(pq, simple_spec)
    c = load_panel(simple_long, simple_spec)
    for p in (a, b):
        np.testing.assert_array_equal(p.X, c.X)
        np.testing.assert_array_equal(p.chosen, c.chosen)
    frame = read_table(simple_long)
    assert frame is not simple_long and frame.equals(simple_long)


def test_read_table_errors(tmp_path: Path) -> None:
    with pytest.raises(DataError, match="does not exist"):
        read_table(tmp_path / "missing.csv")
    (tmp_path / "t.xlsx").write_text("x")
    with pytest.raises(DataError, match="unknown format '.xlsx'"):
        read_table(tmp_path / "t.xlsx")
    (tmp_path / "empty.csv").write_text("")
    with pytest.raises(DataError, match="Could not read"):
        read_table(tmp_path / "empty.csv")
    (tmp_path / "bad.parquet").write_text("not parquet")
    with pytest.raises(DataError, match="Could not read"):
        read_table(tmp_path / "bad.parquet")
