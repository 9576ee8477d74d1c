"""Checks of the long choice table, and the record of what they removed and filled.

Owns: :class:`ValidationSummary`; the checks of a long table's columns, ids, chosen and availability flags,
alternatives, tasks and person covariates, each a :class:`~hierchoice.exceptions.DataError` that names the column
and the first persons, tasks or rows at fault; and the helpers that format those messages (``_rows``, ``_keys``,
``_label``). The bottom of ``hierchoice.data``.
May import: ``hierchoice.exceptions`` and ``hierchoice.spec``; nothing else of ``hierchoice.data``.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from .._display import html_table
from ..exceptions import DataError, first_few
from ..spec import Spec

__all__ = ["ValidationSummary"]


@dataclass
class ValidationSummary:
    """What the data layer found, kept and removed. ``print()`` it."""

    rows_in: int = 0
    persons: int = 0
    tasks: int = 0
    tasks_per_person: tuple[int, float, int] = (0, 0.0, 0)
    alternatives: tuple[str, ...] = ()
    attributes: tuple[str, ...] = ()
    covariates: tuple[str, ...] = ()
    removed: dict[str, int] = field(default_factory=dict)
    filled: dict[str, int] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)

    def count_removed(self, reason: str, n: int) -> None:
        if n:
            self.removed[reason] = self.removed.get(reason, 0) + int(n)

    def count_filled(self, reason: str, n: int) -> None:
        if n:
            self.filled[reason] = self.filled.get(reason, 0) + int(n)

    def to_dict(self) -> dict[str, Any]:
        lo, med, hi = self.tasks_per_person
        return {
            "rows_in": self.rows_in,
            "persons": self.persons,
            "tasks": self.tasks,
            "tasks_per_person": {"min": lo, "median": med, "max": hi},
            "alternatives": list(self.alternatives),
            "attributes": list(self.attributes),
            "covariates": list(self.covariates),
            "removed": dict(self.removed),
            "filled": dict(self.filled),
            "notes": list(self.notes),
        }

    def __str__(self) -> str:
        lo, med, hi = self.tasks_per_person
        lines = [
            f"rows read            {self.rows_in}",
            f"persons              {self.persons}",
            f"choice tasks         {self.tasks}",
            f"tasks per person     min {lo}, median {med:g}, max {hi}",
            f"alternatives         {', '.join(self.alternatives)}",
            f"model attributes     {', '.join(self.attributes)}",
        ]
        if self.covariates:
            lines.append(f"person covariates    {', '.join(self.covariates)}")
        if self.removed:
            lines.append("removed:")
            lines += [f"  {n:>6}  {reason}" for reason, n in self.removed.items()]
        else:
            lines.append("removed              nothing")
        if self.filled:
            lines.append("filled with 0:")
            lines += [f"  {n:>6}  {reason}" for reason, n in self.filled.items()]
        lines += [f"note: {note}" for note in self.notes]
        return "\n".join(lines)

    def __repr__(self) -> str:
        removed = sum(self.removed.values())
        filled = sum(self.filled.values())
        return (f"ValidationSummary({self.rows_in} rows, {self.persons} persons, {self.tasks} tasks; "
                f"removed {removed}, filled {filled}, notes {len(self.notes)}; print() it for details)")

    def _repr_html_(self) -> str:
        lo, med, hi = self.tasks_per_person
        rows = [("rows read", self.rows_in), ("persons", self.persons), ("choice tasks", self.tasks),
                ("tasks per person", f"min {lo}, median {med:g}, max {hi}"),
                ("alternatives", ", ".join(self.alternatives)), ("model attributes", ", ".join(self.attributes))]
        rows += [("person covariates", ", ".join(self.covariates))] if self.covariates else []
        rows += [(f"removed: {reason}", n) for reason, n in self.removed.items()] or [("removed", "nothing")]
        rows += [(f"filled with 0: {reason}", n) for reason, n in self.filled.items()]
        return html_table("Validation summary", rows, notes=[f"note: {n}" for n in self.notes])


# --------------------------------------------------------------------------- message helpers


#: The index name :func:`~hierchoice.data.read.read_table` gives a file's rows: the index holds file line numbers
#: (the header is line 1). Any other index is the frame's own, and messages name its labels as rows.
LINE_INDEX = "file line"

#: The helper column ``_prepare`` keeps each row's label in: file lines, or the user's index labels.
_LINE, _ROW = "_line", "_row"


def _rows(frame: pd.DataFrame, mask: pd.Series | np.ndarray) -> str:
    """The rows where ``mask`` holds, as the user sees them: ``"file lines 6, 9"`` or ``"rows 4, 7"``.

    A file's rows are named by their line in the file (header = line 1); a DataFrame's by its own index labels.
    After ``_prepare`` the labels live in the helper column ``_line`` or ``_row``; before it, in the index.
    Rows sharing a label (the long rows of one wide row) are named once.
    """
    mask = np.asarray(mask, dtype=bool)
    if _LINE in frame.columns or _ROW in frame.columns:
        is_line = _LINE in frame.columns
        labels = frame[_LINE if is_line else _ROW].to_numpy()[mask]
    else:
        is_line = frame.index.name == LINE_INDEX
        labels = frame.index.to_numpy()[mask]
    shown = list(dict.fromkeys(v.item() if isinstance(v, np.generic) else v for v in labels))
    word = ("file line" if is_line else "row") + ("s" if len(shown) > 1 else "")
    return f"{word} {first_few(shown)}"


def _keys(frame: pd.DataFrame, mask: pd.Series | np.ndarray, cols: Sequence[str]) -> str:
    sub = frame.loc[np.asarray(mask), list(cols)].drop_duplicates()
    return first_few([tuple(r) if len(cols) > 1 else r[0] for r in sub.itertuples(index=False)])


def _label(value: Any) -> str:
    if isinstance(value, (float, np.floating)) and float(value).is_integer():
        return str(int(value))
    return str(value)


#: The largest attribute or covariate magnitude accepted, in the user's units and (attributes) after the model's
#: internal scaling, division by the standard deviation over the available alternatives. A float64 holds about 16
#: significant digits, so beyond 1e15 whole units are no longer exact and utility differences lose their digits;
#: the squares in a standard deviation overflow from about 1e154 (IEEE 754 double precision).
MAX_MAGNITUDE = 1e15

#: Helper columns the build adds to the table; a role, attribute or covariate column may not use them.
_RESERVED = ("_pos", "_first_chosen", "_chosen", "_avail", _ROW, _LINE)


def _check_reserved(columns: Mapping[str, str]) -> None:
    clash = {role: c for role, c in columns.items() if c in _RESERVED or c.startswith("_v_")}
    if clash:
        listed = "; ".join(f"{c!r} ({role})" for role, c in clash.items())
        raise DataError(
            f"Column name(s) {listed} are reserved for hierchoice's own helper columns "
            f"({', '.join(_RESERVED)}, _v_*). Rename the column(s) in the table and the spec."
        )


# --------------------------------------------------------------------------- the long table, step by step


def _prepare(df: pd.DataFrame) -> pd.DataFrame:
    """The table with text column names, a 0..n-1 row index, and each row's label as the user sees it.

    The label (a file line, or the frame's own index label; see :func:`_rows`) goes into the helper column
    ``_line`` or ``_row``, so that it travels with the row through every step and messages can name it.
    """
    if len(df) == 0:
        raise DataError("The choice table is empty: no rows to read.")
    df.columns = [str(c) for c in df.columns]
    labels = df.index
    df = df.drop(columns=[c for c in (_LINE, _ROW) if c in df.columns]).reset_index(drop=True)
    df[_LINE if labels.name == LINE_INDEX else _ROW] = labels.to_numpy()
    return df


def _check_columns(df: pd.DataFrame, spec: Spec) -> None:
    """Every column the spec names exists, and none uses a reserved helper name."""
    cols = spec.columns
    needed = {
        "person": cols.person, "task": cols.task, "alternative": cols.alternative, "chosen": cols.chosen,
    }
    if cols.available:
        needed["available"] = cols.available
    for attr in spec.attributes.values():
        needed[f"attribute {attr.name}"] = attr.source
    if spec.covariates:
        for c in spec.covariates.columns:
            needed[f"covariate {c}"] = c
    absent = {role: c for role, c in needed.items() if c not in df.columns}
    if absent:
        listed = "; ".join(f"{c!r} ({role})" for role, c in absent.items())
        raise DataError(f"Missing column(s): {listed}. The table has: {first_few(list(df.columns), 12)}.")
    _check_reserved(needed)


def _check_id_column(frame: pd.DataFrame, col: str) -> None:
    values = frame[col]
    missing = values.isna()
    if missing.any():
        raise DataError(f"Column {col!r} has missing ids at {_rows(frame, missing)}; every row needs an id.")
    if pd.api.types.is_numeric_dtype(values) or pd.api.types.is_bool_dtype(values):
        return
    kinds = values.map(lambda v: "number" if isinstance(v, (int, float, np.integer, np.floating))
                       else type(v).__name__)
    if kinds.nunique() > 1:
        first_of_each = kinds.drop_duplicates()
        examples = ", ".join(f"{_rows(frame, frame.index == i)} ({frame.at[i, col]!r}: {k})"
                             for i, k in first_of_each.items())
        raise DataError(
            f"Column {col!r} mixes id types ({', '.join(sorted(kinds.unique()))}): {examples}. "
            "Convert the column to one type (all text or all numbers)."
        )


def _check_ids(df: pd.DataFrame, spec: Spec) -> None:
    """Person, task and alternative ids are present and of one type; alternatives become text labels (in place)."""
    cols = spec.columns
    for c in (cols.person, cols.task, cols.alternative):
        _check_id_column(df, c)
    df[cols.alternative] = df[cols.alternative].map(_label).astype(object)


def _as_indicator(frame: pd.DataFrame, col: str, role: str) -> pd.Series:
    values = frame[col]
    if pd.api.types.is_bool_dtype(values) and not values.isna().any():
        return values.astype(bool)
    numeric = pd.to_numeric(values, errors="coerce") if not pd.api.types.is_numeric_dtype(values) else values
    bad = numeric.isna() | ~numeric.isin([0, 1])
    if bad.any():
        shown = first_few(frame.loc[bad, col].astype(str).unique().tolist())
        raise DataError(
            f"Column {col!r} ({role}) must be 0/1 or true/false; found {shown} at {_rows(frame, bad)}."
        )
    return numeric.astype(bool)


def _indicators(df: pd.DataFrame, spec: Spec) -> tuple[pd.Series, pd.Series]:
    """The chosen and available flags, bool per row (every row available without an availability column)."""
    cols = spec.columns
    chosen = _as_indicator(df, cols.chosen, "chosen indicator")
    avail = _as_indicator(df, cols.available, "availability") if cols.available else pd.Series(True, index=df.index)
    return chosen, avail


def _check_unique_keys(df: pd.DataFrame, spec: Spec) -> None:
    """One row per (person, task, alternative); under ``task_scope = "global"``, one person per task id."""
    cols = spec.columns
    dup = df.duplicated([cols.person, cols.task, cols.alternative], keep=False)
    if dup.any():
        raise DataError(
            f"Duplicate ({cols.person}, {cols.task}, {cols.alternative}) rows: "
            f"{_keys(df, dup, [cols.person, cols.task, cols.alternative])} at {_rows(df, dup)}. "
            "Each alternative may appear once per task."
        )
    if spec.data.task_scope == "global":
        owners = df.groupby(cols.task, sort=False)[cols.person].nunique()
        shared = owners[owners > 1]
        if len(shared):
            raise DataError(
                f"Column {cols.task!r}: task ids {first_few(shared.index.tolist())} appear under more than one "
                f"person (data.task_scope = \"global\" says a task id names one task of one person)."
            )


def _alternatives(df: pd.DataFrame, spec: Spec) -> tuple[list[str], pd.Series]:
    """The alternatives in order (``data.alternatives``, else first seen) and the opt-out flag per row."""
    cols = spec.columns
    seen = list(dict.fromkeys(df[cols.alternative]))
    if spec.data.alternatives is not None:
        unknown = [a for a in seen if a not in spec.data.alternatives]
        if unknown:
            raise DataError(
                f"Column {cols.alternative!r} has alternatives {first_few(unknown)} not listed in "
                f"data.alternatives = {list(spec.data.alternatives)}."
            )
        alternatives = list(spec.data.alternatives)
    else:
        alternatives = seen
    for role, label in (("data.opt_out", spec.data.opt_out),
                        ("constants.reference", spec.constants.reference if spec.constants else None)):
        if label is not None and label not in alternatives:
            raise DataError(
                f"{role} = {label!r} is not an alternative in column {cols.alternative!r} "
                f"(alternatives: {first_few(alternatives, 10)})."
            )
    is_opt_out = (df[cols.alternative] == spec.data.opt_out) if spec.data.opt_out else pd.Series(False, df.index)
    return alternatives, is_opt_out


def _drop_invalid_tasks(
    df: pd.DataFrame, chosen: pd.Series, avail: pd.Series, is_opt_out: pd.Series, spec: Spec,
    summary: ValidationSummary,
) -> tuple[pd.DataFrame, pd.Series, pd.Series, pd.Series]:
    """Each task has exactly one chosen alternative, and it is available; else an error, or dropped and counted.

    Returns the table and the three row flags, all restricted to the rows of valid tasks.
    """
    cols = spec.columns
    task_key = [cols.person, cols.task]
    n_chosen = chosen.groupby([df[cols.person], df[cols.task]], sort=False).transform("sum")
    chose_unavailable = chosen & ~avail
    bad_unavail = chose_unavailable.groupby([df[cols.person], df[cols.task]], sort=False).transform("any")
    bad_count = (n_chosen != 1) & ~bad_unavail
    problems = ((bad_unavail, "a chosen alternative that is marked unavailable"),
                (bad_count, "not exactly one chosen alternative"))
    for mask, what in problems:
        if mask.any() and spec.data.invalid_tasks != "drop":
            raise DataError(
                f"Column {cols.chosen!r}: tasks with {what} "
                f"((person, task): {_keys(df, mask, task_key)}; chosen count per row: "
                f"{first_few(n_chosen[mask].tolist())}; {_rows(df, mask)}). Fix the data, or set "
                "data.invalid_tasks = \"drop\" to remove such tasks (they are then counted)."
            )
        summary.count_removed(f"tasks with {what} (data.invalid_tasks = \"drop\")",
                              df.loc[mask, task_key].drop_duplicates().shape[0])
    drop = ~(bad_unavail | bad_count)
    df, chosen, avail, is_opt_out = df[drop], chosen[drop], avail[drop], is_opt_out[drop]
    if len(df) == 0:
        raise DataError("No valid choice task is left after removing invalid tasks.")
    return df, chosen, avail, is_opt_out


def _without_choice(df: pd.DataFrame, avail: pd.Series, spec: Spec) -> pd.Series:
    """Per row: its task offers fewer than two available alternatives, so its choice tells nothing of tastes."""
    cols = spec.columns
    return avail.groupby([df[cols.person], df[cols.task]], sort=False).transform("sum") < 2


def _check_some_choice(df: pd.DataFrame, avail: pd.Series, spec: Spec) -> None:
    """At least one task offers a choice (two or more available alternatives)."""
    if _without_choice(df, avail, spec).all():
        cols = spec.columns
        raise DataError(
            f"No task offers a choice: every task has only one available alternative (column "
            f"{cols.alternative!r}{f', availability column {cols.available!r}' if cols.available else ''}), so "
            "every choice was forced and the data say nothing about tastes. Each task needs two or more available "
            "alternatives: check the availability of the alternatives, and that the table has one row per "
            "alternative per task" + ("" if spec.wide else " (long format), or give the spec a [wide] table for a "
                                       "table with one row per task") + "."
        )


def _note_tasks_without_choice(df: pd.DataFrame, avail: pd.Series, spec: Spec, summary: ValidationSummary) -> None:
    """Count the tasks with one available alternative in the summary's notes; kept, they carry no information.

    Such a task's choice was forced: it adds 0 to the log-likelihood. It is kept (it still gives the next task
    its lagged values) and counted. A panel where no task is left with a choice is a :class:`DataError`.
    """
    cols = spec.columns
    forced = _without_choice(df, avail, spec)
    if not forced.any():
        return
    if forced.all():
        raise DataError("No task with a choice is left: every remaining task has one available alternative.")
    n_tasks = df.loc[forced, [cols.person, cols.task]].drop_duplicates().shape[0]
    persons = df.loc[forced, cols.person].drop_duplicates()
    n_persons = len(persons)
    without_any = int((~persons.isin(df.loc[~forced, cols.person])).sum())
    note = (f"{n_tasks} task{'s' if n_tasks != 1 else ''} of {n_persons} person{'s' if n_persons != 1 else ''} "
            "offer only one available alternative: kept, but a forced choice says nothing about tastes (it adds 0 "
            "to the log-likelihood and always counts as a hit)")
    if without_any:
        note += f"; {without_any} of them {'has' if without_any == 1 else 'have'} no task with a choice"
    summary.notes.append(note)


def _check_missing(df: pd.DataFrame, column: str, missing: pd.Series, exempt: pd.Series,
                   summary: ValidationSummary) -> None:
    """Missing attribute values are allowed only on ``exempt`` rows (unavailable or opt-out); those are counted."""
    bad = missing & ~exempt
    if bad.any():
        raise DataError(
            f"Attribute column {column!r} is missing for available alternatives at {_rows(df, bad)}. "
            "Fill the values, or mark those alternatives unavailable."
        )
    summary.count_filled(f"missing {column!r} on unavailable or opt-out rows", int((missing & exempt).sum()))


def _person_covariates(
    df: pd.DataFrame, spec: Spec, person_codes: np.ndarray, person_labels: pd.Index,
) -> tuple[list[str], list[np.ndarray]]:
    """The spec's person covariates: numeric, present, constant within each person.

    ``person_codes`` (row,) indexes ``person_labels`` (person,); each returned array has shape (person,).
    """
    cov_names: list[str] = []
    cov_values: list[np.ndarray] = []
    if spec.covariates is None:
        return cov_names, cov_values
    cols = spec.columns
    for c in spec.covariates.columns:
        col = df[c]
        if not pd.api.types.is_numeric_dtype(col):
            bad = pd.to_numeric(col, errors="coerce").isna() & col.notna()
            if bad.any():
                raise DataError(
                    f"Covariate column {c!r} is not numeric: values {first_few(col[bad].astype(str).unique())} "
                    f"at {_rows(df, bad)}. Code categorical covariates as 0/1 columns."
                )
            col = pd.to_numeric(col, errors="coerce")
        huge = col.notna() & ~(col.abs() <= MAX_MAGNITUDE)
        if huge.any():
            raise DataError(
                f"Covariate column {c!r} has values {first_few(col[huge].unique().tolist())} at {_rows(df, huge)}: "
                f"a covariate must be a finite number within +/-{MAX_MAGNITUDE:g}. Fix the values, or rescale the "
                "column (for example thousands instead of units)."
            )
        if col.isna().any():
            raise DataError(
                f"Covariate column {c!r} is missing for persons "
                f"{_keys(df, col.isna(), [cols.person])} ({_rows(df, col.isna())})."
            )
        spread = col.groupby(person_codes).agg(lambda s: s.max() - s.min())
        varying = spread[spread > 0].index
        if len(varying):
            raise DataError(
                f"Covariate column {c!r} varies within person {first_few(person_labels[varying].tolist())}: a "
                "person covariate must be constant across that person's rows. Use it as an attribute instead."
            )
        cov_names.append(c)
        cov_values.append(col.groupby(person_codes).first().to_numpy(float))
    return cov_names, cov_values


def _check_covariates_vary(cov_names: Sequence[str], cov_values: Sequence[np.ndarray]) -> None:
    """A person covariate (shape (person,)) that is the same for everyone is not identified."""
    for name, v in zip(cov_names, cov_values):
        if np.ptp(v) == 0:
            raise DataError(f"Person covariate {name!r} is the same ({v[0]:g}) for every person: not identified.")
