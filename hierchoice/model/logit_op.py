r"""The panel logit log-likelihood and its exact gradient as one fused PyTensor Op.

:func:`hierchoice.likelihood.task_loglik_graph` writes the difference-form
likelihood as an ordinary PyTensor graph; PyTensor differentiates it, and the
compiled value-and-gradient function makes several passes over the
(person, task, other alternative) array. :class:`PanelLogitLoglik` computes the
same total and its gradient with respect to the person tastes in **one pass**
per person, with the gradient written by hand:

.. math::

    \ell(\beta) = \sum_n \sum_t -\log\Big(1 + \sum_{j \ne c_{nt}} e^{\Delta_{ntj}}\Big),
    \qquad
    \frac{\partial \ell}{\partial \beta_{nk}} = -\sum_t \sum_{j \ne c_{nt}}
        q_{ntj}\, d_{ntjk},
    \qquad
    q_{ntj} = \frac{e^{\Delta_{ntj}}}{1 + \sum_{i \ne c_{nt}} e^{\Delta_{nti}}},

with :math:`d_{ntjk} = x_{ntjk} - x_{ntc_{nt}k}` and
:math:`\Delta_{ntj} = d_{ntj}\cdot\beta_n` (McFadden 1974; the gradient is the
familiar "observed minus expected attributes" of the conditional logit, Train
2009, *Discrete Choice Methods with Simulation*, 2nd ed., eq. 3.9, written in
differences). Values are computed with the same stable shift
:math:`m = \max(0, \max_j \Delta_{ntj})` as the graph.

The Op has an implementation for every PyTensor backend the project samples
with:

* Python ``perform`` (PyTensor's C backend, used by PyMC's own NUTS and ADVI)
  calls the numba kernel directly;
* numba (nutpie, the default backend) calls the same kernel from the compiled
  function, with no Python in the loop;
* JAX (numpyro, and nutpie's JAX backend) is the same formula in ``jax.numpy``;
  :func:`register_jax` adds it and is called by the backends that need it.

It is tested against the plain graph to 1e-10 in values and gradients
(``tests/test_logit_op.py``). Second derivatives are not implemented: NUTS and
ADVI need only the gradient.
"""

from __future__ import annotations

import functools
from typing import Any, NamedTuple

import numba
import numpy as np

from .._backend import load_backend

load_backend()

import pytensor.tensor as pt  # noqa: E402
from pytensor.gradient import DisconnectedType, grad_not_implemented, grad_undefined
from pytensor.graph.basic import Apply
from pytensor.graph.op import Op

from .likelihood import RaggedDifferences

__all__ = ["OpData", "PanelLogitLoglik", "batch_layout", "loglik_and_grad", "op_layout", "padded_by_person",
           "panel_logit_loglik", "register_jax"]


# Vectorisable exp and log. LLVM cannot vectorise calls to libm's exp/log, and these
# two functions are most of the cost of a gradient; written as range reduction plus a
# polynomial they compile to SIMD code. Relative error <= 3e-16 on the ranges used here
# (tested against numpy in tests/test_logit_op.py).
_LOG2E = 1.4426950408889634
_LN2_HI = 6.93147180369123816490e-01  # ln 2 split in two for an exact k * ln2 (Cody & Waite 1980)
_LN2_LO = 1.90821492927058770002e-10
_ROUND = 6755399441055744.0  # 1.5 * 2**52: adding it rounds to an integer held in the low mantissa bits
_ROUND_BITS = 0x4338000000000000  # its bits
_SQRT_HALF_BITS = 0x3FE6A09E667F3BCD  # bits of sqrt(1/2)
_EXPONENT_FIELD = -(1 << 52)  # 0xFFF0000000000000 as a signed 64-bit integer
#: Tasks per block of persons in :func:`loglik_and_grad` (a block's arrays stay in the L1/L2 cache).
BLOCK_ROWS = 1024
_FAST = {"nsz", "contract", "arcp"}  # no reassociation: results stay within rounding of the plain formula


