"""The fused panel logit Op against the plain PyTensor graph and independent formulas.

The reference for values is the textbook logit probability through scipy's ``log_softmax``
(McFadden 1974), via ``task_loglik_numpy`` which ``test_likelihood.py`` checks against it;
the reference for gradients is PyTensor's automatic differentiation of the plain graph.
The issue's requirement: equal to 1e-10 at random points, values and gradients.
"""

import numpy as np
import pytensor
import pytensor.tensor as pt
import pytest
from scipy.special import log_softmax
from test_likelihood import _random_panel

import hierchoice as hc
from hierchoice.model.build import build_model
from hierchoice.model.likelihood import difference_data, ragged_differences, task_loglik_graph, task_loglik_numpy
from hierchoice.model.logit_op import (
    _exp_nonpositive,
    _log_positive,
    jax_loglik_and_grad,
    loglik_and_grad,
    op_layout,
    panel_logit_loglik,
    register_jax,
)


def test_vector_exp_matches_numpy_to_rounding():
    # reference: numpy's exp (the platform libm / SIMD implementation), relative error in units of 2**-52
    rng = np.random.default_rng(0)
    x = np.concatenate([-np.abs(rng.normal(0, 3, 50_000)), -rng.uniform(0, 708, 50_000), [0.0, -1e-300, -707.99]])
    out, scratch = np.empty_like(x), np.empty_like(x)
    _exp_nonpositive(x, out, scratch)
    assert np.max(np.abs(out - np.exp(x)) / np.exp(x)) < 4e-16
    # below -708 the result is clamped at exp(-708) ~ 3e-308, never 0, inf or nan
    tiny = np.array([-708.5, -745.0, -1e5])
    _exp_nonpositive(tiny, out[:3], scratch[:3])
    np.testing.assert_allclose(out[:3], np.exp(-708.0), rtol=4e-16)


def test_vector_log_matches_numpy_to_rounding():
    rng = np.random.default_rng(1)
    x = np.concatenate([rng.uniform(1, 5, 50_000), np.exp(rng.uniform(-700, 700, 50_000)),
                        [1.0, 1 + 2e-16, 2.0, np.sqrt(2), np.sqrt(0.5), 1e-300, 1e300]])
    out, scratch = np.empty_like(x), np.empty_like(x)
    _log_positive(x, out, scratch)
    ref = np.log(x)
    # within a few units of rounding, relative to |log x| (absolute near x = 1, where log x -> 0)
    assert np.all(np.abs(out - ref) <= 6e-16 * np.maximum(np.abs(ref), 1.0))
    assert out[x == 1.0][0] == 0.0


def _op(X, available, task_mask, chosen):
    return op_layout(ragged_differences(X, available, task_mask, chosen))


def _kernel(op, beta):
    return loglik_and_grad(op.D, op.mask, op.owner, op.buckets, beta)


def _reference_total(X, available, task_mask, chosen, beta):
    """sum over real tasks of log P(chosen) by scipy's log_softmax over the available alternatives."""
    u = np.where(available, np.einsum("ptjk,pk->ptj", X, beta), -np.inf)
    lsm = log_softmax(u, axis=-1)
    c = np.where(task_mask, chosen, 0)
    return float(np.where(task_mask, np.take_along_axis(lsm, c[..., None], axis=-1)[..., 0], 0.0).sum())


@pytest.mark.parametrize("shape", [(7, 5, 4, 3), (40, 9, 2, 5), (300, 12, 5, 2)])
def test_kernel_equals_log_softmax_and_autodiff_of_the_plain_graph(shape):
    rng = np.random.default_rng(sum(shape))
    n_p, n_t, n_j, n_k = shape
    X, av, tm, ch = _random_panel(rng, n_p=n_p, n_t=n_t, n_j=n_j, n_k=n_k)
    data = difference_data(X, av, tm, ch)
    op = _op(X, av, tm, ch)
    b = pt.dmatrix("b")
    plain = task_loglik_graph(data, [b[:, k] for k in range(n_k)]).sum()
    f_plain = pytensor.function([b], [plain, pytensor.grad(plain, b)])
    for scale in (0.3, 2.0, 8.0):
        beta = rng.normal(0, scale, (n_p, n_k))
        total, grad = _kernel(op, beta)
        ref_total, ref_grad = f_plain(beta)
        np.testing.assert_allclose(total, _reference_total(X, av, tm, ch, beta), rtol=1e-10)
        np.testing.assert_allclose(total, ref_total, rtol=1e-10)
        np.testing.assert_allclose(grad, ref_grad, rtol=1e-10, atol=1e-10)


@pytest.mark.parametrize("delta", [800.0, -800.0, 5000.0, -5000.0])
def test_kernel_is_stable_at_huge_utility_differences(delta):
    X = np.zeros((1, 1, 2, 1))
    X[0, 0, 1, 0] = 1.0
    op = _op(X, np.ones((1, 1, 2), bool), np.ones((1, 1), bool), np.zeros((1, 1), int))
    total, grad = _kernel(op, np.array([[delta]]))
    # exact: log P(chosen) = -softplus(delta); its derivative is -sigmoid(delta)
    np.testing.assert_allclose(total, -np.logaddexp(0.0, delta), rtol=1e-14)
    np.testing.assert_allclose(grad[0, 0], -0.5 * (1 + np.tanh(delta / 2)), atol=1e-300)


