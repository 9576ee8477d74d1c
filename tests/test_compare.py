"""PSIS-LOO at task and person level, the simulated person marginal likelihood, and model comparison.

No model is sampled here: the fits are built from invented posteriors around known tastes, or drawn iid from
an exact posterior computed on a grid, so the tests check the arithmetic (against Gauss–Hermite quadrature and
against exact leave-one-out on the grid, never against the ArviZ call the code makes), not the sampler.
Gauss–Hermite reference values come from ``numpy.polynomial.hermite_e.hermegauss`` (probabilists'
Hermite nodes, weight exp(-x^2/2), so E[f(Z)] = sum_i w_i f(x_i) / sqrt(2 pi) for Z ~ N(0, 1); NumPy
2.4 documentation).
"""

from __future__ import annotations

from typing import Any

import arviz as az
import numpy as np
import pytest
from numpy.polynomial.hermite_e import hermegauss
from scipy import stats
from scipy.special import logsumexp

from hierchoice import ChoicePanel, FitError, SimAttribute, simulate_panel
from hierchoice.diagnostics.loo import (
    compare_models,
    pareto_k_checks,
    person_log_marginal,
    person_loo,
    task_loo,
)
from hierchoice.inference.results import ChoiceFit
from hierchoice.inference.sampling import add_log_likelihood
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


def _task_loglik(panel: ChoicePanel, beta: np.ndarray) -> np.ndarray:
    """Independent per-task log-likelihood (McFadden 1974), ``beta`` (..., P, K) -> (..., P, T); 0 on padding."""
    u = np.einsum("ptjk,...pk->...ptj", panel.X, beta)
    avail = panel.available | ~panel.task_mask[:, :, None]
    u = np.where(avail, u, -np.inf)
    c = np.clip(panel.chosen, 0, None)
    u_c = np.take_along_axis(u, np.broadcast_to(c[..., None], u.shape[:-1] + (1,)), axis=-1)[..., 0]
    return np.where(panel.task_mask, u_c - logsumexp(u, axis=-1), 0.0)


@pytest.fixture(scope="module")
def exact_task_loo() -> dict[str, Any]:
    """One fixed taste on a tiny panel: its posterior on a fine grid, exact leave-one-task-out, and iid draws.

    With one coefficient the posterior under a N(0, 2^2) prior (chosen here) is computed on a grid of 4,001
    points, and so is each leave-one-out predictive density exactly: p(y_i | y_-i) = 1 / E_post[1 / p(y_i | b)]
    (Gelfand, Dey & Chang 1992, Bayesian Statistics 4), i.e. the posterior without task i, refitted on the grid.
    The fake fit's draws are iid from that grid posterior, so PSIS-LOO on them estimates exactly that.
    """
    panel = _panel([SimAttribute("x", levels=np.linspace(-1.5, 1.5, 7).tolist(), taste="fixed", mean=0.8)],
                   seed=31, n_persons=15, n_tasks=4)
    grid = np.linspace(-3.0, 5.0, 4001)
    ll = _task_loglik(panel, np.broadcast_to(grid[:, None, None], (grid.size, panel.n_persons, 1)))  # (G, P, T)
    ll = ll.reshape(grid.size, -1)[:, panel.task_mask.ravel()]  # (G, task) in the panel's task order
    log_post = stats.norm.logpdf(grid, 0.0, 2.0) + ll.sum(axis=1)
    post = np.exp(log_post - logsumexp(log_post))
    exact = -logsumexp(-ll, axis=0, b=post[:, None])  # (task,) log p(y_i | y_-i)
    lppd_exact = logsumexp(ll, axis=0, b=post[:, None])  # in-sample log p(y_i | y)
    rng = np.random.default_rng(0)
    shape = (2, 2000)
    index = rng.choice(grid.size, size=shape[0] * shape[1], p=post).reshape(shape)
    beta = grid[index]
    fit = _fake_fit(panel, {"taste_mean": beta[..., None],
                            "person_taste": np.broadcast_to(beta[..., None, None],
                                                            shape + (panel.n_persons, 1)).copy()})
    # the sampling distribution of a leave-one-out estimate from S = 4,000 iid posterior draws: 400 replicate
    # draw sets, each scored by plain importance sampling, -log mean_s 1 / p(y_i | b_s) (Gelfand, Dey & Chang
    # 1992). The estimate is skewed (1 / p has a long right tail), so its quantiles are taken, not +-z SE.
    r_grid = np.exp(-ll)  # (G, task)
    replicates = np.stack([-np.log(r_grid[rng.choice(grid.size, size=shape[0] * shape[1], p=post)].mean(axis=0))
                           for _ in range(400)])  # (replicate, task)
    return {"fit": fit, "exact": exact, "lppd": lppd_exact, "replicates": replicates}


