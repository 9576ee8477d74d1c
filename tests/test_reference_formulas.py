"""Shares, WTP and the implied taste distributions against closed forms, scipy.stats and quadrature.

Every posterior here is built by hand (``fake_fit`` of ``test_tastes``: population parameters chosen per draw, no
sampling), so the reference can be evaluated draw by draw from the same parameters, independently of the package:

* the implied mean, median and SD of each taste that ``population_tastes.csv`` (``population_summary``) and
  ``population_tastes`` write, against ``scipy.stats.lognorm`` / ``scipy.stats.norm`` (scipy 1.x);
* WTP across people: a normal attribute over a fixed price (a normal ratio), a normal attribute over a lognormal
  price (the closed-form mean :math:`E[x e^{-z}] = (E x - \\mathrm{cov}(x, z))\\,e^{-E z + \\mathrm{var}\\,z / 2}`),
  and a lognormal attribute over a lognormal price (a lognormal ratio: median and mean in closed form);
* market shares under random tastes against Gauss-Hermite quadrature of the logit probability over the taste
  distribution (McFadden 1974 for the logit; the mixed logit share as that integral: Train 2009, *Discrete Choice
  Methods with Simulation*, 2nd ed., ch. 6).

Figures simulated by the package (medians across simulated people, shares over simulated people) carry Monte Carlo
error; each such tolerance is set from that error's sampling distribution, with its false-alarm rate beside it.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pytest
from numpy.polynomial.hermite_e import hermegauss
from scipy import stats
from test_tastes import fake_fit, small_panel

import hierchoice as hc
from hierchoice import SimAttribute
from hierchoice.analysis.shares import predict_shares
from hierchoice.analysis.tastes import population_taste_draws
from hierchoice.analysis.wtp import population_wtp_draws

# --------------------------------------------------------------------------- implied distributions of the tastes

#: price: lognormal, negative; quality: lognormal, positive; time: normal; wifi: fixed.
MEANS = {"price": np.log(0.8), "quality": -0.5, "time": -0.05, "wifi": 0.3}
SDS = {"price": 0.4, "quality": 0.7, "time": 0.03}


def _four_taste_fit(**kwargs: Any) -> hc.ChoiceFit:
    attrs = [
        SimAttribute("price", levels=[1.0, 2.0, 3.0, 4.0], taste="lognormal", mean=0.0, sd=0.3, sign="negative"),
        SimAttribute("quality", levels=[0.0, 1.0, 2.0], taste="lognormal", mean=-0.5, sd=0.5, sign="positive"),
        SimAttribute("time", levels=[10.0, 20.0, 30.0], taste="normal", mean=-0.05, sd=0.02),
        SimAttribute("wifi", levels=[0.0, 1.0], taste="fixed", mean=0.3),
    ]
    return fake_fit(small_panel(attrs, model={"price": "price"}), MEANS, SDS, **kwargs)



_PARAM = {"population_mean": "taste_mean", "population_sd": "taste_sd"}


def _by_row(table: pd.DataFrame) -> pd.DataFrame:
    """The population table indexed ``quantity[attribute]``, the parameters under their posterior names
    (``taste_mean``, ``taste_sd``)."""
    return table.set_axis([f"{_PARAM.get(q, q)}[{a}]" for q, a in zip(table["quantity"], table["attribute"])])

def _scipy_taste(name: str, mu: np.ndarray, sd: float) -> Any:
    """The distribution across people of one taste, as a frozen scipy.stats distribution (one per draw)."""
    if name in ("price", "quality"):
        # beta = s exp(eta), eta ~ N(mu, sd): scipy.stats.lognorm(s=sd, scale=exp(mu)), negated for s = -1
        return stats.lognorm(s=sd, scale=np.exp(mu))
    return stats.norm(mu, sd)


def test_population_summary_moments_equal_scipy_per_draw() -> None:
    """The rows population_tastes.csv gets from population_summary: each posterior draw's moment from scipy.stats."""
    fit = _four_taste_fit(chains=2, draws=60, spread=0.1, seed=3)
    table = _by_row(hc.population_summary(fit, prob=0.8))
    mu = fit.posterior["taste_mean"]
    for name, sign in (("price", -1.0), ("quality", 1.0)):
        dist = _scipy_taste(name, mu.sel(attribute=name).values.ravel(), SDS[name])
        for row, values in (("mean_across_people", sign * dist.mean()), ("median_across_people", sign * dist.median()),
                            ("sd_across_people", dist.std())):
            got = table.loc[f"{row}[{name}]"]
            assert got["mean"] == pytest.approx(values.mean(), rel=1e-10), (row, name)
            assert got["sd"] == pytest.approx(values.std(ddof=1), rel=1e-8), (row, name)
            assert got["eti_low"] == pytest.approx(np.quantile(values, 0.1), rel=1e-10), (row, name)
            assert got["eti_high"] == pytest.approx(np.quantile(values, 0.9), rel=1e-10), (row, name)
        # the parameters themselves are those of the log-taste (scipy's log of the scale)
        assert table.loc[f"taste_mean[{name}]", "mean"] == pytest.approx(np.log(dist.median()).mean(), rel=1e-10)
    # normal and fixed tastes: the parameters are the mean and SD themselves; no lognormal rows for them
    assert table.loc["taste_mean[time]", "mean"] == pytest.approx(mu.sel(attribute="time").values.mean(), rel=1e-12)
    assert table.loc["taste_sd[time]", "mean"] == pytest.approx(SDS["time"], rel=1e-12)
    # a normal taste's mean across people is its mean parameter; a fixed taste has no SD row
    assert table.loc["mean_across_people[time]", "mean"] == pytest.approx(table.loc["taste_mean[time]", "mean"],
                                                                          rel=1e-12)
    assert "taste_sd[wifi]" not in table.index
    # negative control: the mean across people is not the median (a dropped sigma^2 / 2 is seen)
    assert abs(table.loc["mean_across_people[quality]", "mean"]
               - table.loc["median_across_people[quality]", "mean"]) > 0.1


