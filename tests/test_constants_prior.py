"""The constants' prior under constant centring, and the lognormal taste's mean and median in the population summary.

Issue 17, item 3. The model samples each alternative-specific constant centred at the alternative's mean attribute
levels; the documented prior (docs/model.md: Normal(0, 2.5) on the internal scale, where a constant's scale is its
reported scale) must hold for the *reported* constant, and the blocked sampler must target the same density.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pymc as pm
import pytest
from scipy import stats
from test_tastes import fake_fit, small_panel

import hierchoice as hc
import hierchoice.inference.blocked as bl
from hierchoice.analysis.tastes import simulate_population_tastes
from hierchoice.inference.blocked.problem import PopulationState
from hierchoice.inference.blocked.shard import LocalShards
from hierchoice.inference.blocked.updates import _location_conjugate
from hierchoice.inference.results import population_summary
from hierchoice.spec import load_spec

#: The documented prior SD of a fixed / normal taste's mean and of a constant (docs/model.md, "Internal scaling
#: and priors"); the value the docs state, written here rather than read from the code under test.
DOCUMENTED_SD = 2.5


@pytest.fixture(scope="module")
def ferry_panel() -> hc.ChoicePanel:
    """The demo's design (opt-out, lognormal fare, normal and fixed tastes, two constants), 100 persons."""
    sim = hc.ferry_scenario(100, n_tasks=6, seed=4)
    return hc.ChoicePanel.from_frame(sim.data, sim.spec)


def _with_prior_scale(panel: hc.ChoicePanel, scale: float):  # type: ignore[no-untyped-def]
    spec = load_spec(panel.spec)
    return replace(spec, model=replace(spec.model, prior_scale=scale))


@pytest.mark.filterwarnings("ignore:The effect of Potentials:UserWarning")  # the likelihood: prior draws omit it
@pytest.mark.parametrize("prior_scale", [1.0, 0.4])
def test_prior_predictive_constants_have_the_documented_sd(ferry_panel, prior_scale) -> None:  # type: ignore[no-untyped-def]
    """Prior draws of the reported constants: SD 2.5 x prior_scale (within 5 %) and independent of the slopes.

    With n = 20,000 draws the sample SD of a normal has relative standard error 1/sqrt(2n) = 0.5 % (normal sampling
    theory), so the 5 % band is 10 standard errors wide; a correlation's standard error is 1/sqrt(n) = 0.007 and the
    bound 0.05 is 7 of them (false-alarm rate far below 0.1 %). On the old model, which put the Normal(0, 2.5) on the
    centred free parameter, the constants' SD here was 7.47 and they were strongly correlated with the slopes.
    """
    spec = _with_prior_scale(ferry_panel, prior_scale)
    layout = hc.model_layout(ferry_panel, spec)
    assert layout.constant_centre is not None  # the design exercises the centring
    model = hc.build_model(ferry_panel, spec)
    n = 20_000
    prior = pm.sample_prior_predictive(draws=n, model=model, var_names=["taste_mean"], random_seed=5).prior
    tm = prior["taste_mean"].stack(sample=("chain", "draw"))
    constants = [name for name, t in zip(layout.names, layout.terms) if t.kind == "constant"]
    assert len(constants) == 2
    for name in constants:
        a = tm.sel(attribute=name).values
        assert np.std(a, ddof=1) == pytest.approx(DOCUMENTED_SD * prior_scale, rel=0.05), name
        assert abs(np.mean(a)) < 5 * DOCUMENTED_SD * prior_scale / np.sqrt(n)
        for other in ("fare", "crossing_time", "departures_per_hour"):
            r = np.corrcoef(a, tm.sel(attribute=other).values)[0, 1]
            assert abs(r) < 0.05, (name, other, r)
    # the slopes' priors are untouched: crossing_time's mean is Normal(0, 2.5 ps) on the standardised scale,
    # i.e. SD 2.5 ps / s_k in the user's units (s_k: the attribute's SD over available alternatives)
    k = layout.names.index("crossing_time")
    slope = tm.sel(attribute="crossing_time").values
    assert np.std(slope, ddof=1) * layout.scale[k] == pytest.approx(DOCUMENTED_SD * prior_scale, rel=0.05)