@numba.njit(cache=True, fastmath=_FAST, nogil=True, error_model="numpy")
def _exp_nonpositive(x: np.ndarray, out: np.ndarray, scratch: np.ndarray) -> None:
    """``out[i] = exp(x[i])`` for ``x <= 0``; arguments below -708 give exp(-708) (~3e-308) instead of less.

    exp(x) = 2**k exp(r), k = round(x / ln 2), |r| <= ln2 / 2, exp(r) by its Taylor
    series to degree 13 (truncation error below 1e-17 relative); 2**k is built in the
    exponent bits of ``scratch``. No branches and no int <-> float conversions, so the
    loops compile to SIMD code.
    """
    bits = scratch.view(np.int64)
    for i in range(x.size):
        v = max(x[i], -708.0)
        t = v * _LOG2E + _ROUND  # k = round(v / ln 2) sits in the low bits of t
        scratch[i] = t
        k = t - _ROUND
        r = (v - k * _LN2_HI) - k * _LN2_LO
        p = 1.0 / 6227020800.0
        p = p * r + 1.0 / 479001600.0
        p = p * r + 1.0 / 39916800.0
        p = p * r + 1.0 / 3628800.0
        p = p * r + 1.0 / 362880.0
        p = p * r + 1.0 / 40320.0
        p = p * r + 1.0 / 5040.0
        p = p * r + 1.0 / 720.0
        p = p * r + 1.0 / 120.0
        p = p * r + 1.0 / 24.0
        p = p * r + 1.0 / 6.0
        p = p * r + 0.5
        p = p * r + 1.0
        out[i] = p * r + 1.0
    for i in range(x.size):
        bits[i] = (bits[i] - _ROUND_BITS + 1023) << 52  # the double 2**k
    for i in range(x.size):
        out[i] *= scratch[i]


@numba.njit(cache=True, fastmath=_FAST, nogil=True, error_model="numpy")
def _log_positive(x: np.ndarray, out: np.ndarray, scratch: np.ndarray) -> None:
    """``out[i] = log(x[i])`` for normal positive ``x``.

    x = 2**e f with f in [sqrt(1/2), sqrt(2)) (split off with integer operations); log f = 2 atanh(z),
    z = (f - 1)/(f + 1),
    |z| <= 0.172, by its series to z**19 (truncation error below 1e-17 relative).
    """
    xb = x.view(np.int64)
    fb = scratch.view(np.int64)
    eb = out.view(np.int64)
    for i in range(x.size):  # integer work only, so it vectorises (after musl's log)
        tmp = xb[i] - _SQRT_HALF_BITS
        fb[i] = xb[i] - (tmp & _EXPONENT_FIELD)  # f in [sqrt(1/2), sqrt(2))
        eb[i] = _ROUND_BITS + (tmp >> 52)  # the double 1.5 * 2**52 + e
    for i in range(x.size):
        f = scratch[i]
        e = out[i] - _ROUND
        z = (f - 1.0) / (f + 1.0)
        z2 = z * z
        p = 1.0 / 19.0
        p = p * z2 + 1.0 / 17.0
        p = p * z2 + 1.0 / 15.0
        p = p * z2 + 1.0 / 13.0
        p = p * z2 + 1.0 / 11.0
        p = p * z2 + 1.0 / 9.0
        p = p * z2 + 1.0 / 7.0
        p = p * z2 + 1.0 / 5.0
        p = p * z2 + 1.0 / 3.0
        p = p * z2 + 1.0
        out[i] = e * _LN2_HI + (e * _LN2_LO + 2.0 * z * p)


