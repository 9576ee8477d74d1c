"""Power-scaling prior / likelihood sensitivity (hierchoice.diagnostics.sensitivity), issue 19 item 3.

References: Kallioinen, Paananen, Bürkner & Vehtari 2024, Statistics and Computing 34:57 (the diagnostic, eq. 7 for
the cumulative Jensen-Shannon distance, the threshold 0.05); the power-scaled posteriors of a conjugate normal model
in closed form (any Bayesian text: precision-weighted means); scipy for densities and quadrature.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, stats
from test_tastes import fake_fit, small_panel

from hierchoice.diagnostics.sensitivity import (
    DELTA,
    cjs_distance,
    population_log_prior,
    power_scaling_sensitivity,
    sensitivity_checks,
    sensitivity_table,
)
from hierchoice.simulate import SimAttribute

# --------------------------------------------------------------------------- conjugate normal: closed form


def _exact_cjs(base: stats.rv_continuous, other: stats.rv_continuous, lo: float, hi: float) -> float:
    """Cumulative Jensen-Shannon distance of two continuous CDFs over [lo, hi] by quadrature (the paper's eq. 7),
    the larger of the CDF and survival-function versions."""

    def one(P, Q) -> float:  # type: ignore[no-untyped-def]
        def xlog2(a: float, b: float) -> float:
            return 0.0 if a <= 0 else a * np.log2(a / b)

        def pq(x: float) -> float:
            p, q = P(x), Q(x)
            return xlog2(p, 0.5 * (p + q)) + (q - p) / (2 * np.log(2))

        def qp(x: float) -> float:
            p, q = P(x), Q(x)
            return xlog2(q, 0.5 * (p + q)) + (p - q) / (2 * np.log(2))

        ip = integrate.quad(P, lo, hi, limit=200)[0]
        iq = integrate.quad(Q, lo, hi, limit=200)[0]
        num = integrate.quad(pq, lo, hi, limit=200)[0] + integrate.quad(qp, lo, hi, limit=200)[0]
        return float(np.sqrt(max(num, 0.0) / (ip + iq)))

    # survival functions: the CDFs of -x over [-hi, -lo]
    return max(one(base.cdf, other.cdf), one(lambda x: base.sf(x), lambda x: other.sf(x)))


def _conjugate(prior_sd: float, n: int, ybar: float, a_prior: float = 1.0, a_lik: float = 1.0):  # type: ignore[no-untyped-def]
    """Posterior of theta with prior N(0, prior_sd^2)^a_prior and likelihood prod N(y_i; theta, 1)^a_lik."""
    prec = a_prior / prior_sd**2 + a_lik * n
    return stats.norm(a_lik * n * ybar / prec, 1 / np.sqrt(prec))


CASE = {"prior_sd": 1.0, "n": 3, "ybar": 1.5}  # an informative prior next to three observations


def _exact_sensitivity(component: str, lo: float, hi: float) -> float:
    base = _conjugate(**CASE)
    dist = 0.0
    for alpha in (1 / (1 + DELTA), 1 + DELTA):
        kw = {"a_prior": alpha} if component == "prior" else {"a_lik": alpha}
        dist += _exact_cjs(base, _conjugate(**CASE, **kw), lo, hi)
    return dist / (2 * np.log2(1 + DELTA))


@pytest.mark.parametrize("component", ["prior", "likelihood"])
def test_sensitivity_matches_the_closed_form_of_a_conjugate_normal(component: str) -> None:
    """The package's estimate from 8,000 posterior draws against the exact power-scaled posteriors.

    Power-scaling a normal prior (or likelihood) by alpha gives another normal posterior (precision
    alpha / s0^2 + n, or 1 / s0^2 + alpha n); the exact CJS distances of those CDFs to the base posterior,
    integrated over the draws' range, make the reference. Measured over 100 seeds of the draws (this test's
    setting, measured 2026-12-04), the estimate's relative error had mean -0.1 % / -0.2 %, SD 1.8 % (prior) and
    2.6 % (likelihood), largest 5.2 % / 7.4 %; the 10 % band is 3.8 or more SDs (false-alarm rate below 0.02 % under
    normality; the seed is fixed, so the test is deterministic). Negative controls, measured: the distance without
    its survival-function version (CDF only) gives 0.073 against the exact 0.101 (-28 %), and a diagnostic divided
    by ln(1 + delta) instead of log2(1 + delta) is 44 % high; both fail.
    """
    rng = np.random.default_rng(11)
    base = _conjugate(**CASE)
    theta = base.rvs(size=8000, random_state=rng)
    if component == "prior":
        log_component = stats.norm(0, CASE["prior_sd"]).logpdf(theta)
    else:  # the likelihood of the data given theta: n N(ybar; theta, 1/n) up to a constant
        log_component = -0.5 * CASE["n"] * (theta - CASE["ybar"]) ** 2
    est, k = power_scaling_sensitivity(theta, log_component)
    exact = _exact_sensitivity(component, float(theta.min()), float(theta.max()))
    assert k < 0.5  # smooth weights: PSIS has nothing to repair
    assert exact > 0.05  # a case the threshold calls sensitive
    assert est[0] == pytest.approx(exact, rel=0.10)


def test_cjs_distance_of_equal_weights_is_zero_and_grows_with_a_shift() -> None:
    """Equal weights give the base ECDF itself (distance 0); tilting the weights towards larger values moves the
    distance up monotonically with the tilt (the distance is a metric of the two ECDFs, Nguyen & Vreeken 2015)."""
    x = np.random.default_rng(3).standard_normal(4000)
    assert cjs_distance(x, np.ones_like(x)) == pytest.approx(0.0, abs=1e-7)  # sqrt of rounding
    d = [cjs_distance(x, np.exp(t * x)) for t in (0.05, 0.1, 0.2)]
    assert 0 < d[0] < d[1] < d[2]


# --------------------------------------------------------------------------- the log prior of a fit's draws


def test_population_log_prior_is_the_documented_density_in_the_users_units() -> None:
    """Differences of the log prior between draws equal scipy's densities of the documented priors.

    docs/model.md (written here, not read from the code): a normal taste's mean Normal(0, 2.5) and SD
    HalfNormal(1) on the standardised scale, i.e. Normal(0, 2.5 / s) and HalfNormal(1 / s) in the user's units
    (s: the attribute's SD over available alternatives); a lognormal taste's mean of the log Normal(log(1/s),
    1) and SD of the log HalfNormal(0.5); the correlation matrix LKJ(2), density proportional to det(Omega)^(eta-1)
    (Lewandowski, Kurowicka & Joe 2009). Compared up to one constant (the weights are normalised). Negative
    controls, run: draws not mapped back to the internal scale (unit factor 1), or the LKJ term left out, fail.
    """
    panel = small_panel(model={"correlated": True})
    fit = fake_fit(panel, {"price": 0.1, "time": -0.05}, {"price": 0.3, "time": 0.02},
                   corr=np.array([[1.0, 0.3], [0.3, 1.0]]), spread=0.05, seed=2)
    rng = np.random.default_rng(4)
    post = fit.idata.posterior
    post["taste_sd"].values[...] = post["taste_sd"].values * np.exp(0.2 * rng.standard_normal(post["taste_sd"].shape))
    r = rng.uniform(-0.6, 0.6, size=post["taste_corr"].shape[:2])
    post["taste_corr"].values[..., 0, 1] = r
    post["taste_corr"].values[..., 1, 0] = r
    got = population_log_prior(fit)

    names = [t.name for t in panel.terms]
    real = panel.available & panel.task_mask[:, :, None]  # the attribute's SD over available alternatives
    s = {name: float(np.std(panel.X[..., names.index(name)][real])) for name in ("price", "time")}
    tm = post["taste_mean"].stack(sample=("chain", "draw"))
    ts = post["taste_sd"].stack(sample=("chain", "draw"))
    tc = post["taste_corr"].stack(sample=("chain", "draw"))
    want = (stats.norm(np.log(1 / s["price"]), 1.0).logpdf(tm.sel(attribute="price").values)
            + stats.norm(0, 2.5 / s["time"]).logpdf(tm.sel(attribute="time").values)
            + stats.halfnorm(scale=0.5).logpdf(ts.sel(random_attribute="price").values)
            + stats.halfnorm(scale=1.0 / s["time"]).logpdf(ts.sel(random_attribute="time").values)
            + (2.0 - 1.0) * np.log(1 - tc.values[0, 1] ** 2))
    diff = got - want
    assert np.ptp(diff) < 1e-8


# --------------------------------------------------------------------------- records


def test_checks_grade_the_papers_diagnosis() -> None:
    """Prior sensitivity >= 0.05 warns (prior-dominated when the likelihood's < 0.05, conflict otherwise)."""
    import pandas as pd

    table = pd.DataFrame({"prior": [0.01, 0.2, 0.2], "likelihood": [0.3, 0.01, 0.3],
                          "diagnosis": ["", "prior-dominated", "prior-data conflict"],
                          "pareto_k_prior": 0.1, "pareto_k_likelihood": 0.1},
                         index=pd.Index(["taste_mean[a]", "taste_sd[a]", "taste_sd[b]"], name="parameter"))
    table.attrs.update(threshold=0.05, delta=DELTA, k_threshold=0.7)
    recs = sensitivity_checks(table)
    assert [r.verdict for r in recs] == ["pass", "warn", "warn"]
    assert "widen the prior" in recs[1].advice.lower() and "more persons" in recs[1].advice
    assert "conflict" in recs[2].advice


def test_sensitivity_table_of_a_fit_names_every_population_parameter() -> None:
    """A fake fit with person draws: one row per population parameter with finite prior and likelihood values."""
    panel = small_panel([SimAttribute("price", levels=[1.0, 2.0, 3.0], taste="normal", mean=-1.0, sd=0.5)],
                        n_persons=20)
    fit = fake_fit(panel, {"price": -1.0}, {"price": 0.5}, spread=0.1, draws=200)
    fit.idata.posterior["taste_sd"].values[...] *= np.exp(0.1 * np.random.default_rng(0).standard_normal(
        fit.idata.posterior["taste_sd"].shape))
    table = sensitivity_table(fit)
    assert list(table.index) == ["taste_mean[price]", "taste_sd[price]"]
    assert np.isfinite(table[["prior", "likelihood"]].to_numpy()).all()


def test_a_fit_without_person_draws_has_no_likelihood_sensitivity_and_says_so() -> None:
    """No person draws, no likelihood: likelihood sensitivity NaN, and a sensitive parameter is "prior-sensitive"
    (never called prior-dominated on a likelihood that was not measured). A posterior as wide as the prior
    (spread 2.5 around 0 for a Normal(0, 2.5) mean on a 0/1 column) is prior-sensitive by construction."""
    panel = small_panel([SimAttribute("x", levels=[0.0, 1.0], taste="fixed", mean=0.0)], n_persons=20)
    scale = float(np.std(panel.X[..., 0][panel.available & panel.task_mask[:, :, None]]))
    fit = fake_fit(panel, {"x": 0.0}, spread=2.5 / scale, draws=500, person_draws=False)
    table = sensitivity_table(fit)
    assert table["likelihood"].isna().all()
    assert table.loc["taste_mean[x]", "prior"] >= 0.05
    assert table.loc["taste_mean[x]", "diagnosis"] == "prior-sensitive"
    assert "likelihood's share is unknown" in sensitivity_checks(table)[0].advice