def test_model_log_prior_of_the_free_means_is_normal_on_the_reported_means(ferry_panel) -> None:  # type: ignore[no-untyped-def]
    """The density NUTS sees on mu_std is the product of N(mu_k; 0, sd_k) at the reported means (scipy reference).

    The reported means are read from the model's own ``taste_mean`` (back on the internal scale); the map from
    the free means to them must have Jacobian determinant 1 (checked by central differences), so that no
    correction term belongs in the density.
    """
    model = hc.build_model(ferry_panel)
    layout = hc.model_layout(ferry_panel)
    n_k = len(layout.names)
    rv = model["mu_std"]
    logp = model.compile_fn(model.logp(vars=[rv], sum=True), inputs=[model.rvs_to_values[rv]],
                            on_unused_input="ignore")
    [tm_graph] = model.replace_rvs_by_values([model["taste_mean"]])
    taste_mean = model.compile_fn(tm_graph, inputs=[model.rvs_to_values[rv]], on_unused_input="ignore")
    lognormal = np.array([layout.is_lognormal(k) for k in range(n_k)])
    # back to the internal scale: taste_mean = mu + log_shift (lognormal) or mu * unit_factor (model/build.py docs)
    unit = np.array([layout.unit_factor(k) for k in range(n_k)])
    shift = np.array([layout.log_shift(k) for k in range(n_k)])

    def internal(x: np.ndarray) -> np.ndarray:
        tm = np.asarray(taste_mean({"mu_std": x}))
        return np.where(lognormal, tm - shift, tm / unit)

    sd = np.where(lognormal, 1.0, DOCUMENTED_SD)  # docs/model.md: Normal(0, 1) on a lognormal log-mean
    rng = np.random.default_rng(2)
    for _ in range(5):
        x = rng.normal(0.0, 0.7, n_k)
        mu = internal(x)
        assert float(logp({"mu_std": x})) == pytest.approx(stats.norm(0.0, sd).logpdf(mu).sum(), rel=1e-10)
        eps = 1e-6
        jac = np.column_stack([(internal(x + eps * e) - internal(x - eps * e)) / (2 * eps) for e in np.eye(n_k)])
        assert np.linalg.det(jac) == pytest.approx(1.0, abs=1e-6)
        assert not np.allclose(mu, x)  # the centring does move the constants at this point


@pytest.fixture(scope="module")
def random_constants():  # type: ignore[no-untyped-def]
    """Normal tastes and normal constants next to an opt-out: the blocked sampler's conjugate location update."""
    attrs = [hc.SimAttribute("x1", levels=[1.0, 2.0, 3.0], taste="normal", mean=0.8, sd=0.5),
             hc.SimAttribute("x2", levels=[2.0, 4.0, 6.0], taste="normal", mean=-0.5, sd=0.4)]
    sim = hc.simulate_panel(attrs, n_persons=30, n_tasks=5, alternatives=("a", "b"), opt_out="none",
                            constants={"a": 1.0, "b": 0.5}, seed=3)
    sim.spec["constants"]["taste"] = "normal"
    panel = hc.ChoicePanel.from_frame(sim.data, sim.spec)
    spec = load_spec(sim.spec)
    # a tight prior (prior_scale 0.3) so that the prior weighs as much as the 30 persons in the conditional
    return panel, replace(spec, model=replace(spec.model, parameterization="centred", prior_scale=0.3))


