"""Dynamics: the order of each person's tasks, lag / lead / lagged-choice terms, and initial conditions.

Owns: :data:`LAGGED_CHOICE`; the position of each task within its person (numbered before invalid tasks are
removed, so that a lag or lead never reaches across a removed task); lagged and leading attribute values and
the lagged choice, with ``dynamics.first_task`` deciding whether a task without a previous (or next) task is
dropped or kept and flagged (under initial conditions the first task is only ever the condition); and the
initial-conditions person covariates (first observed choice, person means).
Works on the long table, one value per row.
May import: ``hierchoice.exceptions``, ``hierchoice.spec``, :mod:`hierchoice.data.validate` and
:mod:`hierchoice.data.coding`.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np
import pandas as pd

from ..exceptions import DataError, first_few
from ..spec import ColumnRoles, Spec
from .coding import Term
from .validate import ValidationSummary

__all__ = ["LAGGED_CHOICE"]

#: name of the lagged-choice term: 1 where the alternative was chosen in the person's previous task
LAGGED_CHOICE = "lagged_choice"


def _task_positions(df: pd.DataFrame, cols: ColumnRoles) -> np.ndarray:
    """The rank (1-based, dense) of each row's task within its person, ordered by the task column."""
    tasks = df[[cols.person, cols.task]].drop_duplicates()
    try:
        ranks = tasks.groupby(cols.person, sort=False)[cols.task].rank(method="dense")
    except TypeError as err:  # pragma: no cover - mixed types are caught earlier
        raise DataError(f"Column {cols.task!r} cannot be ordered: {err}.") from None
    tasks = tasks.assign(_pos=ranks.astype(int).to_numpy())
    merged = df[[cols.person, cols.task]].merge(tasks, on=[cols.person, cols.task], how="left")
    return merged["_pos"].to_numpy()


def _add_dynamics(
    df: pd.DataFrame,
    values: dict[str, pd.Series],
    terms: list[Term],
    chosen: pd.Series,
    avail: pd.Series,
    spec: Spec,
    summary: ValidationSummary,
) -> tuple[pd.DataFrame, dict[str, pd.Series], pd.Series, list[Term]]:
    """Lag, lead and lagged choice within each person's ordered task sequence (``df`` has the ``_pos`` column).

    ``_pos`` numbers each person's tasks before invalid tasks were removed, so a removed task leaves a gap: the
    next task has no previous task (its lag is missing, as a first task's is) and the task before has no next one.

    Returns the table (without the tasks :func:`_first_task_rule` removes), the values with the new terms', the
    flag per row of the kept tasks whose lag/lead was set to 0, and the terms with the new ones appended.
    """
    new_terms, missing_any, gap = _shifted_terms(df, values, chosen, avail, spec)
    # a task is "missing" if any of its available rows lacks a lag/lead
    task_missing = missing_any.groupby([df[spec.columns.person], df["_pos"]]).transform("any")
    df, values, task_missing = _first_task_rule(df, values, task_missing, gap, chosen, spec, summary)
    return df, values, task_missing, terms + new_terms


def _neighbour_present(df: pd.DataFrame, cols: ColumnRoles, step: int) -> pd.Series:
    """Per row: the person's task at position ``_pos + step`` is in the table (not past an end, not removed)."""
    tasks = df[[cols.person, "_pos"]].drop_duplicates()
    there = tasks.assign(_pos=tasks["_pos"] - step, _there=True)  # the task at pos+step, keyed at pos
    merged = df[[cols.person, "_pos"]].merge(there, on=[cols.person, "_pos"], how="left")
    return pd.Series(merged["_there"].notna().to_numpy(), index=df.index)