@numba.njit(cache=True, fastmath=_FAST, nogil=True, error_model="numpy")
def loglik_and_grad(D: np.ndarray, mask: np.ndarray, owner: np.ndarray, buckets: np.ndarray,
                    beta: np.ndarray) -> tuple[float, np.ndarray]:
    """Total panel log-likelihood and its gradient with respect to ``beta``.

    Parameters
    ----------
    D : ndarray, shape (n_attributes, n_cells)
        Attribute differences against the chosen alternative in the bucketed layout of :func:`op_layout`.
    mask : ndarray, shape (n_cells,)
        1 for a real cell, 0 for padding (only the per-person minibatch view pads).
    owner : ndarray of int64, shape (n_tasks,)
        The person of each task.
    buckets : ndarray of int64, shape (n_buckets, 4)
        ``(n_others, first_task, first_cell, n_tasks)`` of each bucket: tasks with the same number of non-chosen
        alternatives, whose cells are stored other-major (cell ``first_cell + j * n_tasks + i`` is other ``j``
        of the bucket's task ``i``).
    beta : ndarray, shape (n_persons, n_attributes)

    Returns
    -------
    loglik : float
    grad : ndarray, shape (n_persons, n_attributes)

    Within a bucket, tasks are taken in blocks of :data:`BLOCK_ROWS`: each pass runs over contiguous arrays, so
    it compiles to SIMD code, and the block's slice of ``D`` is still in cache when the gradient reads it again.
    No cell is padded, so the cost is linear in the number of real cells.
    """
    n_k = D.shape[0]
    n_p = beta.shape[0]
    width = BLOCK_ROWS
    b = np.empty(width)  # one attribute's tastes of each task's person
    m = np.empty(width)  # m = max(0, max_j delta_j), the stabilising shift
    s = np.empty(width)
    log_s = np.empty(width)
    beta_t = np.ascontiguousarray(beta.T)  # (attribute, person): each attribute's gathers read one row
    grad_t = np.zeros((n_k, n_p))
    total = 0.0
    for bk in range(buckets.shape[0]):
        n_o, t0, c0, n_b = buckets[bk, 0], buckets[bk, 1], buckets[bk, 2], buckets[bk, 3]
        x = np.zeros((n_o + 1, width))  # utility differences, shifted; row n_o holds -m
        ex = np.empty((n_o + 1, width))
        scratch = np.empty((n_o + 1) * width)
        for i0 in range(0, n_b, width):
            w = min(width, n_b - i0)
            for j in range(n_o):  # x[j, i] = sum_k D[k, cell(j, i)] beta[owner(i), k]
                for i in range(w):
                    x[j, i] = 0.0
            own = owner[t0 + i0 : t0 + i0 + w]
            for k in range(n_k):
                bt = beta_t[k]
                for i in range(w):
                    b[i] = bt[own[i]]
                for j in range(n_o):
                    d = D[k, c0 + j * n_b + i0 : c0 + j * n_b + i0 + w]
                    xj = x[j]
                    for i in range(w):
                        xj[i] += d[i] * b[i]
            for i in range(w):
                m[i] = 0.0
            for j in range(n_o):
                for i in range(w):
                    m[i] = max(m[i], x[j, i])
            for j in range(n_o):
                for i in range(w):
                    x[j, i] -= m[i]
            for i in range(w):
                x[n_o, i] = -m[i]
            _exp_nonpositive(x.reshape(-1), ex.reshape(-1), scratch)
            for i in range(w):
                s[i] = ex[n_o, i]  # exp(-m) + sum_j mask_j exp(delta_j - m), in [1, n_o + 1]
            for j in range(n_o):
                a = mask[c0 + j * n_b + i0 : c0 + j * n_b + i0 + w]
                ej = ex[j]
                for i in range(w):
                    ej[i] *= a[i]
                    s[i] += ej[i]
            _log_positive(s[:w], log_s[:w], scratch)
            for i in range(w):
                total -= m[i] + log_s[i]
                s[i] = 1.0 / s[i]
            for j in range(n_o):  # q_j = mask_j exp(delta_j - m) / s
                for i in range(w):
                    ex[j, i] *= s[i]
            for k in range(n_k):  # grad[owner, k] -= sum over the task's others of q_j D[k, j]
                for i in range(w):
                    b[i] = 0.0
                for j in range(n_o):
                    d = D[k, c0 + j * n_b + i0 : c0 + j * n_b + i0 + w]
                    ej = ex[j]
                    for i in range(w):
                        b[i] += ej[i] * d[i]
                gt = grad_t[k]  # tasks of a bucket come person by person: add each person's run, then store once
                cur = own[0]
                acc = 0.0
                for i in range(w):
                    if own[i] != cur:
                        gt[cur] -= acc
                        cur = own[i]
                        acc = 0.0
                    acc += b[i]
                gt[cur] -= acc
    return total, np.ascontiguousarray(grad_t.T)


class OpData(NamedTuple):
    """The panel in the Op's bucketed layout (see :func:`loglik_and_grad`); ``cell_task`` serves the JAX twin."""

    D: np.ndarray          # (attribute, cell)
    mask: np.ndarray       # (cell,)
    cell_task: np.ndarray  # (cell,) the task of each cell
    owner: np.ndarray      # (task,) the person of each task
    buckets: np.ndarray    # (bucket, 4) n_others, first task, first cell, tasks