def test_task_loo_equals_exact_leave_one_out(exact_task_loo: dict[str, Any]) -> None:
    ours = task_loo(exact_task_loo["fit"])
    exact, reps = exact_task_loo["exact"], exact_task_loo["replicates"]
    n = exact.size
    assert int(ours["n_data_points"]) == n
    # the replicates centre on the exact values (a check of the reference): their mean total within 3 SEs of
    # the mean of 400 replicates (false-alarm rate 0.3 %, normal) plus the O(1/S) bias of the log of a mean
    totals = reps.sum(axis=1)
    assert abs(totals.mean() - exact.sum()) < 3 * totals.std(ddof=1) / np.sqrt(len(totals)) + 0.05
    # the package's total within the 0.5 % and 99.5 % quantiles of the replicate totals: false-alarm rate 1 %
    # (two-sided), as an estimate from these draws of the exact leave-one-out total
    lo, hi = np.quantile(totals, [0.005, 0.995])
    assert lo <= float(ours["elpd_loo"]) <= hi, (float(ours["elpd_loo"]), lo, hi, exact.sum())
    assert abs(float(ours["elpd_loo"]) - exact.sum()) < float(ours["se"])  # and well within its reported SE
    # every task within the range of its 400 replicates, widened by 1e-3 for the Pareto smoothing (which
    # replaces the largest weights; 1e-3 is common practice, 1/10 of the reported SE of a task here)
    pointwise = ours["loo_i"].values
    assert np.all((pointwise >= reps.min(axis=0) - 1e-3) & (pointwise <= reps.max(axis=0) + 1e-3))
    # p_loo against its exact value: in-sample lppd minus elpd_loo (Vehtari, Gelman & Gabry 2017, Statistics and
    # Computing 27, section 2); one free coefficient gives about 1
    p_exact = float(exact_task_loo["lppd"].sum() - exact.sum())
    assert 0.5 < p_exact < 1.5
    assert float(ours["p_loo"]) == pytest.approx(p_exact, abs=hi - lo)
    # negative control: the in-sample lppd (a LOO that forgot to leave out) lies outside the replicates' range
    assert not lo <= float(exact_task_loo["lppd"].sum()) <= hi
    # one term per task, labelled by person and task id
    assert "obs_person" in ours["loo_i"].coords and "obs_task" in ours["loo_i"].coords


def test_task_loo_builds_the_log_likelihood_when_missing(two_fits: dict[str, ChoiceFit]) -> None:
    fit = two_fits["true"]
    bare = ChoiceFit(idata=az.InferenceData(posterior=fit.idata.posterior), panel=fit.panel, spec=fit.spec,
                     layout=fit.layout)
    assert float(task_loo(bare)["elpd_loo"]) == pytest.approx(float(task_loo(fit)["elpd_loo"]), rel=1e-12)
    no_tastes = ChoiceFit(idata=az.InferenceData(posterior=fit.idata.posterior[["taste_mean"]]), panel=fit.panel,
                          spec=fit.spec, layout=fit.layout)
    with pytest.raises(FitError, match="store_person_draws"):
        task_loo(no_tastes)