def _shifted_terms(
    df: pd.DataFrame, values: dict[str, pd.Series], chosen: pd.Series, avail: pd.Series, spec: Spec,
) -> tuple[list[Term], pd.Series, pd.Series]:
    """Add the lagged-choice, lag and lead values to ``values`` (in place, 0 where absent).

    Returns their terms; per row, whether that row lacks its lag/lead (its task has no previous/next task, or the
    alternative was absent or unavailable there); and per row, whether its task lacks them only because the
    neighbouring task was removed as invalid (a gap inside the person's sequence, not an end of it).
    """
    cols, dyn = spec.columns, spec.dynamics
    key = [cols.person, "_pos", cols.alternative]
    base = df[key].copy()
    base["_chosen"] = chosen.astype(float).to_numpy()
    base["_avail"] = avail.to_numpy()
    for name in set(dyn.lag) | set(dyn.lead):
        base[f"_v_{name}"] = values[name].to_numpy()
    missing_any = pd.Series(False, index=df.index)
    new_terms: list[Term] = []

    def shifted(step: int, column: str) -> tuple[pd.Series, pd.Series]:
        other = base[key + [column, "_avail"]].copy()
        other["_pos"] = other["_pos"] - step  # the row of task pos+step, keyed at pos
        merged = base[key].merge(other, on=key, how="left")
        present = merged["_avail"].fillna(False).astype(bool).to_numpy()
        val = pd.Series(merged[column].to_numpy(), index=df.index)
        return val.where(present), pd.Series(present, index=df.index)

    has_prev, has_next = _neighbour_present(df, cols, -1), _neighbour_present(df, cols, 1)
    after_first = df["_pos"] > df.groupby(cols.person)["_pos"].transform("min")
    before_last = df["_pos"] < df.groupby(cols.person)["_pos"].transform("max")
    gap = pd.Series(False, index=df.index)
    if dyn.lagged_choice or dyn.lag:
        gap |= ~has_prev & after_first
    if dyn.lead:
        gap |= ~has_next & before_last
    if dyn.lagged_choice:
        prev_chosen, _ = shifted(-1, "_chosen")
        # an alternative absent from the previous task was not chosen there: 0, not missing
        values[LAGGED_CHOICE] = prev_chosen.fillna(0.0)
        missing_any |= ~has_prev
        new_terms.append(Term(LAGGED_CHOICE, LAGGED_CHOICE, "lagged_choice", _taste_for(spec, LAGGED_CHOICE)))
    for step, names, kind, neighbour in ((-1, dyn.lag, "lag", has_prev), (1, dyn.lead, "lead", has_next)):
        for name in names:
            col, present = shifted(step, f"_v_{name}")
            missing_any |= ~present & avail
            missing_any |= ~neighbour
            term_name = f"{name}_{kind}"
            values[term_name] = col.fillna(0.0)
            new_terms.append(Term(term_name, name, kind, _taste_for(spec, term_name)))
    return new_terms, missing_any, gap


#: summary reasons of the tasks :func:`_first_task_rule` removes or keeps with a 0 fill
_GAP = "tasks next to a task removed as invalid, whose lag/lead would reach across the gap"
_EDGE = "tasks without a previous/next task for the lag, lead or lagged choice"


