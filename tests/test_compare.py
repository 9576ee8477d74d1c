"""PSIS-LOO at task and person level, the simulated person marginal likelihood, and model comparison.

No model is sampled here: the fits are built from invented posteriors around known tastes, so the
tests check the arithmetic (against ArviZ and against Gauss–Hermite quadrature), not the sampler.
Gauss–Hermite reference values come from ``numpy.polynomial.hermite_e.hermegauss`` (probabilists'
Hermite nodes, weight exp(-x^2/2), so E[f(Z)] = sum_i w_i f(x_i) / sqrt(2 pi) for Z ~ N(0, 1); NumPy
2.4 documentation).
"""

from __future__ import annotations

import warnings
from typing import Any

import arviz as az
import numpy as np
import pytest
from numpy.polynomial.hermite_e import hermegauss
from scipy.special import logsumexp

from hierchoice import ChoicePanel, FitError, SimAttribute, simulate_panel
from hierchoice.diagnostics.loo import (
    PERSON_LOGLIK, compare_models, pareto_k_checks, person_log_marginal, person_loo, task_loo,
)
from hierchoice.inference.sampling import add_log_likelihood
from hierchoice.inference.results import ChoiceFit
from hierchoice.model.build import model_layout

N_CHAINS, N_DRAWS = 2, 3


def _fake_fit(panel: ChoicePanel, posterior: dict[str, np.ndarray], *, log_lik: bool = True) -> ChoiceFit:
    """A ChoiceFit whose posterior is the given arrays (chain, draw, ...) with the model's dims."""
    layout = model_layout(panel)
    dims = {"person_taste": ["person", "attribute"], "taste_mean": ["attribute"], "taste_sd": ["random_attribute"],
            "taste_corr": ["random_attribute", "random_attribute_bis"],
            "covariate_effect": ["covariate", "shifted_attribute"]}
    coords: dict[str, Any] = {"person": list(panel.persons), "attribute": layout.names,
                              "random_attribute": layout.random_names, "random_attribute_bis": layout.random_names,
                              "covariate": list(layout.covariates), "shifted_attribute": layout.shifted_names}
    idata = az.from_dict(posterior=posterior, dims={k: v for k, v in dims.items() if k in posterior}, coords=coords)
    result = ChoiceFit(idata=idata, panel=panel, spec=panel.spec, layout=layout, info={"backend": "invented"})
    if log_lik and "person_taste" in posterior:
        add_log_likelihood(result)
    return result


def _panel(attributes: list[SimAttribute], seed: int, **kw: Any) -> ChoicePanel:
    extra = kw.pop("spec_extra", {})
    sim = simulate_panel(attributes, n_persons=kw.pop("n_persons", 20), n_tasks=kw.pop("n_tasks", (4, 7)),
                         alternatives=("a", "b", "c"), seed=seed, **kw)
    spec = sim.spec | extra
    return ChoicePanel.from_frame(sim.data, spec)


def _person_loglik(panel: ChoicePanel, beta: np.ndarray) -> np.ndarray:
    """Independent panel log-likelihood: softmax over available alternatives, shape beta.shape[:-2] + (P,).

    ``beta`` is (..., P, K); written from the logit formula (McFadden 1974), not with the package's kernel.
    """
    u = np.einsum("ptjk,...pk->...ptj", panel.X, beta)
    avail = panel.available | ~panel.task_mask[:, :, None]  # padded tasks: any finite value, masked below
    u = np.where(avail, u, -np.inf)
    c = np.clip(panel.chosen, 0, None)
    u_c = np.take_along_axis(u, np.broadcast_to(c[..., None], u.shape[:-1] + (1,)), axis=-1)[..., 0]
    ll = np.where(panel.task_mask, u_c - logsumexp(u, axis=-1), 0.0)
    return ll.sum(axis=-1)


def _draws(rng: np.random.Generator, centre: np.ndarray, spread: float) -> np.ndarray:
    return centre + spread * rng.standard_normal((N_CHAINS, N_DRAWS) + np.shape(centre))


# --------------------------------------------------------------------------- person marginal vs quadrature