def test_padded_tasks_and_unavailable_alternatives_contribute_nothing():
    rng = np.random.default_rng(5)
    X, av, tm, ch = _random_panel(rng, n_p=6, n_t=7, n_j=4, n_k=2)
    data = difference_data(X, av, tm, ch)
    beta = rng.normal(size=(6, 2))
    total, _ = _kernel(_op(X, av, tm, ch), beta)
    np.testing.assert_allclose(total, task_loglik_numpy(data, beta).sum(), rtol=1e-12)
    # moving the attributes of unavailable alternatives and padded tasks changes nothing
    X2 = np.where((av & tm[..., None])[..., None], X, X + 100.0)
    total2, _ = _kernel(_op(X2, av, tm, ch), beta)
    assert total2 == pytest.approx(total, rel=1e-12)


def test_op_in_a_graph_under_c_and_numba_backends():
    rng = np.random.default_rng(9)
    X, av, tm, ch = _random_panel(rng, n_p=25, n_t=6, n_j=3, n_k=3)
    op = _op(X, av, tm, ch)
    b = pt.dmatrix("b")
    total = panel_logit_loglik(b * 1.0, *op)
    outs = [total, pytensor.grad(total, b)]
    beta = rng.normal(size=(25, 3))
    ref_total, ref_grad = _kernel(op, beta)
    for mode in ("FAST_RUN", "NUMBA"):
        value, grad = pytensor.function([b], outs, mode=mode)(beta)
        np.testing.assert_allclose(value, ref_total, rtol=1e-12)
        np.testing.assert_allclose(grad, ref_grad, rtol=1e-12)


def test_second_derivatives_are_refused_clearly():
    X, av, tm, ch = _random_panel(np.random.default_rng(2), n_p=3, n_t=2, n_j=3, n_k=2)
    op = _op(X, av, tm, ch)
    b = pt.dmatrix("b")
    g = pytensor.grad(panel_logit_loglik(b, *op), b)
    with pytest.raises(Exception, match="second derivatives"):
        pytensor.function([b], pytensor.grad(g.sum(), b))


def test_jax_implementation_matches_the_kernel():
    pytest.importorskip("jax")
    import jax

    jax.config.update("jax_enable_x64", True)
    assert register_jax()
    rng = np.random.default_rng(4)
    X, av, tm, ch = _random_panel(rng, n_p=30, n_t=5, n_j=4, n_k=3)
    op = _op(X, av, tm, ch)
    beta = rng.normal(size=(30, 3))
    ref_total, ref_grad = _kernel(op, beta)
    total, grad = jax_loglik_and_grad(beta, *op)
    np.testing.assert_allclose(float(total), ref_total, rtol=1e-12)
    np.testing.assert_allclose(np.asarray(grad), ref_grad, rtol=1e-10, atol=1e-12)
    # and through PyTensor's JAX backend, gradient included
    b = pt.dmatrix("b")
    value = panel_logit_loglik(b * 1.0, *op)
    f = pytensor.function([b], [value, pytensor.grad(value, b)], mode="JAX")
    v, g = f(beta)
    np.testing.assert_allclose(v, ref_total, rtol=1e-12)
    np.testing.assert_allclose(g, ref_grad, rtol=1e-10, atol=1e-12)


# ----------------------------------------------------------------- whole models

_FERRY_VARIANTS = {
    "correlated lognormal, constants, fixed dummy": {},
    "independent, centred": {"model": {"correlated": False, "parameterization": "centred", "price": "fare"}},
    "willingness-to-pay space": {"model": {"correlated": False, "wtp_space": True, "price": "fare"}},
}


@pytest.fixture(scope="module")
def ferry():
    sim = hc.ferry_scenario(n_persons=40, seed=3)
    return sim


def _logp_dlogp(model, x):
    f = model.logp_dlogp_function(ravel_inputs=True)
    f.set_extra_values({})
    return f(x)


def _compare_fused_and_graph(panel, spec, n_points=3, seed=0):
    fused = build_model(panel, spec)
    graph = build_model(panel, spec, likelihood="graph")
    n = sum(int(np.prod(v.shape)) for v in fused.initial_point().values())
    rng = np.random.default_rng(seed)
    for _ in range(n_points):
        x = rng.normal(0, 0.5, n)
        lp_f, g_f = _logp_dlogp(fused, x)
        lp_g, g_g = _logp_dlogp(graph, x)
        np.testing.assert_allclose(lp_f, lp_g, rtol=1e-10)
        np.testing.assert_allclose(g_f, g_g, rtol=1e-10, atol=1e-10 * np.abs(g_g).max())


@pytest.mark.parametrize("variant", list(_FERRY_VARIANTS))
def test_model_log_posterior_and_gradient_equal_the_plain_graph(ferry, variant):
    spec = hc.Spec.from_dict({**ferry.spec, **_FERRY_VARIANTS[variant]})
    panel = hc.ChoicePanel.from_frame(ferry.data, spec)
    _compare_fused_and_graph(panel, spec)


def test_model_with_covariates_and_unavailable_alternatives_equals_the_plain_graph():
    sim = hc.simulate_panel(
        [hc.SimAttribute("price", levels=[1.0, 2.0, 3.0], taste="normal", mean=-1.0, sd=0.5),
         hc.SimAttribute("speed", levels=[0.0, 1.0, 2.0], taste="fixed", mean=0.5)],
        n_persons=30, n_tasks=(3, 6), covariates={"age": {"price": 0.3}}, unavailable_rate=0.2, seed=8,
    )
    panel = hc.ChoicePanel.from_frame(sim.data, sim.spec)
    _compare_fused_and_graph(panel, sim.spec)
