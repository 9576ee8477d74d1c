"""The ragged (no padding) layout of the panel logit against the dense, padded one and independent formulas.

References: the textbook logit probability through scipy's ``log_softmax`` (McFadden 1974) on the dense arrays,
and PyTensor's automatic differentiation of the plain dense graph (``task_loglik_graph``), as in
``test_logit_op.py``. Tolerance 1e-10 (relative), the bar the issue sets for ragged against dense.
"""

import numpy as np
import pytensor
import pytensor.tensor as pt
import pytest
from scipy.special import log_softmax

from hierchoice.inference.blocked.kernels import person_loglik, person_loglik_grad
from hierchoice.model.likelihood import (
    difference_data,
    ragged_differences,
    task_loglik_cells,
    task_loglik_graph,
)
from hierchoice.model.logit_op import batch_layout, loglik_and_grad, op_layout, padded_by_person


def _heavy_tailed_panel(rng, n_p=60, n_j=5, n_k=3, max_t=40):
    """Tasks per person from a heavy-tailed law (most persons few tasks, some many), varying availability."""
    n_tasks = np.minimum(1 + rng.negative_binomial(1, 0.15, n_p), max_t)
    n_tasks[0] = max_t  # one very loyal person sets the padded width
    X = rng.normal(size=(n_p, max_t, n_j, n_k))
    available = rng.random((n_p, max_t, n_j)) > 0.4
    available[..., 0] = True
    available[rng.random((n_p, max_t)) < 0.1, 1:] = False  # some tasks with one alternative: no information
    task_mask = np.arange(max_t)[None, :] < n_tasks[:, None]
    chosen = np.array([[rng.choice(np.flatnonzero(available[p, t])) for t in range(max_t)] for p in range(n_p)])
    chosen = np.where(task_mask, chosen, -1)
    return X, available, task_mask, chosen


def _log_softmax_loglik(X, available, task_mask, chosen, beta):
    u = np.where(available, np.einsum("ptjk,pk->ptj", X, beta), -np.inf)
    lsm = log_softmax(u, axis=-1)
    ll = np.take_along_axis(lsm, np.where(task_mask, chosen, 0)[..., None], axis=-1)[..., 0]
    return np.where(task_mask, ll, 0.0)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_ragged_op_equals_the_dense_graph_to_1e10(seed):
    rng = np.random.default_rng(seed)
    X, av, tm, ch = _heavy_tailed_panel(rng)
    dense = difference_data(X, av, tm, ch)
    ragged = ragged_differences(X, av, tm, ch)
    # only real cells are stored: one per available non-chosen alternative of a real task
    assert ragged.n_cells == int((av & tm[..., None]).sum() - tm.sum())
    assert ragged.n_cells < dense.mask.size / 3  # the padded layout here stores more than 3x the real cells
    op = op_layout(ragged)
    b = pt.dmatrix("b")
    plain = task_loglik_graph(dense, [b[:, k] for k in range(X.shape[3])]).sum()
    f_plain = pytensor.function([b], [plain, pytensor.grad(plain, b)])
    for scale in (0.3, 2.0, 8.0):
        beta = rng.normal(0, scale, (X.shape[0], X.shape[3]))
        total, grad = loglik_and_grad(op.D, op.mask, op.owner, op.buckets, beta)
        ref_total, ref_grad = f_plain(beta)
        np.testing.assert_allclose(total, _log_softmax_loglik(X, av, tm, ch, beta).sum(), rtol=1e-10)
        np.testing.assert_allclose(total, ref_total, rtol=1e-10)
        np.testing.assert_allclose(grad, ref_grad, rtol=1e-10, atol=1e-10)
        # the blocked sampler's per-person kernels on the same ragged cells
        ll_n, g_n = person_loglik_grad(ragged, beta)
        np.testing.assert_allclose(ll_n, _log_softmax_loglik(X, av, tm, ch, beta).sum(axis=1), rtol=1e-10)
        np.testing.assert_allclose(person_loglik(ragged, beta), ll_n, rtol=1e-13)
        np.testing.assert_allclose(g_n, ref_grad, rtol=1e-10, atol=1e-10)


def test_minibatch_view_pads_per_person_and_matches_the_persons_it_picks():
    rng = np.random.default_rng(3)
    X, av, tm, ch = _heavy_tailed_panel(rng, n_p=20)
    ragged = ragged_differences(X, av, tm, ch)
    D_p, mask_p, n_o, n_t = padded_by_person(ragged)
    idx = np.array([3, 0, 3, 17])  # with a repeat, as a minibatch drawn with replacement may have
    D_b = D_p[idx].transpose(1, 2, 0, 3).reshape(ragged.n_attributes, -1)
    mask_b = mask_p[idx].transpose(1, 0, 2).reshape(-1)
    _, owner, buckets = batch_layout(idx.size, n_o, n_t)
    beta = rng.normal(size=(20, ragged.n_attributes))
    total, grad = loglik_and_grad(np.ascontiguousarray(D_b), mask_b, owner, buckets, beta[idx])
    per_person = _log_softmax_loglik(X, av, tm, ch, beta).sum(axis=1)
    np.testing.assert_allclose(total, per_person[idx].sum(), rtol=1e-10)
    np.testing.assert_allclose(grad, person_loglik_grad(ragged, beta)[1][idx], rtol=1e-10, atol=1e-12)


def test_persons_subset_and_slice_equal_the_sub_panel():
    rng = np.random.default_rng(4)
    X, av, tm, ch = _heavy_tailed_panel(rng, n_p=15)
    ragged = ragged_differences(X, av, tm, ch)
    for index in (slice(4, 11), np.array([9, 2, 2, 14])):
        sub = ragged.persons(index)
        rows = np.arange(15)[index]
        ref = ragged_differences(X[rows], av[rows], tm[rows], ch[rows])
        for name in ("D", "task_ptr", "person_ptr", "task_position"):
            np.testing.assert_array_equal(getattr(sub, name), getattr(ref, name))
    # every stored task points back at a real (person, task) place of the padded arrays, each exactly once
    assert tm[ragged.task_owner, ragged.task_position].all()
    assert ragged.n_tasks == int(tm.sum())
    assert len(set(zip(ragged.task_owner.tolist(), ragged.task_position.tolist()))) == ragged.n_tasks


def test_per_task_values_on_cells_equal_log_softmax_in_the_panels_places():
    """Per-task log-probabilities over draws (what LOO and the log-likelihood group use), ragged vs scipy."""
    rng = np.random.default_rng(6)
    X, av, tm, ch = _heavy_tailed_panel(rng, n_p=25)
    ragged = ragged_differences(X, av, tm, ch)
    beta = rng.normal(0, 3, (4, 25, X.shape[3]))  # 4 draws
    per_task = task_loglik_cells(ragged, beta, chunk_cells=500)  # several chunks of draws
    ref = np.stack([_log_softmax_loglik(X, av, tm, ch, b) for b in beta])
    np.testing.assert_allclose(per_task, ref[:, ragged.task_owner, ragged.task_position], rtol=1e-10, atol=1e-13)  # atol: tasks with log P ~ -1e-8
    assert np.all(per_task[:, np.diff(ragged.task_ptr) == 0] == 0.0)  # one-alternative tasks carry nothing
