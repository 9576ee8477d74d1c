"""The panel data layer: a long choice table becomes validated, dense, labelled arrays.

The long format has one row per alternative per choice task, with a person id,
a task id, an alternative id, a chosen indicator and attribute columns. A
:class:`ChoicePanel` checks the table (every problem is a :class:`DataError`
that names the column and the first persons, tasks or rows at fault), codes
categorical attributes and constants, adds lag / lead / lagged-choice columns,
and pads everything to dense arrays:

=============  =========================  =============================================
array          shape                      meaning
=============  =========================  =============================================
``X``          (person, task, alt, attr)  attribute values, 0 where padded
``available``  (person, task, alt)        alternative offered in that task
``task_mask``  (person, task)             the task exists (panels are unbalanced)
``chosen``     (person, task)             index of the chosen alternative, -1 if padded
=============  =========================  =============================================

Nothing is dropped silently: every removed task and every filled cell is
counted in :attr:`ChoicePanel.summary`.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from ..exceptions import DataError, first_few
from ..spec import Spec, load_spec

__all__ = ["Term", "ValidationSummary", "ChoicePanel", "read_table", "wide_to_long", "long_to_wide", "load_panel"]

LAGGED_CHOICE = "lagged_choice"


@dataclass(frozen=True)
class Term:
    """One column of the model's attribute array and how its taste varies.

    ``kind`` is one of ``numeric``, ``dummy``, ``effects``, ``constant``, ``lag``,
    ``lead`` or ``lagged_choice``; ``source`` is the spec attribute (or the
    alternative, for a constant) it comes from.
    """

    name: str
    source: str
    kind: str
    taste: str
    sign: str | None = None
    level: str | None = None


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


# --------------------------------------------------------------------------- reading


def read_table(source: pd.DataFrame | str | Path) -> pd.DataFrame:
    """Read a DataFrame, a CSV file or a Parquet file into a DataFrame (a copy)."""
    if isinstance(source, pd.DataFrame):
        return source.copy()
    path = Path(source)
    if not path.exists():
        raise DataError(f"Data file {str(path)!r} does not exist.")
    suffix = path.suffix.lower()
    try:
        if suffix in (".parquet", ".pq"):
            return pd.read_parquet(path)
        if suffix in (".csv", ".txt", ".gz"):
            return pd.read_csv(path)
    except (ValueError, OSError, ImportError) as err:
        raise DataError(f"Could not read {str(path)!r}: {err}") from None
    except pd.errors.ParserError as err:  # pragma: no cover - pandas subclasses ValueError today
        raise DataError(f"Could not parse {str(path)!r}: {err}") from None
    raise DataError(f"Data file {str(path)!r}: unknown format {suffix!r}; use .csv or .parquet.")


# --------------------------------------------------------------------------- helpers


def _rows(frame: pd.DataFrame, mask: pd.Series | np.ndarray) -> str:
    return first_few(frame.index[np.asarray(mask)].tolist())


def _keys(frame: pd.DataFrame, mask: pd.Series | np.ndarray, cols: Sequence[str]) -> str:
    sub = frame.loc[np.asarray(mask), list(cols)].drop_duplicates()
    return first_few([tuple(r) if len(cols) > 1 else r[0] for r in sub.itertuples(index=False)])


def _check_id_column(frame: pd.DataFrame, col: str) -> None:
    values = frame[col]
    missing = values.isna()
    if missing.any():
        raise DataError(f"Column {col!r} has missing ids at rows {_rows(frame, missing)}; every row needs an id.")
    if pd.api.types.is_numeric_dtype(values) or pd.api.types.is_bool_dtype(values):
        return
    kinds = values.map(lambda v: "number" if isinstance(v, (int, float, np.integer, np.floating))
                       else type(v).__name__)
    if kinds.nunique() > 1:
        first_of_each = kinds.drop_duplicates()
        examples = ", ".join(f"row {i} ({frame.at[i, col]!r}: {k})" for i, k in first_of_each.items())
        raise DataError(
            f"Column {col!r} mixes id types ({', '.join(sorted(kinds.unique()))}): {examples}. "
            "Convert the column to one type (all text or all numbers)."
        )


def _as_indicator(frame: pd.DataFrame, col: str, role: str) -> pd.Series:
    values = frame[col]
    if pd.api.types.is_bool_dtype(values) and not values.isna().any():
        return values.astype(bool)
    numeric = pd.to_numeric(values, errors="coerce") if not pd.api.types.is_numeric_dtype(values) else values
    bad = numeric.isna() | ~numeric.isin([0, 1])
    if bad.any():
        shown = first_few(frame.loc[bad, col].astype(str).unique().tolist())
        raise DataError(
            f"Column {col!r} ({role}) must be 0/1 or true/false; found {shown} at rows {_rows(frame, bad)}."
        )
    return numeric.astype(bool)


#: Helper columns the build adds to the table; a role, attribute or covariate column may not use them.
_RESERVED = ("_pos", "_first_chosen", "_chosen", "_avail", "_row")


def _check_reserved(columns: Mapping[str, str]) -> None:
    clash = {role: c for role, c in columns.items() if c in _RESERVED or c.startswith("_v_")}
    if clash:
        listed = "; ".join(f"{c!r} ({role})" for role, c in clash.items())
        raise DataError(
            f"Column name(s) {listed} are reserved for hierchoice's own helper columns "
            f"({', '.join(_RESERVED)}, _v_*). Rename the column(s) in the table and the spec."
        )


def _label(value: Any) -> str:
    if isinstance(value, (float, np.floating)) and float(value).is_integer():
        return str(int(value))
    return str(value)


# --------------------------------------------------------------------------- the panel


class ChoicePanel:
    """A validated panel of choice tasks as dense, labelled arrays.

    Build it with :meth:`from_frame`, :meth:`from_file` or :func:`load_panel`.

    Attributes
    ----------
    X : ndarray, shape (n_persons, n_tasks, n_alternatives, n_attributes)
        Attribute values in the user's units (0 where unavailable or padded).
    available : ndarray of bool, shape (n_persons, n_tasks, n_alternatives)
    task_mask : ndarray of bool, shape (n_persons, n_tasks)
    chosen : ndarray of int, shape (n_persons, n_tasks); -1 for padded tasks
    task_ids : ndarray of object, shape (n_persons, n_tasks); the user's task ids
    lag_missing : ndarray of bool, shape (n_persons, n_tasks)
        Tasks kept under ``first_task = "flag"`` whose lag/lead was set to 0.
    Z : ndarray, shape (n_persons, n_covariates)
        Person covariates (including initial-conditions covariates).
    persons, alternatives, attributes, covariates : tuple of labels
    terms : tuple of :class:`Term`, one per attribute column
    summary : :class:`ValidationSummary`
    spec : :class:`~hierchoice.spec.Spec`
    """

    def __init__(
        self,
        *,
        X: np.ndarray,
        available: np.ndarray,
        task_mask: np.ndarray,
        chosen: np.ndarray,
        task_ids: np.ndarray,
        lag_missing: np.ndarray,
        Z: np.ndarray,
        persons: Sequence[Any],
        alternatives: Sequence[str],
        terms: Sequence[Term],
        covariates: Sequence[str],
        summary: ValidationSummary,
        spec: Spec,
    ) -> None:
        self.X = X
        self.available = available
        self.task_mask = task_mask
        self.chosen = chosen
        self.task_ids = task_ids
        self.lag_missing = lag_missing
        self.Z = Z
        self.persons = tuple(persons)
        self.alternatives = tuple(alternatives)
        self.terms = tuple(terms)
        self.covariates = tuple(covariates)
        self.summary = summary
        self.spec = spec

    # ---- construction

    @classmethod
    def from_frame(cls, frame: pd.DataFrame, spec: Spec | Mapping[str, Any] | str | Path) -> ChoicePanel:
        """Validate a long (or, if the spec has a ``[wide]`` table, wide) DataFrame."""
        spec = load_spec(spec)
        if not isinstance(frame, pd.DataFrame):
            raise DataError(f"Expected a pandas DataFrame, got {type(frame).__name__}.")
        if spec.wide is not None:
            frame = wide_to_long(frame, spec)
        return _build(frame.copy(), spec)

    @classmethod
    def from_file(cls, path: str | Path, spec: Spec | Mapping[str, Any] | str | Path) -> ChoicePanel:
        """Read a CSV or Parquet file and validate it."""
        return cls.from_frame(read_table(path), spec)

    # ---- sizes and labels

    @property
    def attributes(self) -> tuple[str, ...]:
        return tuple(t.name for t in self.terms)

    @property
    def n_persons(self) -> int:
        return int(self.X.shape[0])

    @property
    def n_tasks(self) -> int:
        """The total number of (unpadded) choice tasks."""
        return int(self.task_mask.sum())

    @property
    def tasks_per_person(self) -> np.ndarray:
        return self.task_mask.sum(axis=1)

    @property
    def chance_rate(self) -> float:
        """Mean over tasks of 1 / number of available alternatives (the hit rate of guessing)."""
        n_avail = self.available.sum(axis=2)[self.task_mask]
        return float(np.mean(1.0 / n_avail))

    def __repr__(self) -> str:
        return (
            f"ChoicePanel({self.n_persons} persons, {self.n_tasks} tasks, "
            f"{len(self.alternatives)} alternatives, attributes: {', '.join(self.attributes)})"
        )

    # ---- views

    def to_xarray(self) -> xr.Dataset:
        """The dense arrays as an :class:`xarray.Dataset` with dims person, task, alternative, attribute."""
        coords = {
            "person": list(self.persons),
            "task": np.arange(self.X.shape[1]),
            "alternative": list(self.alternatives),
            "attribute": list(self.attributes),
        }
        data_vars: dict[str, Any] = {
            "x": (("person", "task", "alternative", "attribute"), self.X),
            "available": (("person", "task", "alternative"), self.available),
            "task_mask": (("person", "task"), self.task_mask),
            "chosen": (("person", "task"), self.chosen),
            "task_id": (("person", "task"), np.array([[_label(v) if v is not None else "" for v in row]
                                                      for row in self.task_ids], dtype=str)),
            "lag_missing": (("person", "task"), self.lag_missing),
        }
        if self.covariates:
            coords["covariate"] = list(self.covariates)
            data_vars["z"] = (("person", "covariate"), self.Z)
        ds = xr.Dataset(data_vars, coords=coords)
        ds.attrs["description"] = "hierchoice panel: padded choice tasks with availability and task masks"
        return ds

    def to_long(self) -> pd.DataFrame:
        """The panel back as a long table of model columns (coded attributes, available rows only)."""
        cols = self.spec.columns
        p, t, j = np.nonzero(self.available & self.task_mask[:, :, None])
        out = pd.DataFrame({
            cols.person: np.asarray(self.persons, dtype=object)[p],
            cols.task: self.task_ids[p, t],
            cols.alternative: np.asarray(self.alternatives, dtype=object)[j],
            cols.chosen: (self.chosen[p, t] == j).astype(int),
        })
        for k, name in enumerate(self.attributes):
            out[name] = self.X[p, t, j, k]
        return out

    def with_spec(self, spec: Spec | Mapping[str, Any] | str | Path) -> ChoicePanel:
        """The same data under another spec that changes only tastes and model/sampling options.

        Each term takes its taste (and sign) from the new spec. A spec that would
        read the data differently (columns, attributes, coding, constants'
        reference, dynamics, covariates, data options) needs the table validated
        again: that is a :class:`~hierchoice.exceptions.SpecError`.
        """
        from dataclasses import replace as _replace

        from ..exceptions import SpecError

        spec = load_spec(spec)
        if spec == self.spec:
            return self
        old = self.spec

        def reading(sp: Spec) -> tuple[Any, ...]:
            attrs = tuple((a.name, a.coding, a.base, a.source) for a in sp.attributes.values())
            dyn = (sp.dynamics.lagged_choice, sp.dynamics.lag, sp.dynamics.lead, sp.dynamics.first_task,
                   sp.dynamics.initial_conditions, sp.dynamics.initial_means)
            ref = sp.constants.reference if sp.constants else None
            cov = sp.covariates.columns if sp.covariates else None
            return sp.columns, attrs, ref, dyn, cov, sp.data, sp.wide

        if reading(spec) != reading(old):
            raise SpecError(
                "This spec reads the data differently from the one the panel was validated with (columns, "
                "attributes, coding, constants, dynamics, covariates or [data]); validate the table again with it."
            )
        terms = []
        for term in self.terms:
            if term.kind == "constant":
                taste, sign = spec.constants.taste if spec.constants else term.taste, None
            elif term.source in spec.attributes and term.kind in ("numeric", "dummy", "effects"):
                taste, sign = spec.attributes[term.source].taste, spec.attributes[term.source].sign
            elif term.name in spec.attributes:
                taste, sign = spec.attributes[term.name].taste, spec.attributes[term.name].sign
            else:  # lag, lead, lagged choice without their own [attributes] table
                taste, sign = spec.dynamics.taste, None
            terms.append(_replace(term, taste=taste, sign=sign))
        return ChoicePanel(
            X=self.X, available=self.available, task_mask=self.task_mask, chosen=self.chosen,
            task_ids=self.task_ids, lag_missing=self.lag_missing, Z=self.Z, persons=self.persons,
            alternatives=self.alternatives, terms=terms, covariates=self.covariates, summary=self.summary, spec=spec,
        )

    def with_tasks(self, keep: np.ndarray, reason: str) -> ChoicePanel:
        """A panel with only the tasks where ``keep`` (person, task) is true, counted under ``reason``.

        Tasks are packed to the front of each person's row; persons left with no
        task are removed. Used by holdout splits.
        """
        keep = np.asarray(keep, dtype=bool) & self.task_mask
        summary = ValidationSummary(**{k: (dict(v) if isinstance(v, dict) else list(v) if isinstance(v, list)
                                           else v) for k, v in vars(self.summary).items()})
        summary.count_removed(reason, int(self.task_mask.sum() - keep.sum()))
        persons_kept = keep.any(axis=1)
        if not persons_kept.any():
            raise DataError(f"with_tasks({reason!r}) keeps no task: at least one task must be kept.")
        summary.count_removed(f"persons left with no task ({reason})", int((~persons_kept).sum()))
        kept = keep[persons_kept]
        order = np.argsort(~kept, axis=1, kind="stable")
        width = max(int(kept.sum(axis=1).max(initial=0)), 1)
        order = order[:, :width]

        def take(a: np.ndarray) -> np.ndarray:
            a = a[persons_kept]
            idx = order.reshape(order.shape + (1,) * (a.ndim - 2))
            return np.take_along_axis(a, idx, axis=1)

        mask = take(keep)
        chosen = np.where(mask, take(self.chosen), -1)
        avail = take(self.available) & mask[:, :, None]
        X = take(self.X) * mask[:, :, None, None]
        task_ids = take(self.task_ids).astype(object)
        task_ids[~mask] = None
        panel = ChoicePanel(
            X=X, available=avail, task_mask=mask, chosen=chosen, task_ids=task_ids,
            lag_missing=take(self.lag_missing) & mask, Z=self.Z[persons_kept],
            persons=[p for p, k in zip(self.persons, persons_kept) if k], alternatives=self.alternatives,
            terms=self.terms, covariates=self.covariates, summary=summary, spec=self.spec,
        )
        _fill_counts(panel)
        return panel


def load_panel(source: pd.DataFrame | str | Path, spec: Spec | Mapping[str, Any] | str | Path) -> ChoicePanel:
    """Read and validate a choice table (DataFrame, CSV or Parquet) under a spec."""
    spec = load_spec(spec)
    return ChoicePanel.from_frame(read_table(source), spec)


# --------------------------------------------------------------------------- the build


def _build(df: pd.DataFrame, spec: Spec) -> ChoicePanel:
    cols = spec.columns
    summary = ValidationSummary(rows_in=len(df))
    if len(df) == 0:
        raise DataError("The choice table is empty: no rows to read.")
    df.columns = [str(c) for c in df.columns]
    df = df.reset_index(drop=True)

    # 1. every named column exists
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

    # 2. ids
    for c in (cols.person, cols.task, cols.alternative):
        _check_id_column(df, c)
    df[cols.alternative] = df[cols.alternative].map(_label).astype(object)

    chosen = _as_indicator(df, cols.chosen, "chosen indicator")
    avail = _as_indicator(df, cols.available, "availability") if cols.available else pd.Series(True, index=df.index)

    dup = df.duplicated([cols.person, cols.task, cols.alternative], keep=False)
    if dup.any():
        raise DataError(
            f"Duplicate ({cols.person}, {cols.task}, {cols.alternative}) rows: "
            f"{_keys(df, dup, [cols.person, cols.task, cols.alternative])} at rows {_rows(df, dup)}. "
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

    # 3. alternatives and the opt-out
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

    # 4. tasks: exactly one chosen, and it must be available
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
                f"{first_few(n_chosen[mask].tolist())}; rows {_rows(df, mask)}). Fix the data, or set "
                "data.invalid_tasks = \"drop\" to remove such tasks (they are then counted)."
            )
        summary.count_removed(f"tasks with {what} (data.invalid_tasks = \"drop\")",
                              df.loc[mask, task_key].drop_duplicates().shape[0])
    drop = ~(bad_unavail | bad_count)
    df, chosen, avail, is_opt_out = df[drop], chosen[drop], avail[drop], is_opt_out[drop]
    if len(df) == 0:
        raise DataError("No valid choice task is left after removing invalid tasks.")

    # 5. attributes: numeric columns, categorical coding, constants
    terms: list[Term] = []
    values: dict[str, pd.Series] = {}
    exempt = ~avail | is_opt_out  # rows whose attributes never enter utility, or the opt-out's
    for attr in spec.attributes.values():
        col = df[attr.source]
        missing = col.isna()
        if attr.coding == "numeric":
            if not (pd.api.types.is_numeric_dtype(col) or pd.api.types.is_bool_dtype(col)):
                numeric = pd.to_numeric(col, errors="coerce")
                bad = numeric.isna() & ~missing
                if bad.any():
                    shown = first_few(col[bad].astype(str).unique().tolist())
                    raise DataError(
                        f"Attribute column {attr.source!r} is not numeric: values {shown} at rows "
                        f"{_rows(df, bad)}. Give coding = \"dummy\" (with base = ...) for a categorical attribute."
                    )
                col = numeric
            col = col.astype(float)
            inf = ~np.isfinite(col) & ~col.isna()
            if inf.any():
                raise DataError(f"Attribute column {attr.source!r} has infinite values at rows {_rows(df, inf)}.")
            _check_missing(df, attr.source, missing, exempt, summary)
            values[attr.name] = col.fillna(0.0)
            terms.append(Term(attr.name, attr.name, "numeric", attr.taste, attr.sign))
        else:
            _check_missing(df, attr.source, missing, exempt, summary)
            labels = col.map(lambda v: None if pd.isna(v) else _label(v))
            levels = sorted(set(labels[~missing & ~exempt]))
            if len(levels) == 1:
                raise DataError(
                    f"Attribute column {attr.source!r} has one level ({levels[0]!r}) over every available "
                    "alternative: its taste is not identified. Remove it from the spec."
                )
            if attr.base not in levels:
                raise DataError(
                    f"attributes.{attr.name}.base = {attr.base!r} is not a level of column {attr.source!r} "
                    f"(levels: {first_few(levels, 10)})."
                )
            for level in levels:
                if level == attr.base:
                    continue
                name = f"{attr.name}:{level}"
                coded = (labels == level).astype(float)
                if attr.coding == "effects":
                    coded = coded - (labels == attr.base).astype(float)
                values[name] = coded.where(~missing, 0.0)
                terms.append(Term(name, attr.name, attr.coding, attr.taste, level=level))
    if spec.constants is not None:
        for alt in alternatives:
            if alt == spec.constants.reference:
                continue
            name = f"asc:{alt}"
            values[name] = (df[cols.alternative] == alt).astype(float)
            terms.append(Term(name, alt, "constant", spec.constants.taste))

    # rows exempt from attributes carry zeros (opt-out and unavailable rows)
    for name in values:
        term = next(t for t in terms if t.name == name)
        if term.kind != "constant":
            values[name] = values[name].where(~exempt, 0.0)

    # 6. task order within person, and dynamics
    order = _task_positions(df, cols)
    df = df.assign(_pos=order)
    lag_missing = pd.Series(False, index=df.index)
    if spec.dynamics.active:
        df, values, lag_missing, terms = _add_dynamics(df, values, terms, chosen, avail, spec, summary)
        keep_idx = df.index
        chosen, avail, is_opt_out = chosen.loc[keep_idx], avail.loc[keep_idx], is_opt_out.loc[keep_idx]

    # 7. identification: an attribute must vary over available alternatives
    for term in terms:
        # the opt-out's attributes are 0 by construction; an attribute constant over the other
        # alternatives is then collinear with the alternative-specific constants
        rows = avail if term.kind in ("constant", "lagged_choice") else avail & ~is_opt_out
        v = values[term.name][rows]
        if len(v) and v.min() == v.max():
            column = f" (column {spec.attributes[term.source].source!r})" if term.source in spec.attributes else ""
            raise DataError(
                f"Attribute {term.name!r}{column} is constant ({v.iloc[0]:g}) over every available "
                "alternative: its taste is not identified. Remove it from the spec."
            )
    if not terms:
        raise DataError("The spec gives no attribute, constant or dynamic term: the model would have no taste.")

    # 8. person covariates
    cov_names: list[str] = []
    cov_values: list[np.ndarray] = []
    person_codes, person_labels = pd.factorize(df[cols.person], sort=False)
    if spec.covariates is not None:
        for c in spec.covariates.columns:
            col = df[c]
            if not pd.api.types.is_numeric_dtype(col):
                bad = pd.to_numeric(col, errors="coerce").isna() & col.notna()
                if bad.any():
                    raise DataError(
                        f"Covariate column {c!r} is not numeric: values {first_few(col[bad].astype(str).unique())} "
                        f"at rows {_rows(df, bad)}. Code categorical covariates as 0/1 columns."
                    )
                col = pd.to_numeric(col, errors="coerce")
            if col.isna().any():
                raise DataError(
                    f"Covariate column {c!r} is missing for persons "
                    f"{_keys(df, col.isna(), [cols.person])} (rows {_rows(df, col.isna())})."
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
    if spec.dynamics.initial_conditions:
        names, vals = _initial_conditions(df, values, chosen, spec, alternatives, person_codes,
                                          rows=avail & ~is_opt_out)
        cov_names += names
        cov_values += vals
    for name, v in zip(cov_names, cov_values):
        if np.ptp(v) == 0:
            raise DataError(f"Person covariate {name!r} is the same ({v[0]:g}) for every person: not identified.")

    # 9. dense arrays
    n_p = len(person_labels)
    t_idx = df["_pos"].to_numpy() - df.groupby(person_codes)["_pos"].transform("min").to_numpy()
    # re-pack after any dropped task so that tasks are contiguous from 0
    dense_t = pd.Series(t_idx).groupby(person_codes).rank(method="dense").to_numpy().astype(int) - 1
    n_t = int(dense_t.max()) + 1
    alt_index = {a: i for i, a in enumerate(alternatives)}
    j_idx = df[cols.alternative].map(alt_index).to_numpy()
    n_j, n_k = len(alternatives), len(terms)

    X = np.zeros((n_p, n_t, n_j, n_k))
    for k, term in enumerate(terms):
        X[person_codes, dense_t, j_idx, k] = values[term.name].to_numpy(float)
    available = np.zeros((n_p, n_t, n_j), dtype=bool)
    available[person_codes, dense_t, j_idx] = avail.to_numpy()
    task_mask = np.zeros((n_p, n_t), dtype=bool)
    task_mask[person_codes, dense_t] = True
    chosen_idx = np.full((n_p, n_t), -1, dtype=np.int64)
    ch = chosen.to_numpy()
    chosen_idx[person_codes[ch], dense_t[ch]] = j_idx[ch]
    task_ids = np.full((n_p, n_t), None, dtype=object)
    task_ids[person_codes, dense_t] = df[cols.task].to_numpy(dtype=object)
    lm = np.zeros((n_p, n_t), dtype=bool)
    lm[person_codes, dense_t] = lag_missing.to_numpy()
    X[~available] = 0.0
    Z = np.column_stack(cov_values) if cov_values else np.zeros((n_p, 0))

    panel = ChoicePanel(
        X=X, available=available, task_mask=task_mask, chosen=chosen_idx, task_ids=task_ids,
        lag_missing=lm, Z=Z, persons=person_labels.tolist(), alternatives=alternatives, terms=terms,
        covariates=cov_names, summary=summary, spec=spec,
    )
    _fill_counts(panel)
    return panel


def _fill_counts(panel: ChoicePanel) -> None:
    s = panel.summary
    tpp = panel.tasks_per_person
    s.persons, s.tasks = panel.n_persons, panel.n_tasks
    s.tasks_per_person = (int(tpp.min()), float(np.median(tpp)), int(tpp.max()))
    s.alternatives, s.attributes, s.covariates = panel.alternatives, panel.attributes, panel.covariates


def _check_missing(df: pd.DataFrame, column: str, missing: pd.Series, exempt: pd.Series,
                   summary: ValidationSummary) -> None:
    bad = missing & ~exempt
    if bad.any():
        raise DataError(
            f"Attribute column {column!r} is missing for available alternatives at rows {_rows(df, bad)}. "
            "Fill the values, or mark those alternatives unavailable."
        )
    summary.count_filled(f"missing {column!r} on unavailable or opt-out rows", int((missing & exempt).sum()))


def _task_positions(df: pd.DataFrame, cols: Any) -> np.ndarray:
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
    """Lag, lead and lagged choice within each person's ordered task sequence."""
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

    first_pos = df.groupby(cols.person)["_pos"].transform("min")
    last_pos = df.groupby(cols.person)["_pos"].transform("max")
    if dyn.lagged_choice:
        prev_chosen, _ = shifted(-1, "_chosen")
        # an alternative absent from the previous task was not chosen there: 0, not missing
        values[LAGGED_CHOICE] = prev_chosen.fillna(0.0)
        missing_any |= df["_pos"] == first_pos
        new_terms.append(Term(LAGGED_CHOICE, LAGGED_CHOICE, "lagged_choice", _taste_for(spec, LAGGED_CHOICE)))
    for step, names, kind, edge in ((-1, dyn.lag, "lag", first_pos), (1, dyn.lead, "lead", last_pos)):
        for name in names:
            col, present = shifted(step, f"_v_{name}")
            missing_any |= ~present & avail
            missing_any |= df["_pos"] == edge
            term_name = f"{name}_{kind}"
            values[term_name] = col.fillna(0.0)
            new_terms.append(Term(term_name, name, kind, _taste_for(spec, term_name)))
    # a task is "missing" if any of its available rows lacks a lag/lead
    task_missing = missing_any.groupby([df[cols.person], df["_pos"]]).transform("any")
    if dyn.first_task == "drop":
        n_tasks = df.loc[task_missing, [cols.person, "_pos"]].drop_duplicates().shape[0]
        summary.count_removed("tasks without a previous/next task for the lag, lead or lagged choice "
                              "(dynamics.first_task = \"drop\")", n_tasks)
        keep = ~task_missing
        if not keep.any():
            raise DataError("dynamics.first_task = \"drop\" removes every task: each person needs >= 2 tasks.")
        # the first choice is kept aside for the initial-conditions covariates
        df = df.assign(_first_chosen=_first_chosen(df, chosen, cols))
        df = df[keep]
        values = {k: v[keep] for k, v in values.items()}
        task_missing = task_missing[keep]
        summary.notes.append("first task of each person used only as the initial condition (dropped from the "
                             "likelihood) because of the lagged terms")
    else:
        df = df.assign(_first_chosen=_first_chosen(df, chosen, cols))
        n_tasks = df.loc[task_missing, [cols.person, "_pos"]].drop_duplicates().shape[0]
        summary.count_filled("tasks kept with lag/lead set to 0 (dynamics.first_task = \"flag\"; "
                             "see the panel's lag_missing mask)", n_tasks)
    return df, values, task_missing, terms + new_terms