@pytest.mark.parametrize("taste", ["normal", "lognormal"])
def test_person_marginal_matches_gauss_hermite_one_coefficient(taste: str) -> None:
    levels = np.linspace(-1.5, 1.5, 7).tolist()
    attr = (SimAttribute("x", levels=levels, taste="normal", mean=0.6, sd=1.2) if taste == "normal" else
            SimAttribute("x", levels=levels, taste="lognormal", mean=np.log(0.8), sd=0.7, sign="negative"))
    panel = _panel([attr], seed=11, covariates={"age": {"x": 0.4}})
    rng = np.random.default_rng(5)
    mu = _draws(rng, np.array([0.6 if taste == "normal" else np.log(0.8)]), 0.1)
    sd = np.abs(_draws(rng, np.array([1.2 if taste == "normal" else 0.7]), 0.1))
    gamma = _draws(rng, np.array([[0.4]]), 0.05)
    fit = _fake_fit(panel, {"taste_mean": mu, "taste_sd": sd, "covariate_effect": gamma})
    est = person_log_marginal(fit, n_sim=3000, seed=1)

    x, w = hermegauss(60)
    z = panel.Z[:, 0] - panel.Z[:, 0].mean()  # the covariate shifts the mean at its deviation from the sample mean
    sign = -1.0 if taste == "lognormal" else 1.0
    ref = np.empty((N_CHAINS, N_DRAWS, panel.n_persons))
    for c in range(N_CHAINS):
        for d in range(N_DRAWS):
            eta = mu[c, d, 0] + gamma[c, d, 0, 0] * z[None, :] + sd[c, d, 0] * x[:, None]  # (node, P)
            beta = eta if taste == "normal" else sign * np.exp(eta)
            ll = _person_loglik(panel, beta[..., None])  # (node, P)
            ref[c, d] = logsumexp(ll, axis=0, b=w[:, None] / np.sqrt(2 * np.pi))
    value, se = est["log_marginal"].values, est["mc_se"].values
    assert value.shape == ref.shape
    assert np.all(se > 0)
    zscore = (value - ref) / se
    # within its Monte Carlo error: 4 standard errors everywhere (bias ~ se^2/2 is negligible at this S)
    assert np.max(np.abs(zscore)) < 4.0
    # and the stated error is honest: the standardised errors have a spread near 1
    assert 0.6 < float(np.std(zscore)) < 1.5


def test_person_marginal_matches_quadrature_with_correlation_and_wtp_space() -> None:
    attrs = [SimAttribute("fare", levels=[1.0, 2.0, 3.0, 4.0], taste="lognormal", mean=np.log(0.7), sd=0.4,
                          sign="negative"),
             SimAttribute("x", levels=np.linspace(-1, 1, 5).tolist(), taste="normal", mean=1.0, sd=0.8)]
    panel = _panel(attrs, seed=4, correlation=0.5,
                   spec_extra={"model": {"correlated": True, "wtp_space": True, "price": "fare"}})
    assert panel.spec.model.wtp_space and panel.spec.model.correlated
    rng = np.random.default_rng(9)
    mu = _draws(rng, np.array([np.log(0.7), 1.4]), 0.05)
    sd = np.abs(_draws(rng, np.array([0.4, 1.1]), 0.05))
    rho = np.clip(_draws(rng, np.array(0.5), 0.1), -0.9, 0.9)
    corr = np.ones((N_CHAINS, N_DRAWS, 2, 2))
    corr[..., 0, 1] = corr[..., 1, 0] = rho
    fit = _fake_fit(panel, {"taste_mean": mu, "taste_sd": sd, "taste_corr": corr})
    est = person_log_marginal(fit, n_sim=3000, seed=2)

    x, w = hermegauss(40)
    X1, X2 = np.meshgrid(x, x, indexing="ij")
    W = (w[:, None] * w[None, :]).ravel() / (2 * np.pi)
    nodes = np.stack([X1.ravel(), X2.ravel()], axis=-1)  # (node, 2) standard normal pairs
    ref = np.empty((N_CHAINS, N_DRAWS, panel.n_persons))
    for c in range(N_CHAINS):
        for d in range(N_DRAWS):
            L = np.linalg.cholesky(corr[c, d])
            e = nodes @ L.T
            lam = np.exp(mu[c, d, 0] + sd[c, d, 0] * e[:, 0])  # price coefficient is -lambda
            wtp = mu[c, d, 1] + sd[c, d, 1] * e[:, 1]  # every other coefficient is lambda * wtp (Train & Weeks 2005)
            beta = np.stack([-lam, lam * wtp], axis=-1)[:, None, :].repeat(panel.n_persons, axis=1)
            ref[c, d] = logsumexp(_person_loglik(panel, beta), axis=0, b=W[:, None])
    zscore = (est["log_marginal"].values - ref) / est["mc_se"].values
    assert np.max(np.abs(zscore)) < 4.0


