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

Owns: :class:`ChoicePanel`, :func:`load_panel`, the build that runs the steps of
:mod:`~hierchoice.data.validate`, :mod:`~hierchoice.data.coding` and
:mod:`~hierchoice.data.dynamics` in order, and the padding into dense arrays.
May import: ``hierchoice.exceptions``, ``hierchoice.spec`` and every other module of
``hierchoice.data``.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from .._display import html_table
from ..exceptions import DataError, SpecError
from ..spec import ColumnRoles, Spec, load_spec
from .coding import Term, _check_enough_persons, _check_identified, _check_magnitudes, _code_attributes
from .dynamics import _add_dynamics, _initial_conditions, _task_positions
from .read import _to_long, read_table
from .validate import (
    ValidationSummary,
    _alternatives,
    _check_columns,
    _check_covariates_vary,
    _check_ids,
    _check_some_choice,
    _check_unique_keys,
    _drop_invalid_tasks,
    _indicators,
    _label,
    _note_tasks_without_choice,
    _person_covariates,
    _prepare,
)

__all__ = ["ChoicePanel", "load_panel"]

# Term, ValidationSummary, read_table and _label are defined in the modules below and used here; other stages also
# import them from hierchoice.data.panel, so keep these imports even if this module stops using one.


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
        Tasks kept under ``first_task = "flag"`` whose lag/lead was set to 0: a person's first (or, for leads,
        last) task, a task next to one removed as invalid, or one whose alternative was absent next door.
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
            frame = _to_long(frame, spec)
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

    def _repr_html_(self) -> str:
        per = self.tasks_per_person
        rows = [("persons", self.n_persons), ("choice tasks", self.n_tasks),
                ("tasks per person", f"min {per.min()}, median {np.median(per):g}, max {per.max()}"),
                ("alternatives", ", ".join(map(str, self.alternatives))),
                ("attributes", ", ".join(self.attributes)),
                ("chance hit rate", f"{self.chance_rate:.3f}")]
        rows += [("person covariates", ", ".join(self.covariates))] if self.covariates else []
        removed = sum(self.summary.removed.values())
        rows.append(("removed in validation", f"{removed} (see panel.summary)" if removed else "nothing"))
        return html_table("ChoicePanel", rows, notes=["panel.summary has what validation found; panel.to_xarray() "
                                                      "the arrays."])

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
        spec = load_spec(spec)
        if spec == self.spec:
            return self
        if _reading(spec) != _reading(self.spec):
            raise SpecError(
                "This spec reads the data differently from the one the panel was validated with (columns, "
                "attributes, coding, constants, dynamics, covariates or [data]); validate the table again with it."
            )
        terms = [_retaste(term, spec) for term in self.terms]
        _check_enough_persons(self.n_persons, terms, spec, None)
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


def _reading(sp: Spec) -> tuple[Any, ...]:
    """What of a spec decides how the table is read (as opposed to tastes and model/sampling options)."""
    attrs = tuple((a.name, a.coding, a.base, a.source) for a in sp.attributes.values())
    dyn = (sp.dynamics.lagged_choice, sp.dynamics.lag, sp.dynamics.lead, sp.dynamics.first_task,
           sp.dynamics.initial_conditions, sp.dynamics.initial_means)
    ref = sp.constants.reference if sp.constants else None
    cov = sp.covariates.columns if sp.covariates else None
    return sp.columns, attrs, ref, dyn, cov, sp.data, sp.wide


def _retaste(term: Term, spec: Spec) -> Term:
    """``term`` with the taste (and sign) ``spec`` gives it."""
    if term.kind == "constant":
        taste, sign = spec.constants.taste if spec.constants else term.taste, None
    elif term.source in spec.attributes and term.kind in ("numeric", "dummy", "effects"):
        taste, sign = spec.attributes[term.source].taste, spec.attributes[term.source].sign
    elif term.name in spec.attributes:
        taste, sign = spec.attributes[term.name].taste, spec.attributes[term.name].sign
    else:  # lag, lead, lagged choice without their own [attributes] table
        taste, sign = spec.dynamics.taste, None
    return replace(term, taste=taste, sign=sign)


def load_panel(source: pd.DataFrame | str | Path, spec: Spec | Mapping[str, Any] | str | Path) -> ChoicePanel:
    """Read and validate a choice table (DataFrame, CSV or Parquet) under a spec."""
    spec = load_spec(spec)
    return ChoicePanel.from_frame(read_table(source), spec)



# --------------------------------------------------------------------------- the build


