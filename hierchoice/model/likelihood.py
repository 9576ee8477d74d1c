r"""The panel logit log-likelihood in difference form, as a PyTensor graph and in numpy.

For person :math:`n`, task :math:`t` with chosen alternative :math:`c_{nt}` and
available set :math:`A_{nt}`, the logit probability of the observed choice given
the person's tastes :math:`\beta_n` is

.. math::

    \log P_{nt}(\beta_n) = -\log\Big(1 + \sum_{j \in A_{nt},\, j \ne c_{nt}}
        \exp(\Delta_{ntj})\Big), \qquad
    \Delta_{ntj} = (x_{ntj} - x_{nt c_{nt}}) \cdot \beta_n ,

and the panel log-likelihood of person :math:`n` is :math:`\sum_t \log P_{nt}(\beta_n)`:
the person's tastes are shared by all their tasks (McFadden 1974 for the logit;
Revelt & Train 1998, Review of Economics and Statistics 80(4), for the panel
form). The attribute differences :math:`x_{ntj} - x_{ntc}` do not depend on the
parameters and are computed once. The sum is evaluated stably as
:math:`m + \log(e^{-m} + \sum_j e^{\Delta_j - m})` with :math:`m = \max(0, \max_j \Delta_j)`,
so utility differences of any size (±800 and beyond) give finite values and
gradients. Unavailable alternatives and padded tasks contribute exactly nothing.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np

from ..data.panel import PanelCells, csr_pointers

__all__ = ["DifferenceData", "RaggedDifferences", "choice_probabilities", "difference_data", "ragged_differences",
           "cell_differences", "person_loglik_cells", "task_loglik_cells", "task_loglik_graph", "task_loglik_numpy"]


@dataclass(frozen=True)
class DifferenceData:
    """Attribute differences against the chosen alternative, padded and masked.

    Attributes
    ----------
    D : ndarray, shape (n_attributes, n_persons, n_tasks * (n_alternatives - 1))
        ``x_ntj - x_ntc`` for the non-chosen alternatives, attribute-major so that
        each attribute is one contiguous block; 0 where masked.
    mask : ndarray of float, shape (n_persons, n_tasks * (n_alternatives - 1))
        1 where the non-chosen alternative is available in a real task.
    n_tasks, n_others : int
        Shape of the (task, other alternative) block.
    """

    D: np.ndarray
    mask: np.ndarray
    n_tasks: int
    n_others: int


def difference_data(X: np.ndarray, available: np.ndarray, task_mask: np.ndarray, chosen: np.ndarray,
                    scale: np.ndarray | None = None) -> DifferenceData:
    """Build :class:`DifferenceData` from dense panel arrays (optionally dividing attributes by ``scale``)."""
    n_p, n_t, n_j, n_k = X.shape
    Xs = X / scale if scale is not None else X
    c = np.where(task_mask, chosen, 0)
    x_chosen = np.take_along_axis(Xs, c[:, :, None, None], axis=2)  # (P, T, 1, K)
    is_chosen = np.arange(n_j)[None, None, :] == c[:, :, None]
    # move the chosen alternative last, keep the others in order
    order = np.argsort(is_chosen, axis=2, kind="stable")[:, :, : n_j - 1]
    others = np.take_along_axis(Xs, order[..., None], axis=2) - x_chosen  # (P, T, J-1, K)
    mask = np.take_along_axis(available, order, axis=2) & task_mask[:, :, None]
    others = np.where(mask[..., None], others, 0.0)
    D = np.ascontiguousarray(np.moveaxis(others, -1, 0).reshape(n_k, n_p, n_t * (n_j - 1)))
    return DifferenceData(D=D, mask=mask.reshape(n_p, -1).astype(float), n_tasks=n_t, n_others=n_j - 1)


@dataclass(frozen=True)
class RaggedDifferences:
    """Attribute differences of the real cells only: no padded task, no unavailable alternative.

    A *cell* is one (task, non-chosen available alternative) pair. Cells are stored contiguously, task after task,
    and tasks person after person (compressed sparse rows, twice), so memory and the cost of a log-likelihood
    are linear in the number of real cells whatever the spread of tasks per person or of alternatives per task.

    Attributes
    ----------
    D : ndarray, shape (n_cells, n_attributes)
        ``x_ntj - x_ntc`` for each cell.
    task_ptr : ndarray of int64, shape (n_tasks + 1,)
        The cells of task ``i`` are ``D[task_ptr[i]:task_ptr[i + 1]]`` (none for a task with one alternative).
    person_ptr : ndarray of int64, shape (n_persons + 1,)
        The tasks of person ``n`` are ``person_ptr[n]:person_ptr[n + 1]``.
    task_position : ndarray of int64, shape (n_tasks,)
        Each task's column in the panel's (person, task) arrays, to place per-task values back.
    """

    D: np.ndarray
    task_ptr: np.ndarray
    person_ptr: np.ndarray
    task_position: np.ndarray

    @property
    def n_persons(self) -> int:
        return int(self.person_ptr.size - 1)

    @property
    def n_tasks(self) -> int:
        return int(self.task_ptr.size - 1)

    @property
    def n_cells(self) -> int:
        return int(self.D.shape[0])

    @property
    def n_attributes(self) -> int:
        return int(self.D.shape[1])

    @property
    def task_owner(self) -> np.ndarray:
        """(n_tasks,) the person index of each task."""
        return np.repeat(np.arange(self.n_persons), np.diff(self.person_ptr))

    @property
    def cell_task(self) -> np.ndarray:
        """(n_cells,) the task index of each cell."""
        return np.repeat(np.arange(self.n_tasks), np.diff(self.task_ptr))

    @property
    def max_others(self) -> int:
        """The largest number of cells in one task."""
        return int(np.diff(self.task_ptr).max(initial=0))

    def persons(self, index: np.ndarray | slice) -> RaggedDifferences:
        """The data of the persons ``index`` (a slice gives views; an index array may repeat persons)."""
        if isinstance(index, slice):
            start, stop, step = index.indices(self.n_persons)
            if step != 1:
                raise ValueError("persons() takes a contiguous slice")
            t0, t1 = int(self.person_ptr[start]), int(self.person_ptr[stop])
            c0, c1 = int(self.task_ptr[t0]), int(self.task_ptr[t1])
            return RaggedDifferences(D=self.D[c0:c1], task_ptr=self.task_ptr[t0 : t1 + 1] - c0,
                                     person_ptr=self.person_ptr[start : stop + 1] - t0,
                                     task_position=self.task_position[t0:t1])
        index = np.asarray(index, dtype=np.int64)
        n_t = np.diff(self.person_ptr)[index]
        tasks = _ranges(self.person_ptr[index], n_t)
        n_c = np.diff(self.task_ptr)[tasks]
        cells = _ranges(self.task_ptr[tasks], n_c)
        return RaggedDifferences(D=np.ascontiguousarray(self.D[cells]), task_ptr=csr_pointers(n_c),
                                 person_ptr=csr_pointers(n_t), task_position=self.task_position[tasks])


def _ranges(starts: np.ndarray, counts: np.ndarray) -> np.ndarray:
    """The concatenation of ``arange(s, s + c)`` over ``starts``, ``counts``."""
    counts = np.asarray(counts, dtype=np.int64)
    ptr = csr_pointers(counts)
    return np.repeat(np.asarray(starts, dtype=np.int64) - ptr[:-1], counts) + np.arange(ptr[-1])


def cell_differences(cells: PanelCells, scale: np.ndarray | None = None) -> RaggedDifferences:
    """Build :class:`RaggedDifferences` from a panel's real rows (optionally dividing attributes by ``scale``).

    Each task's non-chosen rows, minus its chosen row; tasks and cells keep the panel's order. Memory and time
    are linear in the number of real rows.
    """
    task = cells.row_task
    is_chosen = cells.alt == cells.chosen[task]
    chosen_row = np.flatnonzero(is_chosen)  # one per task, in task order
    others = np.flatnonzero(~is_chosen)
    D = cells.x[others] - cells.x[chosen_row[task[others]]]
    if scale is not None:
        D = D / scale
    return RaggedDifferences(D=np.ascontiguousarray(D, dtype=float),
                             task_ptr=csr_pointers(np.bincount(task[others], minlength=cells.n_tasks)),
                             person_ptr=cells.person_ptr, task_position=cells.position)


def ragged_differences(X: np.ndarray, available: np.ndarray, task_mask: np.ndarray, chosen: np.ndarray,
                       scale: np.ndarray | None = None) -> RaggedDifferences:
    """:func:`cell_differences` of padded (person, task, alternative[, attribute]) arrays."""
    return cell_differences(PanelCells.from_dense(X, available, task_mask, chosen), scale)


def task_loglik_cells(data: RaggedDifferences, beta: np.ndarray, *, chunk_cells: int = 1_000_000) -> np.ndarray:
    """Per-task log-probability of the observed choice on ragged cells, shape (..., n_tasks).

    ``beta`` has shape (..., n_persons, n_attributes) in the units of ``data`` (leading axes, e.g. posterior
    draws). The same stable formula as :func:`task_loglik_numpy`, with cost and memory linear in the real cells
    (leading axes are taken in chunks of about ``chunk_cells`` (draw, cell) values). A task with one alternative
    gives 0.
    """
    beta = np.asarray(beta, dtype=float)
    lead = beta.shape[:-2]
    flat = beta.reshape((-1,) + beta.shape[-2:])
    person = data.task_owner[data.cell_task]
    n_c = np.diff(data.task_ptr)
    real = np.flatnonzero(n_c > 0)
    starts = data.task_ptr[:-1][real]
    cell_real = np.repeat(np.arange(real.size), n_c[real])  # each cell's index among the tasks with cells
    out = np.zeros((flat.shape[0], data.n_tasks))
    step = max(1, chunk_cells // max(data.n_cells, 1))
    for s0 in range(0, flat.shape[0], step):
        b = flat[s0 : s0 + step]
        delta = np.einsum("ck,sck->sc", data.D, b[:, person, :]) if data.n_cells else np.zeros((b.shape[0], 0))
        if not real.size:
            continue
        m = np.maximum(np.maximum.reduceat(delta, starts, axis=1), 0.0)
        total = np.exp(-m) + np.add.reduceat(np.exp(delta - m[:, cell_real]), starts, axis=1)
        out[s0 : s0 + step, real] = -(m + np.log(total))
    return out.reshape(lead + (data.n_tasks,))


def person_loglik_cells(data: RaggedDifferences, beta: np.ndarray) -> np.ndarray:
    """Per-person panel log-likelihood on ragged cells, shape (..., n_persons): :func:`task_loglik_cells` summed
    over each person's tasks."""
    per_task = task_loglik_cells(data, beta)
    n_t = np.diff(data.person_ptr)
    out = np.zeros(per_task.shape[:-1] + (data.n_persons,))
    has = n_t > 0
    if has.any():
        out[..., has] = np.add.reduceat(per_task, data.person_ptr[:-1][has], axis=-1)
    return out


