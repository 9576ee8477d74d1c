"""Predictive quantities on the panel's real rows (:class:`~hierchoice.data.panel.PanelCells`).

Every function works per real row (one available alternative of one real task) and per task, with reductions
over each task's rows (``np.maximum.reduceat`` / ``np.add.reduceat`` over ``row_ptr``), so memory is linear in
the real rows whatever the spread of tasks per person or of alternatives per task; posterior draws are taken in
blocks of about :data:`BLOCK_CELLS` (draw, row) values. :mod:`hierchoice.diagnostics.predictive` builds its
public outputs from them.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np

from ..data.panel import ChoicePanel
from ..exceptions import DataError

__all__ = ["BLOCK_CELLS", "Rows", "counts", "draw_block", "level_codes", "mean_probabilities", "replicate_choices",
           "row_probabilities", "share_statistics", "task_hits", "task_mask"]

#: How many (draw, row) values one vectorised block may hold (a row is one available alternative of a real task).
BLOCK_CELLS = 4_000_000


@dataclass(frozen=True)
class Rows:
    """Index arrays over the panel's real rows (:class:`~hierchoice.data.panel.PanelCells`), all linear in rows."""

    task: np.ndarray  # (n_rows,) the task of each row
    owner: np.ndarray  # (n_rows,) the person of each row
    starts: np.ndarray  # (n_tasks,) each task's first row (every real task has at least its chosen row)
    chosen_row: np.ndarray  # (n_tasks,) the row of each task's chosen alternative

    @classmethod
    def of(cls, panel: ChoicePanel) -> Rows:
        """The index arrays of ``panel``'s cells."""
        cells = panel.cells
        task = cells.row_task
        chosen_row = np.flatnonzero(cells.alt == cells.chosen[task])
        if chosen_row.size != cells.n_tasks:
            raise DataError("The panel's cells have a task whose chosen alternative is not one of its rows.")
        return cls(task=task, owner=cells.task_owner[task], starts=cells.row_ptr[:-1], chosen_row=chosen_row)