def test_person_marginal_is_exact_without_random_tastes() -> None:
    panel = _panel([SimAttribute("x", levels=[0.0, 1.0, 2.0], taste="fixed", mean=0.7)], seed=3)
    rng = np.random.default_rng(0)
    mu = _draws(rng, np.array([0.7]), 0.2)
    fit = _fake_fit(panel, {"taste_mean": mu})
    est = person_log_marginal(fit, n_sim=5, seed=0)
    exact = _person_loglik(panel, np.broadcast_to(mu[:, :, None, :], (N_CHAINS, N_DRAWS, panel.n_persons, 1)))
    np.testing.assert_allclose(est["log_marginal"].values, exact, rtol=0, atol=1e-10)
    assert np.all(est["mc_se"].values == 0)


# --------------------------------------------------------------------------- LOO


@pytest.fixture(scope="module")
def two_fits() -> dict[str, ChoiceFit]:
    """Tastes near the truth, and tastes near zero, on one invented panel (60 persons)."""
    attrs = [SimAttribute("x1", levels=np.linspace(-1.5, 1.5, 7).tolist(), mean=1.0, sd=0.8),
             SimAttribute("x2", levels=np.linspace(-1.5, 1.5, 7).tolist(), mean=-0.5, sd=0.4)]
    sim = simulate_panel(attrs, n_persons=60, n_tasks=6, alternatives=("a", "b", "c"), seed=21)
    panel = ChoicePanel.from_frame(sim.data, sim.spec)
    truth = sim.truth["person_taste"][list(panel.attributes)].to_numpy()
    rng = np.random.default_rng(3)
    shape = (2, 150)
    out = {}
    for name, centre, mean, sd in (("true", truth, [1.0, -0.5], [0.8, 0.4]), ("null", 0 * truth, [0, 0], [0.05, 0.05])):
        post = {
            "person_taste": centre + 0.25 * rng.standard_normal(shape + truth.shape),
            "taste_mean": np.asarray(mean) + 0.1 * rng.standard_normal(shape + (2,)),
            "taste_sd": np.abs(np.asarray(sd) + 0.05 * rng.standard_normal(shape + (2,))),
        }
        out[name] = _fake_fit(panel, post)
    return out


def test_task_loo_equals_arviz_loo(two_fits: dict[str, ChoiceFit]) -> None:
    fit = two_fits["true"]
    ours = task_loo(fit)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = az.loo(fit.idata, var_name="chosen", pointwise=True)  # ArviZ 0.23.4, the same log-likelihood
    for key in ("elpd_loo", "se", "p_loo", "n_data_points", "good_k"):
        assert float(ours[key]) == pytest.approx(float(ref[key]), rel=1e-12)
    np.testing.assert_allclose(ours["loo_i"].values, ref["loo_i"].values)
    np.testing.assert_allclose(ours["pareto_k"].values, ref["pareto_k"].values)
    # one term per task, labelled by person and task id
    assert ours["n_data_points"] == fit.panel.n_tasks
    assert "obs_person" in ours["loo_i"].coords and "obs_task" in ours["loo_i"].coords
    # the definition of p_loo: in-sample lppd minus elpd_loo (Vehtari, Gelman & Gabry 2017, Statistics and
    # Computing 27, section 2; from memory)
    ll = fit.idata.log_likelihood["chosen"].stack(s=("chain", "draw")).transpose("obs", "s").values
    lppd = float(np.sum(logsumexp(ll, axis=1) - np.log(ll.shape[1])))
    assert float(ours["p_loo"]) == pytest.approx(lppd - float(ours["elpd_loo"]), rel=1e-9)
    assert float(ours["elpd_loo"]) < lppd


def test_task_loo_builds_the_log_likelihood_when_missing(two_fits: dict[str, ChoiceFit]) -> None:
    fit = two_fits["true"]
    bare = ChoiceFit(idata=az.InferenceData(posterior=fit.idata.posterior), panel=fit.panel, spec=fit.spec,
                     layout=fit.layout)
    assert float(task_loo(bare)["elpd_loo"]) == pytest.approx(float(task_loo(fit)["elpd_loo"]), rel=1e-12)
    no_tastes = ChoiceFit(idata=az.InferenceData(posterior=fit.idata.posterior[["taste_mean"]]), panel=fit.panel,
                          spec=fit.spec, layout=fit.layout)
    with pytest.raises(FitError, match="store_person_draws"):
        task_loo(no_tastes)