@pytest.fixture(scope="module")
def exact_person_loo() -> dict[str, Any]:
    """One random normal taste on a tiny panel: the posterior of (mean, SD) on a grid, exact leave-one-person-out.

    Each person's marginal likelihood L_p(mu, sigma) = E[prod_t p(y_pt | mu + sigma Z)] by 40-node Gauss-Hermite
    quadrature (numpy's hermegauss, see the module docstring); priors mu ~ N(0, 2^2), sigma ~ half-N(0, 2^2)
    (chosen here) on a 61 x 60 grid; then p(y_p | y_-p) = 1 / E_post[1 / L_p] (Gelfand, Dey & Chang 1992), the
    posterior without person p, refitted on the grid. The fake fit's draws are iid from the grid posterior.
    """
    panel = _panel([SimAttribute("x", levels=np.linspace(-1.5, 1.5, 7).tolist(), mean=0.8, sd=0.7)],
                   seed=41, n_persons=20, n_tasks=5)
    mus, sds = np.linspace(-0.6, 2.4, 61), np.linspace(0.02, 2.4, 60)
    mu_g, sd_g = (a.ravel() for a in np.meshgrid(mus, sds, indexing="ij"))
    x, w = hermegauss(40)
    log_w = np.log(w / np.sqrt(2 * np.pi))
    log_l = np.empty((mu_g.size, panel.n_persons))  # (grid, person)
    for p in range(panel.n_persons):
        one = panel.X[p:p + 1]  # the person's tasks, through a one-person view of the panel's arrays
        beta = mu_g[:, None] + sd_g[:, None] * x[None, :]  # (grid, node)
        u = one[0, :, :, 0][None, None] * beta[..., None, None]  # (grid, node, task, alternative)
        u = np.where(panel.available[p][None, None], u, -np.inf)
        c = np.clip(panel.chosen[p], 0, None)
        u_c = np.take_along_axis(u, np.broadcast_to(c[None, None, :, None], u.shape[:-1] + (1,)), axis=-1)[..., 0]
        ll = np.where(panel.task_mask[p][None, None], u_c - logsumexp(u, axis=-1), 0.0).sum(axis=-1)
        log_l[:, p] = logsumexp(ll + log_w[None, :], axis=1)
    log_prior = stats.norm.logpdf(mu_g, 0, 2) + stats.halfnorm.logpdf(sd_g, scale=2)
    log_post = log_prior + log_l.sum(axis=1)
    post = np.exp(log_post - logsumexp(log_post))
    exact = -logsumexp(-log_l, axis=0, b=post[:, None])  # (person,)
    rng = np.random.default_rng(0)
    shape = (2, 200)
    index = rng.choice(mu_g.size, size=shape, p=post)
    fit = _fake_fit(panel, {"taste_mean": mu_g[index][..., None], "taste_sd": sd_g[index][..., None]})
    # the sampling distribution of the estimate from 400 iid draws: 2,000 replicate draw sets scored by plain
    # importance sampling, -sum_p log mean_s 1 / L_p(theta_s)
    inv_l = np.exp(-log_l)
    totals = np.array([-np.log(inv_l[rng.choice(mu_g.size, size=400, p=post)].mean(axis=0)).sum()
                       for _ in range(2000)])
    return {"fit": fit, "exact": exact, "totals": totals}


def test_person_loo_equals_exact_leave_one_person_out(exact_person_loo: dict[str, Any]) -> None:
    fit, exact, totals = exact_person_loo["fit"], exact_person_loo["exact"], exact_person_loo["totals"]
    loo, est = person_loo(fit, n_sim=200, max_draws=400, seed=4, return_estimate=True)
    assert est.sizes == {"chain": 2, "draw": 200, "person": fit.panel.n_persons}
    assert loo["loo_i"].dims == ("person",) and loo["n_data_points"] == fit.panel.n_persons
    # the reference centres on the exact value: the mean of the 2,000 replicates within 3 SEs (0.3 %, normal)
    # plus 0.05 for the O(1/S) bias of the log of a mean
    assert abs(totals.mean() - exact.sum()) < 3 * totals.std(ddof=1) / np.sqrt(len(totals)) + 0.05
    # the package's elpd within the 0.25 % and 99.75 % quantiles of the replicates (draw-set error, 0.5 %) widened
    # by 3 of its own Monte Carlo SEs for the simulated marginals (0.27 %, normal): false-alarm rate <= 0.8 %
    lo, hi = np.quantile(totals, [0.0025, 0.9975])
    mc = 3 * float(loo["elpd_mc_se"])
    assert lo - mc <= float(loo["elpd_loo"]) <= hi + mc, (float(loo["elpd_loo"]), lo, hi, mc, exact.sum())
    assert loo["elpd_mc_se"] > 0 and est["loo_mc_se"].dims == ("person",)
    # negative control: the in-sample sum of log E_post[L_p] (a LOO that forgot to leave out) is outside that range
    log_marg = est["log_marginal"].stack(s=("chain", "draw")).transpose("person", "s").values
    in_sample = float((logsumexp(log_marg, axis=1) - np.log(log_marg.shape[1])).sum())
    assert not lo - mc <= in_sample <= hi + mc, (in_sample, lo, hi)


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