def _build(df: pd.DataFrame, spec: Spec) -> ChoicePanel:
    """Validate, code and pad the long table ``df`` (a copy the build may change) under ``spec``.

    Until the dense arrays, every row-wise Series shares ``df``'s index, and each step keeps only the rows
    it lets through.
    """
    cols = spec.columns
    summary = ValidationSummary(rows_in=len(df))
    df = _prepare(df)

    # 1.-4. the table: columns, ids, flags, alternatives, then valid tasks only
    _check_columns(df, spec)
    _check_ids(df, spec)
    chosen, avail = _indicators(df, spec)
    _check_unique_keys(df, spec)
    alternatives, is_opt_out = _alternatives(df, spec)
    # task order within person, numbered before invalid tasks go so that a removed task leaves a gap in _pos
    df = df.assign(_pos=_task_positions(df, cols))
    df, chosen, avail, is_opt_out = _drop_invalid_tasks(df, chosen, avail, is_opt_out, spec, summary)
    _check_some_choice(df, avail, spec)

    # 5. attributes: numeric columns, categorical coding, constants
    terms, values = _code_attributes(df, spec, alternatives, ~avail | is_opt_out, summary)

    # 6. dynamics along each person's ordered tasks (a lag/lead across a removed task counts as missing)
    lag_missing = pd.Series(False, index=df.index)
    if spec.dynamics.active:
        df, values, lag_missing, terms = _add_dynamics(df, values, terms, chosen, avail, spec, summary)
        keep_idx = df.index
        chosen, avail, is_opt_out = chosen.loc[keep_idx], avail.loc[keep_idx], is_opt_out.loc[keep_idx]

    # 7. tasks with one available alternative carry no information: kept, and counted in the notes
    _note_tasks_without_choice(df, avail, spec, summary)

    # 8. identification: an attribute must vary over available alternatives; magnitudes a utility can hold
    _check_identified(terms, values, avail, is_opt_out, spec)
    _check_magnitudes(df, terms, values, avail, spec)

    # 9. person covariates: person_codes (row,) indexes person_labels (person,)
    person_codes, person_labels = pd.factorize(df[cols.person], sort=False)
    cov_names, cov_values = _person_covariates(df, spec, person_codes, person_labels)
    if spec.dynamics.initial_conditions:
        names, vals = _initial_conditions(df, values, spec, alternatives, person_codes, rows=avail & ~is_opt_out)
        cov_names += names
        cov_values += vals
    _check_covariates_vary(cov_names, cov_values)

    # 10. dense arrays
    arrays = _dense_arrays(df, cols, person_codes, len(person_labels), alternatives, terms, values, chosen, avail,
                           lag_missing)
    Z = np.column_stack(cov_values) if cov_values else np.zeros((len(person_labels), 0))
    panel = ChoicePanel(
        **arrays, Z=Z, persons=person_labels.tolist(), alternatives=alternatives, terms=terms,
        covariates=cov_names, summary=summary, spec=spec,
    )
    _fill_counts(panel)
    _check_enough_persons(panel.n_persons, panel.terms, spec, summary)
    return panel


def _dense_arrays(
    df: pd.DataFrame,
    cols: ColumnRoles,
    person_codes: np.ndarray,
    n_p: int,
    alternatives: Sequence[str],
    terms: Sequence[Term],
    values: Mapping[str, pd.Series],
    chosen: pd.Series,
    avail: pd.Series,
    lag_missing: pd.Series,
) -> dict[str, np.ndarray]:
    """Pad the long rows into the panel's arrays, each person's tasks packed from 0 in ``_pos`` order.

    Returns ``X`` (person, task, alt, attr), ``available`` (person, task, alt), and ``task_mask``,
    ``chosen``, ``task_ids`` and ``lag_missing``, each (person, task).
    """
    t_idx = df["_pos"].to_numpy() - df.groupby(person_codes)["_pos"].transform("min").to_numpy()
    # re-pack after any dropped task so that tasks are contiguous from 0
    dense_t = pd.Series(t_idx).groupby(person_codes).rank(method="dense").to_numpy().astype(int) - 1
    n_t = int(dense_t.max()) + 1
    alt_index = {a: i for i, a in enumerate(alternatives)}
    j_idx = df[cols.alternative].map(alt_index).to_numpy()  # (row,)
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
    return {"X": X, "available": available, "task_mask": task_mask, "chosen": chosen_idx, "task_ids": task_ids,
            "lag_missing": lm}


def _fill_counts(panel: ChoicePanel) -> None:
    s = panel.summary
    tpp = panel.tasks_per_person
    s.persons, s.tasks = panel.n_persons, panel.n_tasks
    s.tasks_per_person = (int(tpp.min()), float(np.median(tpp)), int(tpp.max()))
    s.alternatives, s.attributes, s.covariates = panel.alternatives, panel.attributes, panel.covariates