def op_layout(data: RaggedDifferences) -> OpData:
    """The panel's real cells in the Op's layout: tasks grouped by their number of non-chosen alternatives.

    Tasks with no other alternative carry no information (log-likelihood 0) and are left out. Within a bucket
    tasks keep the panel's order and cells are other-major, so no cell is padded.
    """
    n_c = np.diff(data.task_ptr)
    owner_all = data.task_owner
    D_parts, task_parts, owner_parts, rows = [], [], [], []
    t_next = c_next = 0
    for n_o in np.unique(n_c[n_c > 0]):
        tasks = np.flatnonzero(n_c == n_o)
        cells = data.task_ptr[tasks][None, :] + np.arange(n_o)[:, None]  # (other, task): other-major
        D_parts.append(data.D[cells.reshape(-1)].T)
        task_parts.append(np.tile(np.arange(t_next, t_next + tasks.size), n_o))
        owner_parts.append(owner_all[tasks])
        rows.append((n_o, t_next, c_next, tasks.size))
        t_next += tasks.size
        c_next += tasks.size * n_o
    n_k = data.n_attributes
    D = np.ascontiguousarray(np.concatenate(D_parts, axis=1) if D_parts else np.zeros((n_k, 0)), dtype=float)
    cat = (lambda parts: np.concatenate(parts).astype(np.int64) if parts else np.zeros(0, dtype=np.int64))
    return OpData(D=D, mask=np.ones(D.shape[1]), cell_task=cat(task_parts), owner=cat(owner_parts),
                  buckets=np.array(rows, dtype=np.int64).reshape(-1, 4))


def padded_by_person(data: RaggedDifferences) -> tuple[np.ndarray, np.ndarray, int, int]:
    """Every person padded to the same tasks and others, for views that pick whole persons (minibatches).

    Returns ``D`` (person, attribute, other, task), ``mask`` (person, other, task) and the two widths; a
    minibatch of persons ``idx`` is then one bucket of :func:`loglik_and_grad` (see :func:`batch_layout`).
    """
    n_p, n_k = data.n_persons, data.n_attributes
    n_t = int(np.diff(data.person_ptr).max(initial=0))
    n_o = max(data.max_others, 1)
    owner = data.task_owner
    t_in = np.arange(data.n_tasks) - data.person_ptr[owner]
    cell_task = data.cell_task
    j_in = np.arange(data.n_cells) - data.task_ptr[cell_task]
    D = np.zeros((n_p, n_k, n_o, n_t))
    mask = np.zeros((n_p, n_o, n_t))
    D[owner[cell_task], :, j_in, t_in[cell_task]] = data.D
    mask[owner[cell_task], j_in, t_in[cell_task]] = 1.0
    return D, mask, n_o, n_t


