"""The difference-form panel logit likelihood against independent formulas."""

import numpy as np
import pytensor
import pytensor.tensor as pt
import pytest
from scipy.special import expit, log_softmax

from hierchoice.model.likelihood import (
    choice_probabilities,
    difference_data,
    task_loglik_graph,
    task_loglik_numpy,
)


def _random_panel(rng, n_p=7, n_t=5, n_j=4, n_k=3):
    X = rng.normal(size=(n_p, n_t, n_j, n_k))
    available = rng.random((n_p, n_t, n_j)) > 0.25
    available[..., :2] = True  # at least two alternatives per task
    task_mask = np.arange(n_t)[None, :] < rng.integers(2, n_t + 1, size=n_p)[:, None]
    chosen = np.array([[rng.choice(np.flatnonzero(available[p, t])) for t in range(n_t)] for p in range(n_p)])
    chosen = np.where(task_mask, chosen, -1)
    return X, available, task_mask, chosen


def _reference_loglik(X, available, task_mask, chosen, beta):
    """Per-task log-probability by the textbook logit formula (McFadden 1974), via scipy's log_softmax."""
    u = np.einsum("ptjk,pk->ptj", X, beta)
    u = np.where(available, u, -np.inf)
    lsm = log_softmax(u, axis=-1)
    c = np.where(task_mask, chosen, 0)
    ll = np.take_along_axis(lsm, c[..., None], axis=-1)[..., 0]
    return np.where(task_mask, ll, 0.0)


def test_numpy_loglik_equals_log_softmax():
    rng = np.random.default_rng(1)
    X, av, tm, ch = _random_panel(rng)
    beta = rng.normal(size=(X.shape[0], X.shape[3]))
    data = difference_data(X, av, tm, ch)
    np.testing.assert_allclose(task_loglik_numpy(data, beta), _reference_loglik(X, av, tm, ch, beta), rtol=1e-12,
                               atol=1e-12)


def test_graph_equals_numpy_and_broadcasts_draws():
    rng = np.random.default_rng(2)
    X, av, tm, ch = _random_panel(rng)
    data = difference_data(X, av, tm, ch)
    beta = rng.normal(size=(X.shape[0], X.shape[3]))
    b = pt.dmatrix("b")
    f = pytensor.function([b], task_loglik_graph(data, [b[:, k] for k in range(X.shape[3])]))
    np.testing.assert_allclose(f(beta), task_loglik_numpy(data, beta), rtol=1e-12, atol=1e-12)
    draws = rng.normal(size=(3, X.shape[0], X.shape[3]))
    stacked = task_loglik_numpy(data, draws)
    for d in range(3):
        np.testing.assert_allclose(stacked[d], task_loglik_numpy(data, draws[d]), rtol=1e-12)


def test_scalar_taste_columns_are_shared_by_everyone():
    rng = np.random.default_rng(3)
    X, av, tm, ch = _random_panel(rng, n_k=2)
    data = difference_data(X, av, tm, ch)
    b0, b1 = pt.dscalar("b0"), pt.dvector("b1")
    f = pytensor.function([b0, b1], task_loglik_graph(data, [b0, b1]))
    v1 = rng.normal(size=X.shape[0])
    beta = np.column_stack([np.full(X.shape[0], 0.7), v1])
    np.testing.assert_allclose(f(0.7, v1), task_loglik_numpy(data, beta), rtol=1e-12)


@pytest.mark.parametrize("delta", [800.0, -800.0, 5000.0])
def test_stable_at_huge_utility_differences(delta):
    # two alternatives, one attribute: the non-chosen alternative's utility exceeds the chosen one's by `delta`.
    X = np.zeros((1, 1, 2, 1))
    X[0, 0, 1, 0] = 1.0
    data = difference_data(X, np.ones((1, 1, 2), bool), np.ones((1, 1), bool), np.zeros((1, 1), int))
    beta = np.array([[delta]])
    # exact: log P(chosen) = -log(1 + exp(delta)) = -softplus(delta); for |delta| large it is -max(delta, 0)
    expected = -np.logaddexp(0.0, delta)
    assert np.isfinite(task_loglik_numpy(data, beta)).all()
    np.testing.assert_allclose(task_loglik_numpy(data, beta)[0, 0], expected, rtol=1e-12, atol=1e-300)
    b = pt.dvector("b")
    out = task_loglik_graph(data, [b]).sum()
    f = pytensor.function([b], [out, pytensor.grad(out, b)])
    value, grad = f(np.array([delta]))
    np.testing.assert_allclose(value, expected, rtol=1e-12, atol=1e-300)
    # d/d beta of -softplus(beta) = -sigmoid(beta)
    np.testing.assert_allclose(grad[0], -expit(delta), rtol=1e-12, atol=1e-300)
    assert np.isfinite(grad).all()


def test_unavailable_and_padded_contribute_nothing():
    rng = np.random.default_rng(4)
    X, av, tm, ch = _random_panel(rng)
    beta = rng.normal(size=(X.shape[0], X.shape[3]))
    base = task_loglik_numpy(difference_data(X, av, tm, ch), beta)
    # garbage in unavailable cells and padded tasks must not change anything
    X2 = X.copy()
    X2[~av] = 1e6
    X2[~tm] = -1e6
    padded = task_loglik_numpy(difference_data(X2, av, tm, ch), beta)
    np.testing.assert_array_equal(base, padded)
    assert np.all(padded[~tm] == 0.0)
    # an extra, always-unavailable alternative and an extra padded task change nothing either
    X3 = np.concatenate([X, np.full(X.shape[:2] + (1, X.shape[3]), 3.0)], axis=2)
    av3 = np.concatenate([av, np.zeros(av.shape[:2] + (1,), bool)], axis=2)
    X3 = np.concatenate([X3, np.ones((X.shape[0], 1) + X3.shape[2:])], axis=1)
    av3 = np.concatenate([av3, np.ones((X.shape[0], 1, av3.shape[2]), bool)], axis=1)
    tm3 = np.concatenate([tm, np.zeros((X.shape[0], 1), bool)], axis=1)
    ch3 = np.concatenate([ch, np.full((X.shape[0], 1), -1)], axis=1)
    ll3 = task_loglik_numpy(difference_data(X3, av3, tm3, ch3), beta)
    np.testing.assert_allclose(ll3[:, :-1], base, rtol=1e-13)
    assert np.all(ll3[:, -1] == 0.0)


def test_choice_probabilities_sum_to_one_and_match_softmax():
    rng = np.random.default_rng(5)
    X, av, tm, ch = _random_panel(rng)
    beta = rng.normal(size=(X.shape[0], X.shape[3]))
    p = choice_probabilities(X, av, beta)
    np.testing.assert_allclose(p.sum(-1), 1.0, rtol=1e-12)
    assert np.all(p[~av] == 0)
    u = np.where(av, np.einsum("ptjk,pk->ptj", X, beta), -np.inf)
    np.testing.assert_allclose(p, np.exp(log_softmax(u, axis=-1)), rtol=1e-12, atol=1e-15)