def _stable_task_loglik(delta, mask, xp):  # type: ignore[no-untyped-def]
    if xp is np:
        # numpy reduces slowly over a short last axis: loop over the (few) other alternatives instead
        cols = [delta[..., j] for j in range(delta.shape[-1])]
        m = np.maximum(functools.reduce(np.maximum, cols), 0.0)
        total = np.exp(-m)
        for j, c in enumerate(cols):
            total += mask[..., j] * np.exp(c - m)
        return -(m + np.log(total))
    # masked entries of delta are exactly 0 (their differences are zeroed), so they
    # never raise m above max(0, max over available); the mask removes their terms.
    m = xp.maximum(xp.max(delta, axis=-1, keepdims=True), 0.0)
    total = xp.exp(-m) + xp.sum(mask * xp.exp(delta - m), axis=-1, keepdims=True)
    return -(m[..., 0] + xp.log(total[..., 0]))


def task_loglik_numpy(data: DifferenceData, beta: np.ndarray) -> np.ndarray:
    """Per-task log-probability of the observed choice, shape (..., n_persons, n_tasks).

    ``beta`` has shape (..., n_persons, n_attributes) in the same units as ``data``
    (leading axes, e.g. posterior draws, broadcast). Padded tasks give 0.
    """
    beta = np.asarray(beta, dtype=float)
    lead = beta.shape[:-2]
    n_p = beta.shape[-2]
    delta = np.zeros(lead + (n_p, data.D.shape[2]))
    for k in range(data.D.shape[0]):
        delta += data.D[k] * beta[..., :, k : k + 1]
    shape = lead + (n_p, data.n_tasks, data.n_others)
    return _stable_task_loglik(delta.reshape(shape), data.mask.reshape(shape[-3:]), np)