def batch_layout(n_batch: int, n_o: int, n_t: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``cell_task``, ``owner`` and ``buckets`` of a minibatch of ``n_batch`` persons from :func:`padded_by_person`.

    The batch's ``D[idx]`` (batch, attribute, other, task) transposed to (attribute, other, batch, task) and
    flattened is one bucket with ``n_o`` others of ``n_batch * n_t`` tasks.
    """
    n_tasks = n_batch * n_t
    cell_task = np.tile(np.arange(n_tasks, dtype=np.int64), n_o)
    owner = np.repeat(np.arange(n_batch, dtype=np.int64), n_t)
    return cell_task, owner, np.array([[n_o, 0, 0, n_tasks]], dtype=np.int64)


class PanelLogitLoglik(Op):
    """``(loglik, dloglik/dbeta) = op(beta, D, mask, cell_task, owner, buckets)`` for the difference-form panel logit.

    Inputs: ``beta`` (person, attribute) tastes on the model's internal scale, and the data of
    :class:`OpData` (:func:`op_layout`). Outputs: the scalar total log-likelihood and its gradient with respect
    to ``beta``. Only the first output is differentiable; its gradient is the second output, so a
    value-and-gradient function computes both in the same pass.
    """

    __props__ = ()

    def make_node(self, beta, D, mask, cell_task, owner, buckets):  # type: ignore[no-untyped-def]
        beta, D, mask, cell_task, owner, buckets = (pt.as_tensor_variable(v)
                                                    for v in (beta, D, mask, cell_task, owner, buckets))
        dims = tuple(v.ndim for v in (beta, D, mask, cell_task, owner, buckets))
        if dims != (2, 2, 1, 1, 1, 2):
            raise TypeError(f"PanelLogitLoglik needs beta, D (2-d), mask, cell_task, owner (1-d) and buckets (2-d); "
                            f"got {dims} dimensions.")
        if any(v.type.dtype != "float64" for v in (beta, D, mask)):
            raise TypeError("PanelLogitLoglik works in float64 only.")
        if any(v.type.dtype != "int64" for v in (cell_task, owner, buckets)):
            raise TypeError("PanelLogitLoglik needs int64 cell_task, owner and buckets.")
        return Apply(self, [beta, D, mask, cell_task, owner, buckets], [pt.dscalar(), beta.type()])

    def perform(self, node, inputs, output_storage):  # type: ignore[no-untyped-def]
        beta, D, mask, _, owner, buckets = inputs
        total, grad = loglik_and_grad(D, mask, owner, buckets, np.ascontiguousarray(beta))
        output_storage[0][0] = np.asarray(total)
        output_storage[1][0] = grad

    def infer_shape(self, fgraph, node, shapes):  # type: ignore[no-untyped-def]
        return [(), shapes[0]]

    def L_op(self, inputs, outputs, output_grads):  # type: ignore[no-untyped-def]
        beta = inputs[0]
        g_total, g_grad = output_grads
        if not isinstance(g_grad.type, DisconnectedType):
            g_beta = grad_not_implemented(self, 0, beta, "second derivatives of the panel logit are not implemented")
        else:
            g_beta = g_total * outputs[1]
        return [g_beta] + [grad_undefined(self, i, v, "data") for i, v in enumerate(inputs) if i > 0]


_OP = PanelLogitLoglik()


def panel_logit_loglik(beta, D, mask, cell_task, owner, buckets):  # type: ignore[no-untyped-def]
    """Total panel logit log-likelihood of ``beta`` (person, attribute) as a scalar tensor.

    The data are those of :class:`OpData` (:func:`op_layout`), as arrays, constants or shared variables.
    """
    return _OP(beta, D, mask, cell_task, owner, buckets)[0]


# ----------------------------------------------------------------- backends


def _kernel_version() -> int:
    """A number that changes whenever the kernel's source does.

    PyTensor's on-disk cache knows the Op only by its type and this number: a fixed
    number would keep serving compiled code of an older kernel after an edit.
    """
    import hashlib
    import inspect

    source = "".join(inspect.getsource(f.py_func) for f in (_exp_nonpositive, _log_positive, loglik_and_grad))
    return int(hashlib.sha256(source.encode()).hexdigest()[:12], 16)


def _register_numba() -> None:
    from pytensor.link.numba.dispatch import basic as nb_basic

    def funcify(op, node=None, **kwargs):  # type: ignore[no-untyped-def]
        kernel = loglik_and_grad

        @nb_basic.numba_njit
        def panel_logit(beta, D, mask, cell_task, owner, buckets):  # type: ignore[no-untyped-def]
            total, grad = kernel(D, mask, owner, buckets, np.ascontiguousarray(beta))
            return np.asarray(total), grad

        return panel_logit

    register = getattr(nb_basic, "register_funcify_default_op_cache_key", None)
    if register is not None:  # PyTensor >= 2.36 caches compiled Ops on disk by key
        version = _kernel_version()
        register(PanelLogitLoglik)(lambda op, node=None, **kw: (funcify(op, node, **kw), version))
    else:
        nb_basic.numba_funcify.register(PanelLogitLoglik)(funcify)


_register_numba()


def jax_loglik_and_grad(beta, D, mask, cell_task, owner, buckets):  # type: ignore[no-untyped-def]
    """:func:`loglik_and_grad` in ``jax.numpy`` (segment sums over cells; same stable formula and layout)."""
    import jax
    import jax.numpy as jnp

    n_t = owner.shape[0]
    person = owner[cell_task]
    delta = jnp.sum(D * beta[person].T, axis=0)  # (cell,)
    m = jnp.maximum(jax.ops.segment_max(delta, cell_task, num_segments=n_t), 0.0)
    ex = jnp.exp(delta - m[cell_task]) * mask
    s = jnp.exp(-m) + jax.ops.segment_sum(ex, cell_task, num_segments=n_t)
    total = -jnp.sum(m + jnp.log(s))
    q = ex / s[cell_task]
    grad = -jax.ops.segment_sum((D * q).T, person, num_segments=beta.shape[0])
    return total, grad


@functools.cache
def register_jax() -> bool:
    """Give :class:`PanelLogitLoglik` a JAX implementation (idempotent); False if JAX is not installed."""
    import importlib.util

    if importlib.util.find_spec("jax") is None:
        return False
    from pytensor.link.jax.dispatch import jax_funcify

    @jax_funcify.register(PanelLogitLoglik)
    def _jax_panel_logit(op: Any, node: Any = None, **kwargs: Any):  # type: ignore[no-untyped-def]
        return jax_loglik_and_grad

    return True