def _first_task_rule(
    df: pd.DataFrame, values: dict[str, pd.Series], task_missing: pd.Series, gap: pd.Series, chosen: pd.Series,
    spec: Spec, summary: ValidationSummary,
) -> tuple[pd.DataFrame, dict[str, pd.Series], pd.Series]:
    """Remove or keep and count the tasks flagged in ``task_missing`` (``gap`` marks those next to a removed task).

    ``first_task = "drop"`` removes every flagged task. ``"flag"`` keeps them with the missing values 0, except,
    with ``initial_conditions``, each person's first task: its choice is the initial condition the first-choice
    covariates condition on (Wooldridge 2005), so it is never modelled itself; kept, the model would explain the
    first choice by itself. The table gains ``_first_chosen`` (each person's first choice) before any removal.
    """
    cols, dyn = spec.columns, spec.dynamics
    df = df.assign(_first_chosen=_first_chosen(df, chosen, cols))
    first = df["_pos"] == df.groupby(cols.person)["_pos"].transform("min")
    if dyn.first_task == "drop":
        remove, why = task_missing, 'dynamics.first_task = "drop"'
    elif dyn.initial_conditions:
        remove, why = first, 'dynamics.first_task = "flag" with initial_conditions = true'
    else:
        remove, why = pd.Series(False, index=df.index), ""
    kept_missing = task_missing & ~remove

    def n_tasks(mask: pd.Series) -> int:
        return df.loc[mask, [cols.person, "_pos"]].drop_duplicates().shape[0]

    if dyn.first_task == "drop":
        summary.count_removed(f"{_GAP} ({why})", n_tasks(remove & gap))
        summary.count_removed(f"{_EDGE} ({why})", n_tasks(remove & ~gap))
    elif dyn.initial_conditions:
        summary.count_removed(f"first task of each person, used only as the initial condition ({why})",
                              n_tasks(remove))
    fill = 'dynamics.first_task = "flag"; see the panel\'s lag_missing mask'
    summary.count_filled(f"{_GAP}, kept with lag/lead set to 0 ({fill})", n_tasks(kept_missing & gap))
    summary.count_filled(f"tasks kept with lag/lead set to 0 ({fill})", n_tasks(kept_missing & ~gap))
    if not remove.any():
        return df, values, kept_missing
    keep = ~remove
    if not keep.any():
        raise DataError(
            f"{why} removes every task: no person has a task with a previous (and, for leads, a next) valid task "
            "left. Each person needs at least 2 valid tasks in a row (3 with both lags and leads); use a panel "
            "with longer sequences, or leave out the dynamic terms."
        )
    persons_left = df.loc[keep, cols.person].nunique()
    summary.count_removed(f"persons left with no task ({why})", df[cols.person].nunique() - persons_left)
    if dyn.lagged_choice or dyn.lag:
        summary.notes.append("first task of each person used only as the initial condition (not in the "
                             "likelihood) because of the lagged terms")
    df = df[keep]
    return df, {k: v[keep] for k, v in values.items()}, kept_missing[keep]


def _first_chosen(df: pd.DataFrame, chosen: pd.Series, cols: ColumnRoles) -> pd.Series:
    first = df["_pos"] == df.groupby(cols.person)["_pos"].transform("min")
    picked = df.loc[first & chosen.to_numpy(), [cols.person, cols.alternative]]
    mapping = dict(zip(picked[cols.person], picked[cols.alternative]))
    return df[cols.person].map(mapping)


def _taste_for(spec: Spec, name: str) -> str:
    if name in spec.attributes:
        return spec.attributes[name].taste
    return spec.dynamics.taste


def _initial_conditions(
    df: pd.DataFrame,
    values: Mapping[str, pd.Series],
    spec: Spec,
    alternatives: Sequence[str],
    person_codes: np.ndarray,
    rows: pd.Series,
) -> tuple[list[str], list[np.ndarray]]:
    """Wooldridge (2005) covariates: the first observed choice and person means of attributes.

    The means are over ``rows`` (the available, non-opt-out rows): unavailable and opt-out
    rows carry a filled 0, not an attribute value. ``person_codes`` has shape (row,); each
    returned array has shape (person,).
    """
    reference = spec.constants.reference if spec.constants else alternatives[0]
    first = df["_first_chosen"].groupby(person_codes).first()
    names, vals = [], []
    for alt in alternatives:
        if alt == reference:
            continue
        names.append(f"first_choice:{alt}")
        vals.append((first == alt).to_numpy(float))
    use = np.asarray(rows, dtype=bool)
    for attr in spec.dynamics.initial_means:
        means = values[attr].where(use).groupby(person_codes).mean()
        if means.isna().any():
            labels = df[spec.columns.person].groupby(person_codes).first()
            raise DataError(
                f"dynamics.initial_means: persons {first_few(labels[means.isna()].tolist())} have no available "
                f"alternative with a value of {attr!r} (only the opt-out), so their mean is undefined."
            )
        names.append(f"mean:{attr}")
        vals.append(means.to_numpy(float))
    return names, vals