def _first_chosen(df: pd.DataFrame, chosen: pd.Series, cols: Any) -> pd.Series:
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
    chosen: pd.Series,
    spec: Spec,
    alternatives: Sequence[str],
    person_codes: np.ndarray,
    rows: pd.Series | None = None,
) -> tuple[list[str], list[np.ndarray]]:
    """Wooldridge (2005) covariates: the first observed choice and person means of attributes.

    The means are over ``rows`` (the available, non-opt-out rows): unavailable and opt-out
    rows carry a filled 0, not an attribute value.
    """
    reference = spec.constants.reference if spec.constants else alternatives[0]
    first = df["_first_chosen"].groupby(person_codes).first()
    names, vals = [], []
    for alt in alternatives:
        if alt == reference:
            continue
        names.append(f"first_choice:{alt}")
        vals.append((first == alt).to_numpy(float))
    use = np.ones(len(df), dtype=bool) if rows is None else np.asarray(rows, dtype=bool)
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


# --------------------------------------------------------------------------- wide <-> long


def wide_to_long(frame: pd.DataFrame, spec: Spec | Mapping[str, Any] | str | Path) -> pd.DataFrame:
    """Turn a wide table (one row per task) into the long format the panel reads.

    The spec's ``[wide]`` table names the alternatives, the column holding the
    chosen alternative and the column-name ``pattern`` (for example
    ``"{attribute}{alternative}"`` turns ``price`` and ``1`` into ``price1``).
    Attributes with no per-alternative column are copied to every alternative
    (person covariates, for example).
    """
    spec = load_spec(spec)
    wide, cols = spec.wide, spec.columns
    if wide is None:
        raise DataError("wide_to_long needs a spec with a [wide] table.")
    if len(frame) == 0:
        raise DataError("The wide choice table is empty: no rows to read.")
    frame = frame.copy()
    frame.columns = [str(c) for c in frame.columns]
    for role, c in (("person", cols.person), ("task", cols.task), ("wide.choice", wide.choice)):
        if c not in frame.columns:
            raise DataError(f"Missing column {c!r} ({role}) in the wide table; it has {first_few(list(frame.columns), 12)}.")
    _check_reserved({"person": cols.person, "task": cols.task, "alternative": cols.alternative,
                     "chosen": cols.chosen}
                    | ({"available": cols.available} if cols.available else {})
                    | {f"attribute {a.name}": a.source for a in spec.attributes.values()}
                    | {f"covariate {c}": c for c in (spec.covariates.columns if spec.covariates else ())})
    labels = wide.choice_labels or {a: a for a in wide.alternatives}
    choice = frame[wide.choice].map(lambda v: None if pd.isna(v) else _label(v))
    mapped = choice.map(lambda v: labels.get(v) if v is not None else None)
    bad = mapped.isna() | ~mapped.isin(list(wide.alternatives))
    if bad.any():
        raise DataError(
            f"Column {wide.choice!r} has values {first_few(choice[bad].astype(str).unique().tolist())} at rows "
            f"{_rows(frame, bad)} that are not alternatives {list(wide.alternatives)} "
            "(map them with wide.choice_labels)."
        )
    carried = [c for c in (spec.covariates.columns if spec.covariates else ()) if c in frame.columns]
    pieces = []
    for alt in wide.alternatives:
        piece = pd.DataFrame({
            cols.person: frame[cols.person].to_numpy(),
            cols.task: frame[cols.task].to_numpy(),
            cols.alternative: alt,
            cols.chosen: (mapped == alt).astype(int).to_numpy(),
            "_row": np.arange(len(frame)),
        })
        for attr in spec.attributes.values():
            name = wide.pattern.format(attribute=attr.source, alternative=alt)
            if name in frame.columns:
                piece[attr.source] = frame[name].to_numpy()
            elif attr.source in frame.columns:
                piece[attr.source] = frame[attr.source].to_numpy()
            else:
                piece[attr.source] = np.nan  # absent for this alternative: must be unavailable or opt-out
        if wide.available_pattern is not None and cols.available:
            name = wide.available_pattern.format(alternative=alt)
            piece[cols.available] = frame[name].to_numpy() if name in frame.columns else 1
        elif cols.available:
            piece[cols.available] = 1
        for c in carried:
            piece[c] = frame[c].to_numpy()
        pieces.append(piece)
    for attr in spec.attributes.values():
        found = [wide.pattern.format(attribute=attr.source, alternative=a) in frame.columns for a in wide.alternatives]
        if not any(found) and attr.source not in frame.columns:
            expect = wide.pattern.format(attribute=attr.source, alternative=wide.alternatives[0])
            raise DataError(
                f"Attribute {attr.name!r}: no column {expect!r} (pattern {wide.pattern!r}) nor {attr.source!r} "
                "in the wide table."
            )
    long = pd.concat(pieces, ignore_index=True)
    long = long.sort_values(["_row", cols.alternative], key=lambda s: s.map(
        {a: i for i, a in enumerate(wide.alternatives)}) if s.name == cols.alternative else s, kind="stable")
    return long.drop(columns="_row").reset_index(drop=True)


