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
from dataclasses import dataclass, replace
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

__all__ = ["ChoicePanel", "PanelCells", "csr_pointers", "load_panel"]

# Term, ValidationSummary, read_table and _label are defined in the modules below and used here; other stages also
# import them from hierchoice.data.panel, so keep these imports even if this module stops using one.


# --------------------------------------------------------------------------- the panel


def csr_pointers(counts: np.ndarray) -> np.ndarray:
    """Offsets ``[0, c0, c0 + c1, ...]`` of consecutive groups of sizes ``counts`` (compressed sparse rows)."""
    out = np.zeros(len(counts) + 1, dtype=np.int64)
    np.cumsum(counts, out=out[1:])
    return out


@dataclass(frozen=True)
class PanelCells:
    """The panel's real rows only: each available alternative of each real task, nothing padded.

    Rows are stored task after task and tasks person after person (compressed sparse rows), so memory is linear
    in the number of real (task, alternative) rows whatever the spread of tasks per person.

    Attributes
    ----------
    x : ndarray, shape (n_rows, n_attributes)
        Attribute values in the user's units.
    alt : ndarray of int64, shape (n_rows,)
        The alternative of each row (an index into ``ChoicePanel.alternatives``).
    row_ptr : ndarray of int64, shape (n_tasks + 1,)
        The rows of task ``i`` are ``row_ptr[i]:row_ptr[i + 1]``, in the order of the alternatives.
    person_ptr : ndarray of int64, shape (n_persons + 1,)
        The tasks of person ``n`` are ``person_ptr[n]:person_ptr[n + 1]``, in the person's task order.
    chosen : ndarray of int64, shape (n_tasks,)
        The chosen alternative of each task.
    position : ndarray of int64, shape (n_tasks,)
        The task's column in the padded (person, task) arrays.
    task_id : ndarray of object, shape (n_tasks,)
        The user's task ids.
    lag_missing : ndarray of bool, shape (n_tasks,)
    """

    x: np.ndarray
    alt: np.ndarray
    row_ptr: np.ndarray
    person_ptr: np.ndarray
    chosen: np.ndarray
    position: np.ndarray
    task_id: np.ndarray
    lag_missing: np.ndarray

    @property
    def n_tasks(self) -> int:
        return int(self.row_ptr.size - 1)

    @property
    def n_persons(self) -> int:
        return int(self.person_ptr.size - 1)

    @property
    def task_owner(self) -> np.ndarray:
        """(n_tasks,) the person index of each task."""
        return np.repeat(np.arange(self.n_persons), np.diff(self.person_ptr))

    @property
    def row_task(self) -> np.ndarray:
        """(n_rows,) the task index of each row."""
        return np.repeat(np.arange(self.n_tasks), np.diff(self.row_ptr))

    @classmethod
    def from_dense(cls, X: np.ndarray, available: np.ndarray, task_mask: np.ndarray, chosen: np.ndarray,
                   task_ids: np.ndarray | None = None, lag_missing: np.ndarray | None = None) -> PanelCells:
        """The real rows of padded (person, task, alternative[, attribute]) arrays."""
        p, t = np.nonzero(task_mask)
        pr, tr, jr = np.nonzero(available & task_mask[:, :, None])
        number = np.zeros(task_mask.shape, dtype=np.int64)
        number[p, t] = np.arange(p.size)
        return cls(
            x=np.ascontiguousarray(X[pr, tr, jr], dtype=float), alt=jr.astype(np.int64),
            row_ptr=csr_pointers(np.bincount(number[pr, tr], minlength=p.size)),
            person_ptr=csr_pointers(task_mask.sum(axis=1)), chosen=np.asarray(chosen)[p, t].astype(np.int64),
            position=t.astype(np.int64),
            task_id=(np.asarray(task_ids, dtype=object)[p, t] if task_ids is not None
                     else np.full(p.size, None, dtype=object)),
            lag_missing=(np.asarray(lag_missing, dtype=bool)[p, t] if lag_missing is not None
                         else np.zeros(p.size, dtype=bool)),
        )

    def to_dense(self, n_alternatives: int) -> dict[str, np.ndarray]:
        """The padded arrays ``X``, ``available``, ``task_mask``, ``chosen``, ``task_ids``, ``lag_missing``."""
        n_p = self.n_persons
        n_t = max(int(self.position.max(initial=-1)) + 1, 1)
        owner = self.task_owner
        rt = self.row_task
        X = np.zeros((n_p, n_t, n_alternatives, self.x.shape[1]))
        X[owner[rt], self.position[rt], self.alt] = self.x
        available = np.zeros((n_p, n_t, n_alternatives), dtype=bool)
        available[owner[rt], self.position[rt], self.alt] = True
        task_mask = np.zeros((n_p, n_t), dtype=bool)
        task_mask[owner, self.position] = True
        chosen = np.full((n_p, n_t), -1, dtype=np.int64)
        chosen[owner, self.position] = self.chosen
        task_ids = np.full((n_p, n_t), None, dtype=object)
        task_ids[owner, self.position] = self.task_id
        lag_missing = np.zeros((n_p, n_t), dtype=bool)
        lag_missing[owner, self.position] = self.lag_missing
        return {"X": X, "available": available, "task_mask": task_mask, "chosen": chosen, "task_ids": task_ids,
                "lag_missing": lag_missing}