def task_loglik_graph(data: DifferenceData, beta_columns):  # type: ignore[no-untyped-def]
    """The same as :func:`task_loglik_numpy` as a PyTensor graph.

    ``beta_columns`` is a sequence of ``n_attributes`` tensors, each either of
    shape (n_persons,) (a person taste) or a scalar (a taste shared by everyone).
    The attribute loop is unrolled so the whole expression fuses into one
    elementwise loop; no (person, attribute) matrix is ever gathered per row.
    Returns a (n_persons, n_tasks) tensor.
    """
    import pytensor.tensor as pt

    delta = None
    for k, col in enumerate(beta_columns):
        col = pt.as_tensor_variable(col)
        factor = col[:, None] if col.ndim == 1 else col
        term = pt.constant(data.D[k]) * factor
        delta = term if delta is None else delta + term
    n_p = data.D.shape[1]
    delta = delta.reshape((n_p, data.n_tasks, data.n_others))
    mask = pt.constant(data.mask.reshape(n_p, data.n_tasks, data.n_others))
    return _stable_task_loglik(delta, mask, _PT)


class _PytensorOps:
    """The few array functions the stable formula needs, PyTensor flavoured."""

    @staticmethod
    def maximum(a, b):  # type: ignore[no-untyped-def]
        import pytensor.tensor as pt

        return pt.maximum(a, b)

    @staticmethod
    def max(a, axis, keepdims):  # type: ignore[no-untyped-def]
        import pytensor.tensor as pt

        return pt.max(a, axis=axis, keepdims=keepdims)

    @staticmethod
    def sum(a, axis, keepdims):  # type: ignore[no-untyped-def]
        import pytensor.tensor as pt

        return pt.sum(a, axis=axis, keepdims=keepdims)

    @staticmethod
    def exp(a):  # type: ignore[no-untyped-def]
        import pytensor.tensor as pt

        return pt.exp(a)

    @staticmethod
    def log(a):  # type: ignore[no-untyped-def]
        import pytensor.tensor as pt

        return pt.log(a)


_PT = _PytensorOps()


def choice_probabilities(X: np.ndarray, available: np.ndarray, beta: np.ndarray) -> np.ndarray:
    """Logit probabilities of every alternative, shape (..., n_persons, n_tasks, n_alternatives).

    ``X`` is (n_persons, n_tasks, n_alternatives, n_attributes) and ``beta`` is
    (..., n_persons, n_attributes); unavailable alternatives get probability 0
    (McFadden 1974).
    """
    u = np.einsum("ptjk,...pk->...ptj", X, beta)
    u = np.where(available, u, -np.inf)
    with np.errstate(invalid="ignore"):  # padded tasks: -inf - -inf, masked below
        u = u - np.max(u, axis=-1, keepdims=True, initial=-np.inf, where=available)
    e = np.where(available, np.exp(u), 0.0)
    total = e.sum(axis=-1, keepdims=True)
    return np.divide(e, total, out=np.zeros_like(e), where=total > 0)