def test_blocked_conjugate_location_draws_match_the_conditional_of_its_density(random_constants) -> None:  # type: ignore[no-untyped-def]
    r"""With constants centred, the exact location draw follows the conditional of the blocked log density.

    Every taste is random, so :func:`log_density` is quadratic in ``mu_std`` given eta and Sigma; its
    precision and mean come from central differences of that density (which tests/test_blocked.py checks
    equal to PyMC's ``compile_logp``, and which this file's model test ties to the documented prior). The
    sample mean is tested at |z| < 3.29 per coordinate and the variance ratio within 3.29 sqrt(2/(n-1))
    (two-sided 0.1 % each under normal sampling theory; 4 coordinates x 2 checks: false-alarm rate <= 0.8 %).
    Negative control (run by hand): the update with the prior's precision on ``mu_std`` instead of on
    :math:`\mu = A\tilde\mu` fails it.
    """
    panel, spec = random_constants
    prob = bl.blocked_problem(panel, spec)
    assert prob.conjugate and prob.centre is not None
    rng = np.random.default_rng(11)
    K = prob.n_attributes
    L = np.diag(rng.uniform(1.5, 2.5, prob.n_random))  # wide tastes: the persons pin the means down loosely
    state = bl.BlockedState(mu_free=rng.normal(0, 0.5, K), gamma=np.zeros((0, 0)), L=L,
                            eta=rng.normal(0, 0.7, (prob.n_persons, prob.n_random)), h=np.ones(prob.n_persons))

    def f(x: np.ndarray) -> float:
        return bl.log_density(prob, replace(state, mu_free=x))

    x0, h = np.zeros(K), 1e-3
    eye = np.eye(K)
    grad = np.array([(f(x0 + h * e) - f(x0 - h * e)) / (2 * h) for e in eye])
    hess = np.array([[(f(x0 + h * (a + b)) - f(x0 + h * (a - b)) - f(x0 - h * (a - b)) + f(x0 - h * (a + b)))
                      / (4 * h * h) for b in eye] for a in eye])
    cov = np.linalg.inv(-hess)
    mean = x0 + cov @ grad
    n = 4000
    draws = np.empty((n, K))
    shards = LocalShards(prob, (1, 2))
    shards.shards[0].state = state
    pop = PopulationState(mu_free=state.mu_free.copy(), gamma=state.gamma, L=state.L)
    for i in range(n):
        _location_conjugate(prob, pop, shards, rng)
        draws[i] = pop.mu_free
    sd = np.sqrt(np.diag(cov))
    z = (draws.mean(0) - mean) / (sd / np.sqrt(n))
    assert np.all(np.abs(z) < 3.29), z
    ratio = draws.var(0, ddof=1) / sd**2
    assert np.all(np.abs(ratio - 1) < 3.29 * np.sqrt(2 / (n - 1))), ratio


# ----------------------------------------------------------------------------- lognormal mean and median


def test_population_summary_gives_a_lognormal_tastes_mean_and_median_labelled() -> None:
    """``ChoiceFit.population()``: the mean across people is s exp(mu + sigma^2/2), the median s exp(mu).

    References: the lognormal's moments as scipy.stats.lognorm(s=sigma, scale=exp(mu)) computes them (scipy 1.x),
    at one posterior draw (exact); and over a spread posterior, the average coefficient of simulated people
    (``simulate_population_tastes``, 4,000 per draw) against the reported mean, |z| < 4 (false-alarm rate 6e-5
    under the normal approximation).
    """
    panel = small_panel()
    mu_p, sd_p = np.log(0.8), 0.6
    one = fake_fit(panel, {"price": mu_p, "time": -0.05}, {"price": sd_p, "time": 0.03}, chains=1, draws=1)
    table = population_summary(one).set_index(["quantity", "attribute"])
    ln = stats.lognorm(s=sd_p, scale=np.exp(mu_p))
    assert table.loc[("mean_across_people", "price"), "mean"] == pytest.approx(-ln.mean(), rel=1e-12)
    assert table.loc[("median_across_people", "price"), "mean"] == pytest.approx(-ln.median(), rel=1e-12)
    assert table.loc[("sd_across_people", "price"), "mean"] == pytest.approx(ln.std(), rel=1e-12)
    # population_mean of a lognormal taste is the mean of the log-taste, and its scale says so
    assert table.loc[("population_mean", "price"), "mean"] == pytest.approx(mu_p)
    assert table.loc[("population_mean", "price"), "scale"] == "log(-coefficient)"
    assert table.loc[("population_mean", "time"), "scale"] == "coefficient"
    # a normal taste's mean across people is its population mean itself
    assert table.loc[("mean_across_people", "time"), "mean"] == pytest.approx(table.loc[("population_mean", "time"),
                                                                                        "mean"])

    spread = fake_fit(panel, {"price": mu_p, "time": -0.05}, {"price": sd_p, "time": 0.03}, chains=2, draws=50,
                      spread=0.1, seed=4)
    reported = population_summary(spread).set_index(["quantity", "attribute"]).loc[("mean_across_people", "price"),
                                                                                  "mean"]
    people = simulate_population_tastes(spread, n_persons=4000, seed=9, max_draws=None)
    price = people.sel(attribute="price").values.reshape(100, 4000)  # (posterior draw, person)
    simulated = price.mean()
    se = np.sqrt(price.var(axis=1, ddof=1).mean() / price.shape[1] / price.shape[0])
    assert abs(simulated - reported) < 4 * se, (simulated, reported, se)