def long_to_wide(frame: pd.DataFrame, spec: Spec | Mapping[str, Any] | str | Path) -> pd.DataFrame:
    """The inverse of :func:`wide_to_long` for tables whose tasks list every alternative."""
    spec = load_spec(spec)
    wide, cols = spec.wide, spec.columns
    if wide is None:
        raise DataError("long_to_wide needs a spec with a [wide] table.")
    inverse = {v: k for k, v in (wide.choice_labels or {a: a for a in wide.alternatives}).items()}
    sources = list(dict.fromkeys(a.source for a in spec.attributes.values()))
    carried = list(spec.covariates.columns) if spec.covariates else []
    with_avail = wide.available_pattern is not None and cols.available is not None
    needed = [cols.person, cols.task, cols.alternative, cols.chosen] + sources + carried
    needed += [cols.available] if with_avail else []
    absent = [c for c in needed if c not in frame.columns]
    if absent:
        raise DataError(f"Missing column(s) {first_few(absent)} in the long table; it has "
                        f"{first_few(list(frame.columns), 12)}.")
    frame = frame.copy()
    frame[cols.alternative] = frame[cols.alternative].map(_label)
    keys = [cols.person, cols.task]
    out = frame[keys + carried].drop_duplicates(keys).reset_index(drop=True)
    picked = frame.loc[frame[cols.chosen].astype(bool), keys + [cols.alternative]]
    out = out.merge(picked, on=keys, how="left").rename(columns={cols.alternative: wide.choice})
    out[wide.choice] = out[wide.choice].map(inverse)
    for alt in wide.alternatives:
        part = frame.loc[frame[cols.alternative] == alt, keys + sources + ([cols.available] if with_avail else [])]
        names = {s: wide.pattern.format(attribute=s, alternative=alt) for s in sources}
        if with_avail:
            names[cols.available] = wide.available_pattern.format(alternative=alt)  # type: ignore[union-attr]
        out = out.merge(part.rename(columns=names), on=keys, how="left")
    return out