class ChoicePanel:
    """A validated panel of choice tasks: its real rows (:class:`PanelCells`) and labels.

    Build it with :meth:`from_frame`, :meth:`from_file` or :func:`load_panel`. The panel keeps only the real rows
    (:attr:`cells`: every available alternative of every real task, in compressed sparse rows), so its memory is
    linear in the data; fitting reads only those. The padded arrays below are built from them on first use (and
    kept), for the stages that work on (person, task, alternative) grids.

    Attributes
    ----------
    cells : :class:`PanelCells`
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
        Z: np.ndarray,
        persons: Sequence[Any],
        alternatives: Sequence[str],
        terms: Sequence[Term],
        covariates: Sequence[str],
        summary: ValidationSummary,
        spec: Spec,
        cells: PanelCells | None = None,
        X: np.ndarray | None = None,
        available: np.ndarray | None = None,
        task_mask: np.ndarray | None = None,
        chosen: np.ndarray | None = None,
        task_ids: np.ndarray | None = None,
        lag_missing: np.ndarray | None = None,
    ) -> None:
        dense = None
        if cells is None:  # from padded arrays: keep them, they are already in memory
            if X is None or available is None or task_mask is None or chosen is None:
                raise DataError("A ChoicePanel needs its cells, or the arrays X, available, task_mask and chosen.")
            cells = PanelCells.from_dense(X, available, task_mask, chosen, task_ids, lag_missing)
            dense = cells.to_dense(len(alternatives)) if task_ids is None or lag_missing is None else {
                "X": X, "available": available, "task_mask": task_mask, "chosen": chosen, "task_ids": task_ids,
                "lag_missing": lag_missing}
        self.cells = cells
        self._dense = dense
        self.Z = Z
        self.persons = tuple(persons)
        self.alternatives = tuple(alternatives)
        self.terms = tuple(terms)
        self.covariates = tuple(covariates)
        self.summary = summary
        self.spec = spec

    def _padded(self) -> dict[str, np.ndarray]:
        if self._dense is None:
            self._dense = self.cells.to_dense(len(self.alternatives))
        return self._dense

    @property
    def X(self) -> np.ndarray:
        return self._padded()["X"]

    @property
    def available(self) -> np.ndarray:
        return self._padded()["available"]

    @property
    def task_mask(self) -> np.ndarray:
        return self._padded()["task_mask"]

    @property
    def chosen(self) -> np.ndarray:
        return self._padded()["chosen"]

    @property
    def task_ids(self) -> np.ndarray:
        return self._padded()["task_ids"]

    @property
    def lag_missing(self) -> np.ndarray:
        return self._padded()["lag_missing"]

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
        return self.cells.n_persons

    @property
    def n_tasks(self) -> int:
        """The total number of (unpadded) choice tasks."""
        return self.cells.n_tasks

    @property
    def tasks_per_person(self) -> np.ndarray:
        return np.diff(self.cells.person_ptr)

    @property
    def chance_rate(self) -> float:
        """Mean over tasks of 1 / number of available alternatives (the hit rate of guessing)."""
        return float(np.mean(1.0 / np.diff(self.cells.row_ptr)))

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

    def cells_dataset(self) -> xr.Dataset:
        """The panel's real rows (:attr:`cells`) and person covariates as an :class:`xarray.Dataset`, nothing padded.

        Dims ``row`` (each available alternative of each real task), ``task`` (real tasks, person after person),
        ``person``, ``attribute``, ``alternative`` (and ``covariate``); ``row_ptr`` (``task_edge``) and
        ``person_ptr`` (``person_edge``) are the offsets of :class:`PanelCells`. What a results folder keeps of
        the panel (:meth:`from_cells_dataset` reads it back).
        """
        c = self.cells
        coords: dict[str, Any] = {"person": list(self.persons), "alternative": list(self.alternatives),
                                  "attribute": list(self.attributes)}
        data_vars: dict[str, Any] = {
            "row_x": (("row", "attribute"), c.x), "row_alternative": (("row",), c.alt),
            "row_ptr": (("task_edge",), c.row_ptr), "person_ptr": (("person_edge",), c.person_ptr),
            "task_chosen": (("task",), c.chosen), "task_position": (("task",), c.position),
            "task_id": (("task",), np.array([_label(v) for v in c.task_id], dtype=str)),
            "task_lag_missing": (("task",), c.lag_missing),
        }
        if self.covariates:
            coords["covariate"] = list(self.covariates)
            data_vars["z"] = (("person", "covariate"), self.Z)
        ds = xr.Dataset(data_vars, coords=coords)
        ds.attrs["description"] = "hierchoice panel: the real rows (available alternatives of real tasks), CSR offsets"
        return ds

    @staticmethod
    def cells_of(ds: xr.Dataset) -> PanelCells:
        """The :class:`PanelCells` of a :meth:`cells_dataset`."""
        return PanelCells(
            x=np.ascontiguousarray(ds["row_x"].values, dtype=float), alt=ds["row_alternative"].values.astype(np.int64),
            row_ptr=ds["row_ptr"].values.astype(np.int64), person_ptr=ds["person_ptr"].values.astype(np.int64),
            chosen=ds["task_chosen"].values.astype(np.int64), position=ds["task_position"].values.astype(np.int64),
            task_id=ds["task_id"].values.astype(object), lag_missing=ds["task_lag_missing"].values.astype(bool),
        )

    def to_long(self) -> pd.DataFrame:
        """The panel back as a long table of model columns (coded attributes, available rows only)."""
        cols = self.spec.columns
        c = self.cells
        task = c.row_task
        out = pd.DataFrame({
            cols.person: np.asarray(self.persons, dtype=object)[c.task_owner[task]],
            cols.task: c.task_id[task],
            cols.alternative: np.asarray(self.alternatives, dtype=object)[c.alt],
            cols.chosen: (c.chosen[task] == c.alt).astype(int),
        })
        for k, name in enumerate(self.attributes):
            out[name] = c.x[:, k]
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
        panel = ChoicePanel(
            cells=self.cells, Z=self.Z, persons=self.persons, alternatives=self.alternatives, terms=terms,
            covariates=self.covariates, summary=self.summary, spec=spec,
        )
        panel._dense = self._dense
        return panel

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

    # 10. the real rows, task after task, person after person
    cells = _cells(df, cols, person_codes, len(person_labels), alternatives, terms, values, chosen, avail,
                   lag_missing)
    Z = np.column_stack(cov_values) if cov_values else np.zeros((len(person_labels), 0))
    panel = ChoicePanel(
        cells=cells, Z=Z, persons=person_labels.tolist(), alternatives=alternatives, terms=terms,
        covariates=cov_names, summary=summary, spec=spec,
    )
    _fill_counts(panel)
    _check_enough_persons(panel.n_persons, panel.terms, spec, summary)
    return panel


def _cells(
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
) -> PanelCells:
    """The long rows as :class:`PanelCells`: available rows only, each person's tasks numbered from 0 in ``_pos``
    order (re-packed after any dropped task), rows in the order of the alternatives."""
    t_idx = df["_pos"].to_numpy() - df.groupby(person_codes)["_pos"].transform("min").to_numpy()
    dense_t = pd.Series(t_idx).groupby(person_codes).rank(method="dense").to_numpy().astype(np.int64) - 1
    alt_index = {a: i for i, a in enumerate(alternatives)}
    j_idx = df[cols.alternative].map(alt_index).to_numpy().astype(np.int64)
    keep = avail.to_numpy()
    order = np.lexsort((j_idx, dense_t, person_codes))
    order = order[keep[order]]
    p, t, j = person_codes[order].astype(np.int64), dense_t[order], j_idx[order]
    new_task = np.ones(order.size, dtype=bool)
    new_task[1:] = (p[1:] != p[:-1]) | (t[1:] != t[:-1])
    first = np.flatnonzero(new_task)
    task_of_row = np.cumsum(new_task) - 1
    ch = chosen.to_numpy()[order]
    chosen_alt = np.full(first.size, -1, dtype=np.int64)
    chosen_alt[task_of_row[ch]] = j[ch]
    x = np.empty((order.size, len(terms)))
    for k, term in enumerate(terms):
        x[:, k] = values[term.name].to_numpy(float)[order]
    return PanelCells(
        x=x, alt=j, row_ptr=np.append(first, order.size).astype(np.int64),
        person_ptr=csr_pointers(np.bincount(p[first], minlength=n_p)), chosen=chosen_alt, position=t[first],
        task_id=df[cols.task].to_numpy(dtype=object)[order][first],
        lag_missing=lag_missing.to_numpy(dtype=bool)[order][first],
    )


def _fill_counts(panel: ChoicePanel) -> None:
    s = panel.summary
    tpp = panel.tasks_per_person
    s.persons, s.tasks = panel.n_persons, panel.n_tasks
    s.tasks_per_person = (int(tpp.min()), float(np.median(tpp)), int(tpp.max()))
    s.alternatives, s.attributes, s.covariates = panel.alternatives, panel.attributes, panel.covariates