def test_population_tastes_moments_and_quantiles_equal_scipy_per_draw() -> None:
    """The implied distribution in population_tastes (analysis/tastes.py), draw by draw, for every taste kind."""
    fit = _four_taste_fit(chains=1, draws=30, spread=0.1, seed=4)
    ds = population_taste_draws(fit, quantiles=(0.1, 0.9))
    mu = fit.posterior["taste_mean"]
    for name, sign in (("price", -1.0), ("quality", 1.0), ("time", 1.0)):
        m = mu.sel(attribute=name).values.ravel()
        dist = _scipy_taste(name, m, SDS[name])
        got = ds.sel(attribute=name)
        lo, hi = (0.9, 0.1) if sign < 0 else (0.1, 0.9)  # a negated variable's quantiles swap
        expected = {"mean_across_people": sign * dist.mean(), "median_across_people": sign * dist.median(),
                    "sd_across_people": dist.std(), "p10_across_people": sign * dist.ppf(lo),
                    "p90_across_people": sign * dist.ppf(hi),
                    "share_positive": dist.sf(0.0) if name == "time" else np.full(m.size, float(sign > 0))}
        for key, value in expected.items():
            np.testing.assert_allclose(got[key].values.ravel(), value, rtol=1e-10, atol=1e-14, err_msg=f"{key} {name}")
    # a fixed taste: a point mass at its coefficient
    wifi = ds.sel(attribute="wifi")
    np.testing.assert_allclose(wifi["mean_across_people"].values.ravel(), mu.sel(attribute="wifi").values.ravel())
    assert float(np.nanmax(np.abs(wifi["sd_across_people"].values))) == 0.0


# --------------------------------------------------------------------------- WTP across people, closed forms


N_PEOPLE = 4000  # simulated people per posterior draw (population_wtp_draws' n_persons)
#: per-draw medians within 4.5 Monte Carlo SEs: a normal tail of 6.8e-6 per draw, below 0.1 % over the draws
#: of a test (the sample median is asymptotically normal with SD sqrt(q (1-q)) / (f(median) sqrt(n)); e.g. Cramér
#: 1946, Mathematical Methods of Statistics, sec. 28.5; from memory).
Z_MEDIAN = 4.5