def draw_block(panel: ChoicePanel) -> int:
    """How many draws one block takes so that a (draw, row) array holds about :data:`BLOCK_CELLS` values."""
    return max(1, BLOCK_CELLS // max(1, panel.cells.x.shape[0]))


def row_probabilities(panel: ChoicePanel, rows: Rows, beta: np.ndarray) -> np.ndarray:
    """Logit probability of every real row given tastes ``beta`` (draw, person, attribute): shape (draw, row).

    Each task's probabilities are a softmax over its own rows, i.e. over its available alternatives (McFadden 1974).
    """
    x = panel.cells.x
    u = np.zeros((beta.shape[0], x.shape[0]))
    for k in range(x.shape[1]):
        u += x[:, k] * beta[:, rows.owner, k]
    if not u.shape[1]:
        return u
    u -= np.maximum.reduceat(u, rows.starts, axis=1)[:, rows.task]
    e = np.exp(u, out=u)
    return e / np.add.reduceat(e, rows.starts, axis=1)[:, rows.task]


def mean_probabilities(panel: ChoicePanel, rows: Rows, draws: np.ndarray) -> np.ndarray:
    """Posterior-mean logit probability of every real row, shape (row,); draws are taken in blocks."""
    total = np.zeros(panel.cells.x.shape[0])
    step = draw_block(panel)
    for s0 in range(0, draws.shape[0], step):
        total += row_probabilities(panel, rows, draws[s0 : s0 + step]).sum(axis=0)
    return total / draws.shape[0]


def task_mask(panel: ChoicePanel, n_t: int) -> np.ndarray:
    """(person, task) mask of the real tasks, ``n_t`` task columns: the only padded array the outputs need."""
    cells = panel.cells
    mask = np.zeros((panel.n_persons, n_t), dtype=bool)
    mask[cells.task_owner, cells.position] = True
    return mask


def task_hits(prob: np.ndarray, rows: Rows) -> np.ndarray:
    """Per-task hit, shape (..., task), of row probabilities (..., row): 1 if the chosen row is the most probable.

    Ties at the top share the hit (a tie between k alternatives scores 1/k when the
    chosen one is among them): the expected score of breaking ties at random.
    """
    top = prob >= np.maximum.reduceat(prob, rows.starts, axis=-1)[..., rows.task] - 1e-12
    return top[..., rows.chosen_row] / np.add.reduceat(top, rows.starts, axis=-1)


def level_codes(panel: ChoicePanel) -> dict[str, tuple[list[str], np.ndarray]]:
    """For each categorical attribute: its levels and each real row's level index (-1: none).

    Returns ``{attribute: (levels, codes)}`` with ``codes`` of shape (row,) over the
    panel's real rows (:class:`~hierchoice.data.panel.PanelCells`); level 0 is the
    base. The opt-out has no level.
    """
    out: dict[str, tuple[list[str], np.ndarray]] = {}
    spec = panel.spec
    cells = panel.cells
    real = np.ones(cells.alt.size, dtype=bool)
    if spec.data.opt_out is not None and spec.data.opt_out in panel.alternatives:
        real = cells.alt != panel.alternatives.index(spec.data.opt_out)
    sources: dict[str, list[int]] = {}
    for k, t in enumerate(panel.terms):
        if t.kind in ("dummy", "effects"):
            sources.setdefault(t.source, []).append(k)
    for source, ks in sources.items():
        attr = spec.attributes.get(source)
        base = attr.base if attr is not None and attr.base is not None else "base"
        levels = [str(base)] + [str(panel.terms[k].level) for k in ks]
        codes = np.full(cells.alt.size, -1, dtype=np.int64)
        cols = cells.x[:, ks]  # (row, L-1)
        is_level = cols == 1.0
        if panel.terms[ks[0]].kind == "effects":
            is_base = np.all(cols == -1.0, axis=-1)
        else:
            is_base = ~is_level.any(axis=-1)
        codes[is_base] = 0
        for i in range(len(ks)):
            codes[is_level[:, i]] = i + 1
        codes[~real] = -1
        out[source] = (levels, codes)
    return out


def counts(values: np.ndarray, n_bins: int) -> np.ndarray:
    """Per replicate, how many of ``values`` (replicate, task) fall in each bin 0..n_bins-1 (others ignored)."""
    ok = (values >= 0) & (values < n_bins)
    flat = (np.arange(values.shape[0])[:, None] * n_bins + values)[ok]
    return np.bincount(flat, minlength=values.shape[0] * n_bins).reshape(values.shape[0], n_bins)


def share_statistics(chosen_row: np.ndarray, panel: ChoicePanel,
                      levels: Mapping[str, tuple[list[str], np.ndarray]]) -> np.ndarray:
    """Choice shares of a (replicate, task) array of chosen rows, shape (replicate, statistic).

    Statistics: the share of each alternative, then for each categorical attribute
    the share of tasks whose chosen alternative has each level (over all real tasks).
    """
    n = panel.n_tasks
    cols = [counts(panel.cells.alt[chosen_row], len(panel.alternatives)) / n]
    for names, codes in levels.values():
        cols.append(counts(codes[chosen_row], len(names)) / n)
    return np.concatenate(cols, axis=-1)


def replicate_choices(prob: np.ndarray, rows: Rows, rng: np.random.Generator) -> np.ndarray:
    """One logit choice per task from row probabilities (draw, row): the chosen rows, shape (draw, task).

    Inverse-CDF sampling within each task: the chosen row is the first whose cumulative probability reaches
    a uniform draw times the task's total.
    """
    n_rows = np.diff(np.append(rows.starts, prob.shape[-1]))
    u = rng.random(prob.shape[:-1] + (rows.starts.size,)) * np.add.reduceat(prob, rows.starts, axis=-1)
    running = np.zeros_like(u)
    below = np.zeros(u.shape, dtype=np.int64)
    for k in range(int(n_rows.max(initial=0))):  # the k-th row of every task that has one
        has = np.flatnonzero(n_rows > k)
        running[..., has] += prob[..., rows.starts[has] + k]
        below[..., has] += running[..., has] < u[..., has]
    return rows.starts + np.minimum(below, n_rows - 1)