def test_person_loo_is_arviz_loo_on_the_marginal_likelihood(two_fits: dict[str, ChoiceFit]) -> None:
    fit = two_fits["true"]
    loo, est = person_loo(fit, n_sim=100, max_draws=100, seed=4, return_estimate=True)
    assert est.sizes == {"chain": 2, "draw": 50, "person": fit.panel.n_persons}  # thinned evenly per chain
    thinned = fit.idata.posterior.isel(draw=slice(None, None, 3))[["taste_mean", "taste_sd"]]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = az.loo(az.InferenceData(posterior=thinned, log_likelihood=est[["log_marginal"]].rename(
            {"log_marginal": PERSON_LOGLIK})), var_name=PERSON_LOGLIK, pointwise=True)  # ArviZ 0.23.4
    # person_loo raises each value by (1 - a_d) sigma_d^2 / 2 (the second-order bias of the LOO average over
    # draws, a_d the normalised weights): the difference is positive and at most the sum of the persons' largest
    # sigma^2 / 2 (elpd_loo is increasing in each value)
    shift = float(loo["elpd_loo"]) - float(ref["elpd_loo"])
    assert 0 < shift <= 0.5 * float((est["mc_se"] ** 2).max(dim=("chain", "draw")).sum()) + 1e-9
    assert loo["elpd_mc_se"] > 0 and est["loo_mc_se"].dims == ("person",)
    assert loo["loo_i"].dims == ("person",) and loo["n_data_points"] == fit.panel.n_persons
    # predicting a new person is harder than predicting a new task of a known person
    assert float(loo["elpd_loo"]) < float(task_loo(fit)["elpd_loo"])


@pytest.mark.parametrize("level", ["task", "person"])
def test_compare_models_ranks_the_true_tastes_first(two_fits: dict[str, ChoiceFit], level: str) -> None:
    table = compare_models(two_fits, level=level, n_sim=100, max_draws=100)
    assert table.index[0] == "true" and table.loc["true", "rank"] == 0
    assert {"elpd_loo", "elpd_diff", "weight", "n_bad_k", "max_k", "good_k"} <= set(table.columns)
    assert table.loc["null", "elpd_diff"] > 0
    if level == "task":
        assert table.loc["true", "elpd_loo"] == pytest.approx(float(task_loo(two_fits["true"])["elpd_loo"]))
    k = task_loo(two_fits["true"])["pareto_k"].values if level == "task" else None
    if k is not None:
        assert table.loc["true", "n_bad_k"] == int((k > table.loc["true", "good_k"]).sum())


def test_compare_models_refuses_different_data(two_fits: dict[str, ChoiceFit]) -> None:
    fit = two_fits["true"]
    keep = np.ones_like(fit.panel.task_mask)
    keep[:, -1] = False
    small = fit.panel.with_tasks(keep, "test")
    other = _fake_fit(small, {"person_taste": fit.posterior["person_taste"].values[:, :, : small.n_persons]})
    with pytest.raises(FitError, match="different data"):
        compare_models({"full": fit, "fewer tasks": other})


def test_pareto_k_checks_name_the_influential_tasks(two_fits: dict[str, ChoiceFit]) -> None:
    loo = task_loo(two_fits["true"]).copy()
    k = loo["pareto_k"].copy()
    k[:] = 0.1
    loo["pareto_k"] = k
    (ok,) = pareto_k_checks(loo, "task")
    assert ok.verdict == "pass" and ok.value == pytest.approx(0.1)
    k = k.copy()
    k[3], k[7] = 0.9, 1.3  # above good_k, and above 1 (Vehtari, Simpson, Gelman, Yao & Gabry 2024)
    loo["pareto_k"] = k
    (bad,) = pareto_k_checks(loo, "task")
    assert bad.verdict == "fail" and bad.value == pytest.approx(1.3)
    label = [f"person {p} task {t}" for p, t in zip(k["obs_person"].values, k["obs_task"].values)]
    assert f"'{label[7]}', '{label[3]}'" in bad.advice  # worst first
    assert bad.detail.startswith("2 of ")