def test_wtp_normal_attribute_over_a_fixed_price() -> None:
    """WTP = -x / b with x ~ N(m, s) and b fixed: normal, mean = median = -m / b, quantiles -(m + s z_q) / b."""
    attrs = [SimAttribute("price", levels=[1.0, 2.0, 3.0], taste="fixed", mean=-1.0),
             SimAttribute("time", levels=[10.0, 20.0, 30.0], taste="normal", mean=-0.05, sd=0.02)]
    fit = fake_fit(small_panel(attrs, model={"price": "price"}), {"price": -0.8, "time": -0.05}, {"time": 0.03},
                   chains=1, draws=40, spread=0.05, seed=6)
    ds = population_wtp_draws(fit, n_persons=N_PEOPLE, quantiles=(0.1, 0.9)).sel(attribute="time")
    b = fit.posterior["taste_mean"].sel(attribute="price").values.ravel()
    m = fit.posterior["taste_mean"].sel(attribute="time").values.ravel()
    ratio = stats.norm(-m / b, 0.03 / np.abs(b))  # scipy's normal, per draw
    np.testing.assert_allclose(ds["mean_across_people"].values.ravel(), ratio.mean(), rtol=1e-10)
    np.testing.assert_allclose(ds["share_positive"].values.ravel(), ratio.sf(0.0), atol=5 * 0.5 / np.sqrt(N_PEOPLE))
    se = 1.2533 * ratio.std() / np.sqrt(N_PEOPLE)  # sqrt(pi / 2) sigma / sqrt(n): the normal sample median
    assert np.all(np.abs(ds["median_across_people"].values.ravel() - ratio.median()) < Z_MEDIAN * se)
    se_q = np.sqrt(0.1 * 0.9) / (ratio.pdf(ratio.ppf(0.1)) * np.sqrt(N_PEOPLE))
    assert np.all(np.abs(ds["p10_across_people"].values.ravel() - ratio.ppf(0.1)) < Z_MEDIAN * se_q)
    assert np.all(np.abs(ds["p90_across_people"].values.ravel() - ratio.ppf(0.9)) < Z_MEDIAN * se_q)


def _lognormal_price_fit(corr: np.ndarray | None) -> hc.ChoiceFit:
    attrs = [SimAttribute("price", levels=[1.0, 2.0, 3.0, 4.0], taste="lognormal", mean=0.0, sd=0.3,
                          sign="negative"),
             SimAttribute("time", levels=[10.0, 20.0, 30.0], taste="normal", mean=-0.05, sd=0.02),
             SimAttribute("quality", levels=[1.0, 2.0, 3.0], taste="lognormal", mean=-1.0, sd=0.3, sign="positive")]
    panel = small_panel(attrs, model={"price": "price"}, **({"correlation": 0.2} if corr is not None else {}))
    return fake_fit(panel, {"price": np.log(0.5), "time": -0.05, "quality": np.log(0.2)},
                    {"price": 0.8, "time": 0.02, "quality": 0.4}, corr=corr, chains=1, draws=40, spread=0.05, seed=8)


@pytest.mark.parametrize("rho", [0.0, -0.6])
def test_wtp_over_a_lognormal_price_closed_forms(rho: float) -> None:
    """x = time ~ N(m_x, s_x), quality = e^{eta_q}, price = -e^{z}; (x, eta_q, z) jointly normal.

    * E[x e^{-z}] = (E x - cov(x, z)) e^{-E z + var z / 2} (differentiate the bivariate normal MGF; Stein's lemma);
    * e^{eta_q - z} is lognormal: median e^{m_q - m_z}, mean e^{m_q - m_z + var(eta_q - z) / 2}
      (scipy.stats.lognorm with s = SD(eta_q - z)).
    """
    corr = np.array([[1.0, rho, 0.5 * rho], [rho, 1.0, 0.0], [0.5 * rho, 0.0, 1.0]]) if rho else None
    fit = _lognormal_price_fit(corr)
    ds = population_wtp_draws(fit, n_persons=N_PEOPLE)
    mu = fit.posterior["taste_mean"]
    m_z, s_z = mu.sel(attribute="price").values.ravel(), 0.8
    m_x, s_x = mu.sel(attribute="time").values.ravel(), 0.02
    m_q, s_q = mu.sel(attribute="quality").values.ravel(), 0.4
    cov_xz, cov_qz = rho * s_x * s_z, 0.5 * rho * s_q * s_z
    mean_time = (m_x - cov_xz) * np.exp(-m_z + s_z**2 / 2)
    np.testing.assert_allclose(ds["mean_across_people"].sel(attribute="time").values.ravel(), mean_time, rtol=1e-10)
    ratio = stats.lognorm(s=np.sqrt(s_q**2 + s_z**2 - 2 * cov_qz), scale=np.exp(m_q - m_z))
    np.testing.assert_allclose(ds["mean_across_people"].sel(attribute="quality").values.ravel(), ratio.mean(),
                               rtol=1e-10)
    se = np.sqrt(0.25) / (ratio.pdf(ratio.median()) * np.sqrt(N_PEOPLE))
    got = ds["median_across_people"].sel(attribute="quality").values.ravel()
    assert np.all(np.abs(got - ratio.median()) < Z_MEDIAN * se), np.max(np.abs(got - ratio.median()) / se)
    # negative control: the median is not the mean here (the log-SD 0.8 makes them differ by > 30 %)
    assert np.all(ratio.mean() / ratio.median() > 1.3)


