"""Property tests: malformed tables raise only DataError (bad specs only SpecError), naming the culprit.

Each example draws a small valid panel (random ids of either type, random column names, varying
choice sets, an optional availability column and a person covariate), checks that it loads, then
breaks it in one way and checks both the exception type and that the message names the column
(or the person / task) at fault.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from hierchoice import ChoicePanel, DataError, HierchoiceError, SpecError
from hierchoice.exceptions import first_few

ROLES = ("person", "task", "alternative", "chosen", "available", "x", "w", "z")
# column names; names of the panel's own helper columns are rejected on purpose (tested in test_panel.py)
_ident = st.text(alphabet="abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ_ é", min_size=1, max_size=8).filter(
    lambda s: s not in ("_pos", "_first_chosen", "_chosen", "_avail", "_row", "_line") and not s.startswith("_v_"))


@dataclass
class Case:
    frame: pd.DataFrame
    spec: dict[str, Any]
    names: dict[str, str]  # role -> column name
    persons: list[Any]


@st.composite
def valid_cases(draw: st.DrawFn, task_scope: str | None = None) -> Case:
    names = dict(zip(ROLES, draw(st.lists(_ident, min_size=len(ROLES), max_size=len(ROLES), unique=True))))
    with_avail = draw(st.booleans())
    scope = task_scope or draw(st.sampled_from(["person", "global"]))
    n_persons = draw(st.integers(2, 4))
    text_persons = draw(st.booleans())
    persons: list[Any] = [f"r{i}" for i in range(n_persons)] if text_persons else list(range(101, 101 + n_persons))
    text_alts = draw(st.booleans())
    n_alts = draw(st.integers(2, 4))
    alts: list[Any] = [f"alt{j}" for j in range(n_alts)] if text_alts else list(range(1, n_alts + 1))
    text_tasks = draw(st.booleans())
    # the cell values come from one drawn seed (fast); hypothesis explores the structure above
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    rows = []
    for i, person in enumerate(persons):
        for t in range(int(rng.integers(1, 5))):
            task: Any = (i * 10 + t) if scope == "global" else t + 1
            task = f"t{task}" if text_tasks else task
            # the first task offers a choice (a panel without one is refused); others may be forced
            first = i == 0 and t == 0
            shown = alts[:2] if first else [a for a in alts if a == alts[0] or rng.random() < 0.7]
            pick = shown[int(rng.integers(len(shown)))]
            for a in shown:
                offered = 1 if (first or a == pick or not with_avail) else int(rng.random() < 0.7)
                x = float(rng.choice([0.0, 1.5, -2.0, 3.0]))
                rows.append({
                    names["person"]: person, names["task"]: task, names["alternative"]: a,
                    names["chosen"]: int(a == pick), names["available"]: offered,
                    names["x"]: np.nan if offered == 0 and rng.random() < 0.5 else x,
                    names["w"]: float(rng.integers(0, 4)), names["z"]: float(i),
                })
    frame = pd.DataFrame(rows)
    # make both attributes vary over chosen (hence available) rows
    chosen_rows = frame.index[frame[names["chosen"]] == 1]
    frame.loc[chosen_rows[0], [names["x"], names["w"]]] = [0.0, 0.0]
    frame.loc[chosen_rows[1], [names["x"], names["w"]]] = [1.0, 1.0]
    if not with_avail:
        frame = frame.drop(columns=names["available"])
    columns = {"person": names["person"], "task": names["task"], "alternative": names["alternative"],
               "chosen": names["chosen"]}
    if with_avail:
        columns["available"] = names["available"]
    spec = {
        "columns": columns,
        "attributes": {names["x"]: {"taste": "normal"}, names["w"]: {}},
        "covariates": {"columns": [names["z"]]},
        "data": {"task_scope": scope},
    }
    frame = frame.iloc[rng.permutation(len(frame))].reset_index(drop=True)
    return Case(frame, spec, names, persons)


def _py(value: Any) -> Any:
    """A plain Python scalar, as the error messages print them."""
    return value.item() if isinstance(value, np.generic) else value


def _load(case: Case) -> ChoicePanel:
    return ChoicePanel.from_frame(case.frame, case.spec)


def _raises_data_error(case: Case) -> str:
    """The message of the DataError that loading ``case`` must raise (any other exception fails the test)."""
    with pytest.raises(DataError) as err:
        _load(case)
    return str(err.value)


@given(valid_cases())
@settings(max_examples=40)
def test_valid_cases_load(case: Case) -> None:
    panel = _load(case)
    assert panel.n_persons == len(case.persons)
    assert panel.n_tasks == case.frame.groupby([case.names["person"], case.names["task"]]).ngroups
    assert (panel.chosen[panel.task_mask] >= 0).all() and (panel.chosen[~panel.task_mask] == -1).all()
    picked = np.take_along_axis(panel.available, np.maximum(panel.chosen, 0)[..., None], axis=2)[..., 0]
    assert picked[panel.task_mask].all()
    assert not panel.available[~panel.task_mask].any()
    assert (panel.X[~panel.available] == 0).all()
    n_avail = case.frame[case.names["available"]].sum() if "available" in case.spec["columns"] else len(case.frame)
    assert len(panel.to_long()) == n_avail
    # tasks with one available alternative are kept and counted in a note, never silently
    offered = case.frame[case.names["available"]] if "available" in case.spec["columns"] else 1
    per_task = case.frame.assign(_n=offered).groupby([case.names["person"], case.names["task"]])["_n"].sum()
    forced = int((per_task < 2).sum())
    assert int((panel.available.sum(axis=2)[panel.task_mask] < 2).sum()) == forced
    notes = [n for n in panel.summary.notes if "only one available alternative" in n]
    assert bool(notes) == (forced > 0) and all(n.startswith(f"{forced} task") for n in notes)


# --------------------------------------------------------------------------- one defect at a time


@given(valid_cases(), st.sampled_from(["person", "task", "alternative", "chosen", "available", "x", "w", "z"]))
@settings(max_examples=60)
def test_dropped_column_is_named(case: Case, role: str) -> None:
    col = case.names[role]
    if col not in case.frame.columns:
        return
    case.frame = case.frame.drop(columns=col)
    msg = _raises_data_error(case)
    assert "Missing column" in msg and repr(col) in msg


@given(valid_cases(), st.sampled_from(["x", "w"]), st.data())
@settings(max_examples=60)
def test_nan_in_an_available_attribute_is_named(case: Case, role: str, data: st.DataObject) -> None:
    avail = case.names["available"]
    rows = case.frame.index[case.frame[avail] == 1] if avail in case.frame.columns else case.frame.index
    row = data.draw(st.sampled_from(list(rows)))
    case.frame.loc[row, case.names[role]] = np.nan
    msg = _raises_data_error(case)
    assert repr(case.names[role]) in msg and "missing" in msg and str(row) in msg


@given(valid_cases(), st.sampled_from(["x", "w", "z"]), st.sampled_from(["abc", "1,5", "n/a", "--"]), st.data())
@settings(max_examples=60)
def test_text_in_a_numeric_column_is_named(case: Case, role: str, text: str, data: st.DataObject) -> None:
    col = case.names[role]
    row = data.draw(st.sampled_from(list(case.frame.index)))
    case.frame[col] = case.frame[col].astype(object)
    case.frame.loc[row, col] = text
    msg = _raises_data_error(case)
    assert repr(col) in msg and "not numeric" in msg and repr(text) in msg


@given(valid_cases(), st.data())
@settings(max_examples=60)
def test_duplicate_row_is_named(case: Case, data: st.DataObject) -> None:
    row = data.draw(st.sampled_from(list(case.frame.index)))
    case.frame = pd.concat([case.frame, case.frame.loc[[row]]], ignore_index=True)
    msg = _raises_data_error(case)
    n = case.names
    person, task, alt = (_py(case.frame.at[row, n[r]]) for r in ("person", "task", "alternative"))
    key = (person, task, str(alt))  # alternatives are read as text labels
    assert "Duplicate" in msg and first_few([key]) in msg


def _a_task(case: Case, data: st.DataObject) -> tuple[Any, Any]:
    n = case.names
    tasks = case.frame[[n["person"], n["task"]]].drop_duplicates()
    return data.draw(st.sampled_from([tuple(map(_py, r)) for r in tasks.itertuples(index=False)]))


def _task_rows(case: Case, task: tuple[Any, Any]) -> pd.Series:
    n = case.names
    return (case.frame[n["person"]] == task[0]) & (case.frame[n["task"]] == task[1])


@given(valid_cases(), st.data())
@settings(max_examples=60)
def test_task_with_no_choice_is_named(case: Case, data: st.DataObject) -> None:
    task = _a_task(case, data)
    case.frame.loc[_task_rows(case, task), case.names["chosen"]] = 0
    msg = _raises_data_error(case)
    assert repr(case.names["chosen"]) in msg and "not exactly one chosen" in msg and first_few([task]) in msg


@given(valid_cases(), st.data())
@settings(max_examples=60)
def test_task_with_two_choices_is_named(case: Case, data: st.DataObject) -> None:
    n = case.names
    sizes = case.frame.groupby([n["person"], n["task"]]).size()
    big = [tuple(map(_py, k)) for k, v in sizes.items() if v >= 2]
    if not big:
        return
    task = data.draw(st.sampled_from(big))
    rows = case.frame.index[_task_rows(case, task) & (case.frame[n["chosen"]] == 0)]
    case.frame.loc[data.draw(st.sampled_from(list(rows))), n["chosen"]] = 1
    msg = _raises_data_error(case)
    # the second pick may also be an unavailable row: either way the task and the column are named
    assert repr(n["chosen"]) in msg and first_few([task]) in msg


@given(valid_cases(), st.data())
@settings(max_examples=60)
def test_chosen_but_unavailable_is_named(case: Case, data: st.DataObject) -> None:
    n = case.names
    task = _a_task(case, data)
    case.spec["columns"]["available"] = n["available"]
    if n["available"] not in case.frame.columns:
        case.frame[n["available"]] = 1
    case.frame.loc[_task_rows(case, task) & (case.frame[n["chosen"]] == 1), n["available"]] = 0
    msg = _raises_data_error(case)
    assert repr(n["chosen"]) in msg and "marked unavailable" in msg and first_few([task]) in msg


@given(valid_cases(task_scope="global"), st.data())
@settings(max_examples=60)
def test_global_task_id_shared_by_two_persons_is_named(case: Case, data: st.DataObject) -> None:
    n = case.names
    owners = case.frame.groupby(n["task"])[n["person"]].first()
    first, second = case.persons[0], data.draw(st.sampled_from(case.persons[1:]))
    borrowed = data.draw(st.sampled_from(owners[owners == first].index.tolist()))
    victim = data.draw(st.sampled_from(owners[owners == second].index.tolist()))
    case.frame.loc[case.frame[n["task"]] == victim, n["task"]] = borrowed
    msg = _raises_data_error(case)
    assert repr(n["task"]) in msg and "more than one person" in msg and first_few([borrowed]) in msg


@given(valid_cases(), st.sampled_from(["x", "w"]), st.sampled_from([0.0, 2.5, -1.0]))
@settings(max_examples=60)
def test_constant_attribute_is_named(case: Case, role: str, value: float) -> None:
    case.frame[case.names[role]] = value
    msg = _raises_data_error(case)
    assert repr(case.names[role]) in msg and "constant" in msg


@given(valid_cases(), st.sampled_from(["person", "task", "alternative"]), st.data())
@settings(max_examples=60)
def test_mixed_id_types_are_named(case: Case, role: str, data: st.DataObject) -> None:
    col = case.names[role]
    row = data.draw(st.sampled_from(list(case.frame.index)))
    value = case.frame.loc[row, col]
    case.frame[col] = case.frame[col].astype(object)
    case.frame.loc[row, col] = 7 if isinstance(value, str) else str(value)
    msg = _raises_data_error(case)
    assert repr(col) in msg and "mixes id types" in msg and f"row {row} " in msg


@given(valid_cases(), st.sampled_from(["person", "task", "alternative"]), st.data())
@settings(max_examples=60)
def test_missing_id_is_named(case: Case, role: str, data: st.DataObject) -> None:
    col = case.names[role]
    row = data.draw(st.sampled_from(list(case.frame.index)))
    case.frame[col] = case.frame[col].astype(object)
    case.frame.loc[row, col] = None
    msg = _raises_data_error(case)
    assert repr(col) in msg and "missing ids" in msg and str(row) in msg


@given(valid_cases(), st.sampled_from(["chosen", "available"]), st.sampled_from([2, -1, 0.5, "yes"]), st.data())
@settings(max_examples=60)
def test_bad_indicator_is_named(case: Case, role: str, value: Any, data: st.DataObject) -> None:
    col = case.names[role]
    if col not in case.frame.columns:
        return
    row = data.draw(st.sampled_from(list(case.frame.index)))
    case.frame[col] = case.frame[col].astype(object)
    case.frame.loc[row, col] = value
    msg = _raises_data_error(case)
    assert repr(col) in msg and "must be 0/1" in msg and repr(str(value)) in msg


@given(valid_cases())
@settings(max_examples=30)
def test_empty_table(case: Case) -> None:
    case.frame = case.frame.iloc[:0]
    assert "empty" in _raises_data_error(case)


@given(valid_cases(), st.data())
@settings(max_examples=40)
def test_covariate_varying_within_person_is_named(case: Case, data: st.DataObject) -> None:
    n = case.names
    sizes = case.frame.groupby(n["person"]).size()
    persons = [_py(p) for p, s in sizes.items() if s >= 2]
    if not persons:
        return
    person = data.draw(st.sampled_from(persons))
    row = data.draw(st.sampled_from(case.frame.index[case.frame[n["person"]] == person].tolist()))
    case.frame.loc[row, n["z"]] = 99.0
    msg = _raises_data_error(case)
    assert repr(n["z"]) in msg and "varies within person" in msg and first_few([person]) in msg


# --------------------------------------------------------------------------- several defects at once

#: Each defect breaks the table in a way validation must refuse, whatever else is broken. Applied one after
#: another they may hide each other (a dropped column takes its bad cells with it), so the test asserts that
#: loading raises DataError and that the message names at least one of the defects applied, by its column and
#: the words of its check.
#: Numbers for new alternative labels, never the same twice.
_NEW_LABELS = itertools.count()

DEFECTS = ["drop_column", "nan", "text", "duplicate", "no_choice", "constant", "mixed_ids", "unknown_alt",
           "bad_indicator"]

def _apply_defect(case: Case, original: pd.DataFrame, defect: str, data: st.DataObject) -> list[str] | None:
    """Break ``case.frame`` (and spec) by ``defect``; return the texts its error names, or None if no column fits.

    ``original`` is the valid table, for the type of each id column and the alternatives it lists.
    """
    n, f = case.names, case.frame
    present = [r for r in ("person", "task", "alternative", "chosen", "available", "x", "w", "z")
               if n[r] in f.columns]

    def pick(roles: list[str]) -> str | None:
        usable = [r for r in roles if r in present]
        return data.draw(st.sampled_from(usable)) if usable else None

    def text_ids(role: str) -> bool:
        return isinstance(original[n[role]].iloc[0], str)

    if defect == "drop_column":
        role = pick([r for r in present if r != "available" or "available" in case.spec["columns"]])
        case.frame = f.drop(columns=n[role])
        return ["Missing column", repr(n[role])]
    if defect == "duplicate":
        row = data.draw(st.sampled_from(list(f.index)))
        case.frame = pd.concat([f, f.loc[[row]]], ignore_index=True)
        return ["Duplicate"]
    if defect == "no_choice":
        if not {"person", "task", "chosen"} <= set(present):
            return None
        row = data.draw(st.sampled_from(list(f.index)))
        task = (f[n["person"]] == f.at[row, n["person"]]) & (f[n["task"]] == f.at[row, n["task"]])
        f.loc[task, n["chosen"]] = 0
        return [repr(n["chosen"]), "not exactly one chosen"]
    if defect == "nan":
        role = pick(["person", "task", "alternative", "chosen", "x", "w", "z"])
        if role is None:
            return None
        rows = list(f.index)
        if role in ("x", "w") and n["available"] in f.columns:  # a value may be missing where unavailable
            rows = list(f.index[f[n["available"]].astype(str) != "0"])
        f[n[role]] = f[n[role]].astype(object)
        f.loc[data.draw(st.sampled_from(rows)), n[role]] = np.nan
        words = {"chosen": "must be 0/1"}.get(role, "missing")
        return [repr(n[role]), words]
    if defect == "text":
        role = pick(["chosen", "x", "w", "z"])
        if role is None:
            return None
        f[n[role]] = f[n[role]].astype(object)
        f.loc[data.draw(st.sampled_from(list(f.index))), n[role]] = "oops"
        return [repr(n[role]), "'oops'"]
    if defect == "constant":
        role = pick(["x", "w"])
        if role is None:
            return None
        f[n[role]] = 1.0
        return [repr(n[role]), "constant"]
    if defect == "mixed_ids":
        role = pick(["person", "task", "alternative"])
        if role is None:
            return None
        f[n[role]] = f[n[role]].astype(object)
        f.loc[data.draw(st.sampled_from(list(f.index))), n[role]] = 7 if text_ids(role) else "7"
        return [repr(n[role]), "mixes id types"]
    if defect == "unknown_alt":
        if "alternative" not in present:
            return None
        listed = list(dict.fromkeys(str(a) for a in original[n["alternative"]]))
        case.spec.setdefault("data", {})["alternatives"] = listed
        # a new label each time: two rows of one task given the same label would be a duplicate instead
        k = next(_NEW_LABELS)
        unknown = f"zz_not_listed{k}" if text_ids("alternative") else 1_000_000 + k
        f.loc[data.draw(st.sampled_from(list(f.index))), n["alternative"]] = unknown
        return [repr(n["alternative"]), "not listed in data.alternatives"]
    if defect == "bad_indicator":
        role = pick(["chosen", "available"])
        if role is None:
            return None
        f[n[role]] = f[n[role]].astype(object)
        f.loc[data.draw(st.sampled_from(list(f.index))), n[role]] = 5
        return [repr(n[role]), "must be 0/1", "'5'"]
    raise AssertionError(f"unknown defect {defect!r}")


@given(valid_cases(), st.lists(st.sampled_from(DEFECTS), min_size=1, max_size=4), st.data())
@settings(max_examples=100)
def test_any_mix_of_defects_is_refused_naming_one_of_them(case: Case, defects: list[str],
                                                          data: st.DataObject) -> None:
    original = case.frame.copy()
    _load(case)  # the table is valid before it is broken
    named = [texts for d in defects if (texts := _apply_defect(case, original, d, data)) is not None]
    assert named, defects  # the first defect always finds its column
    msg = _raises_data_error(case)
    assert any(all(t in msg for t in texts) for texts in named), (defects, named, msg)


@pytest.mark.parametrize("defect", DEFECTS)
@given(case=valid_cases(), data=st.data())
@settings(max_examples=12)
def test_each_defect_alone_is_refused_and_named(defect: str, case: Case, data: st.DataObject) -> None:
    original = case.frame.copy()
    texts = _apply_defect(case, original, defect, data)
    assert texts is not None  # on a whole table every defect finds its column
    msg = _raises_data_error(case)
    assert all(t in msg for t in texts), (defect, texts, msg)


# --------------------------------------------------------------------------- bad specs


@given(valid_cases(), st.sampled_from([
    ("columns", "persn", "person"), ("data", "task_scop", "x"), ("dynamics", "lag", 3),
    ("attributes", "nope", {"taste": "weird"}), ("model", "prior_scale", -1), ("sampling", "chains", 0),
    ("covariates", "shift", ["x"]), ("data", "invalid_tasks", "ignore"),
]))
@settings(max_examples=60)
def test_bad_spec_raises_only_spec_error(case: Case, change: tuple[str, str, Any]) -> None:
    table, key, value = change
    case.spec.setdefault(table, {})[key] = value
    with pytest.raises(SpecError) as err:
        _load(case)
    assert repr(key) in str(err.value) or key in str(err.value)
    assert not isinstance(err.value, DataError)


@given(valid_cases(), st.sampled_from(["person", "task", "alternative", "chosen"]))
@settings(max_examples=60)
def test_spec_naming_a_missing_column(case: Case, role: str) -> None:
    case.spec["columns"][role] = "no such column"
    with pytest.raises(HierchoiceError) as err:
        _load(case)
    assert isinstance(err.value, (DataError, SpecError)) and "'no such column'" in str(err.value)
