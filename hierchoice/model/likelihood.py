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

__all__ = ["DifferenceData", "difference_data", "task_loglik_numpy", "task_loglik_graph", "choice_probabilities"]


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