# --------------------------------------------------------------------------- shares under random tastes


def test_population_shares_equal_quadrature_of_the_logit_over_the_tastes() -> None:
    """Share_j = int softmax_j(V(beta)) f(beta) d beta, by a 40 x 40 Gauss-Hermite tensor grid over the two
    latent normals (price: lognormal, negative; time: normal), against the package's simulated population."""
    attrs = [SimAttribute("price", levels=[1.0, 2.0, 3.0, 4.0], taste="lognormal", mean=0.0, sd=0.3,
                          sign="negative"),
             SimAttribute("time", levels=[10.0, 20.0, 30.0], taste="normal", mean=-0.05, sd=0.02)]
    means, sds = {"price": np.log(0.8), "time": -0.05}, {"price": 0.6, "time": 0.06}
    # posterior without spread: every draw is the same population, so the share's posterior mean averages
    # 40 draws x 40,000 simulated people
    fit = fake_fit(small_panel(attrs, model={"price": "price"}), means, sds, chains=1, draws=40)
    market = pd.DataFrame({"option": ["a", "b", "c"], "price": [2.0, 3.0, 1.0], "time": [20.0, 10.0, 30.0]})
    table = predict_shares(fit, market, n_persons=40_000).set_index("alternative")
    e, w = hermegauss(40)
    w = w / np.sqrt(2 * np.pi)
    e_p, e_t = np.meshgrid(e, e, indexing="ij")
    weights = np.outer(w, w).ravel()
    b_price = -np.exp(means["price"] + sds["price"] * e_p.ravel())
    b_time = means["time"] + sds["time"] * e_t.ravel()
    v = b_price[:, None] * market["price"].to_numpy() + b_time[:, None] * market["time"].to_numpy()
    prob = np.exp(v - v.max(axis=1, keepdims=True))
    prob /= prob.sum(axis=1, keepdims=True)
    reference = weights @ prob  # (3,)
    assert weights.sum() == pytest.approx(1.0, abs=1e-12)
    got = table.loc[["a", "b", "c"], "mean"].to_numpy()
    # Monte Carlo SE of a share averaged over 1,600,000 simulated people: SD across people of P_j (by the same
    # quadrature) / sqrt(1,600,000)
    mc_se = np.sqrt(weights @ (prob - reference) ** 2) / np.sqrt(40 * 40_000)
    print("shares", got, "quadrature", reference, "MC SE", mc_se)
    assert np.all(1e-3 > 4.5 * mc_se)  # the tolerance is at least 4.5 MC SEs: false-alarm rate < 2e-5 per share
    np.testing.assert_allclose(got, reference, atol=1e-3)
    # negative control: the logit at the mean tastes (ignoring the spread of tastes) is off by more than 1e-2
    v_mean = (-np.exp(means["price"] + sds["price"] ** 2 / 2) * market["price"].to_numpy()
              + means["time"] * market["time"].to_numpy())
    at_mean = np.exp(v_mean - v_mean.max()) / np.exp(v_mean - v_mean.max()).sum()
    assert np.max(np.abs(at_mean - reference)) > 1e-2
