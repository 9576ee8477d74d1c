"""Population and individual tastes: implied distributions, intervals, person tables and shrinkage.

Most tests use fake posteriors built as xarray (no sampling): :func:`fake_fit` makes a
:class:`ChoiceFit` whose population parameters and person tastes are drawn by hand. The
other test modules of tastes / wtp / shares / report import it from here.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import arviz as az
import numpy as np
import pandas as pd
import pytest
import xarray as xr
from scipy import stats

from hierchoice import ChoicePanel, FitError, SimAttribute, SpecError, simulate_panel
from hierchoice.analysis.tastes import (
    person_latent_draws,
    person_tastes,
    population_taste_draws,
    population_tastes,
    simulate_population_tastes,
    summarize_draws,
    taste_shrinkage,
)
from hierchoice.inference.results import ChoiceFit
from hierchoice.inference.sampling import _tidy_idata
from hierchoice.model.build import model_layout

# --------------------------------------------------------------------------- fake posteriors


def small_panel(attributes: list[SimAttribute] | None = None, *, n_persons: int = 30, n_tasks: int = 4,
                alternatives: tuple[str, ...] = ("a", "b", "c"), model: Mapping[str, Any] | None = None,
                seed: int = 1, **kwargs: Any) -> ChoicePanel:
    """A small simulated panel (its choices do not matter to fake posteriors)."""
    attributes = attributes or [
        SimAttribute("price", levels=[1.0, 2.0, 3.0, 4.0], taste="lognormal", mean=0.0, sd=0.3, sign="negative"),
        SimAttribute("time", levels=[10.0, 20.0, 30.0], taste="normal", mean=-0.05, sd=0.02),
    ]
    sim = simulate_panel(attributes, n_persons=n_persons, n_tasks=n_tasks, alternatives=alternatives, seed=seed,
                         **kwargs)
    if model:
        sim.spec["model"] = sim.spec.get("model", {}) | dict(model)
    return ChoicePanel.from_frame(sim.data, sim.spec)


def fake_fit(
    panel: ChoicePanel,
    mean: Mapping[str, float],
    sd: Mapping[str, float] | None = None,
    *,
    corr: np.ndarray | None = None,
    chains: int = 2,
    draws: int = 100,
    spread: float = 0.0,
    covariate_effect: np.ndarray | None = None,
    person_draws: bool = True,
    seed: int = 0,
) -> ChoiceFit:
    """A ChoiceFit with a hand-made posterior.

    ``mean``/``sd`` are the population parameters by term name (log scale for lognormal tastes; in
    WTP space the WTP for every term but price); ``spread`` adds that much posterior noise to each
    mean. Person tastes are drawn from the population distribution once per draw (as if the data
    said nothing about individuals), coefficients in the user's units.
    """
    layout = model_layout(panel)
    rng = np.random.default_rng(seed)
    names, rnd = layout.names, layout.random_names
    sd = dict(sd or {})
    k_all = len(names)
    mu = np.array([mean[n] for n in names])[None, None, :] + spread * rng.standard_normal((chains, draws, k_all))
    sds = np.tile(np.array([sd.get(n, 0.0) for n in rnd]), (chains, draws, 1))
    post: dict[str, np.ndarray] = {"taste_mean": mu}
    dims: dict[str, list[str]] = {"taste_mean": ["attribute"]}
    coords: dict[str, Any] = {"attribute": names, "person": list(panel.persons)}
    if rnd:
        post["taste_sd"] = sds
        dims["taste_sd"] = ["random_attribute"]
        coords["random_attribute"] = rnd
    if corr is not None:
        post["taste_corr"] = np.tile(corr, (chains, draws, 1, 1))
        dims["taste_corr"] = ["random_attribute", "random_attribute_bis"]
        coords["random_attribute_bis"] = rnd
    n_p = panel.n_persons
    eta = np.broadcast_to(mu[:, :, None, :], (chains, draws, n_p, k_all)).copy()
    if covariate_effect is not None:
        post["covariate_effect"] = np.tile(covariate_effect, (chains, draws, 1, 1))
        dims["covariate_effect"] = ["covariate", "shifted_attribute"]
        coords["covariate"] = list(layout.covariates)
        coords["shifted_attribute"] = layout.shifted_names
        z = panel.Z - panel.Z.mean(axis=0)
        eta[..., list(layout.shifted)] += z @ covariate_effect
    if rnd:
        e = rng.standard_normal((chains, draws, n_p, len(rnd)))
        if corr is not None:
            e = e @ np.linalg.cholesky(corr).T
        eta[..., list(layout.random)] += e * sds[:, :, None, :]
    values = eta.copy()
    for k in range(k_all):
        if layout.is_lognormal(k):
            values[..., k] = layout.sign(k) * np.exp(eta[..., k])
    if layout.wtp_space:
        lam = -values[..., layout.price]
        w_names = [n for n in names if n != names[layout.price]]
        post["person_wtp"] = values[..., [names.index(n) for n in w_names]].copy()
        dims["person_wtp"] = ["person", "wtp_attribute"]
        coords["wtp_attribute"] = w_names
        for k in range(k_all):
            if k != layout.price:
                values[..., k] = lam * values[..., k]
    post["person_taste"] = values
    dims["person_taste"] = ["person", "attribute"]
    if not person_draws:
        post.pop("person_taste")
        post.pop("person_wtp", None)
    idata = az.from_dict(posterior=post, coords=coords, dims=dims)
    idata = _tidy_idata(idata, panel, list(post))
    info = {"backend": "fake", "draws": draws, "tune": 0, "chains": chains, "seed": seed, "wall_seconds": 0.0,
            "approximate": False, "method": "hand-made posterior"}
    return ChoiceFit(idata=idata, panel=panel, spec=panel.spec, layout=layout, info=info)


# --------------------------------------------------------------------------- summaries


def test_summarize_draws_intervals_of_known_distributions() -> None:
    rng = np.random.default_rng(3)
    n = 20_000  # per chain, 2 chains
    scale = np.array([1.0, 2.0, 0.5])
    values = np.concatenate([rng.normal(size=(2, n, 3)) * scale,
                             rng.exponential(scale=1 / 1.5, size=(2, n, 1))], axis=-1)  # rate lambda = 1.5
    da = xr.DataArray(values, dims=("chain", "draw", "attribute"), coords={"attribute": ["a", "b", "c", "e"]})
    table = summarize_draws(da, prob=0.8).set_index("attribute")
    for i, name in enumerate("abc"):
        flat = values[..., i].ravel()
        # numpy's quantile and the sample median and SD are the definitions of the other columns
        assert table.loc[name, "eti_low"] == pytest.approx(np.quantile(flat, 0.1))
        assert table.loc[name, "eti_high"] == pytest.approx(np.quantile(flat, 0.9))
        assert table.loc[name, "median"] == pytest.approx(np.median(flat))
        assert table.loc[name, "sd"] == pytest.approx(flat.std(ddof=1))
        # the 80 % HDI of N(0, s^2) is +-z s with z = Phi^-1(0.9) = 1.2816 (scipy.stats.norm.ppf). Tolerance 0.06 s:
        # an end estimated from 40,000 draws has an SD of about sqrt(0.1 * 0.9 / 40,000) / phi(z) = 0.0085 s
        # (the SD of a sample quantile; Serfling 1980, Approximation Theorems of Mathematical Statistics, 2.3.3),
        # so 0.06 s is 7 SDs (false-alarm rate below 1e-9 per end, normal approximation)
        z = stats.norm.ppf(0.9)
        assert table.loc[name, "hdi_low"] == pytest.approx(-z * scale[i], abs=0.06 * scale[i])
        assert table.loc[name, "hdi_high"] == pytest.approx(z * scale[i], abs=0.06 * scale[i])
    # the 80 % HDI of an exponential with rate 1.5 is [0, -ln(0.2) / 1.5] = [0, 1.073] (the density falls from 0).
    # SD of the upper end about sqrt(0.8 * 0.2 / 40,000) / f(1.073) = 0.0067 with f(1.073) = 1.5 * 0.2 = 0.3;
    # tolerance 0.04 is 6 SDs (false-alarm rate below 1e-8); the lower end is the smallest draw, within 1e-3 of 0
    assert table.loc["e", "hdi_low"] == pytest.approx(0.0, abs=1e-3)
    assert table.loc["e", "hdi_high"] == pytest.approx(-np.log(0.2) / 1.5, abs=0.04)
    # negative control: the equal-tailed interval [q10, q90] = [0.070, 1.535] is not the HDI; a summary that
    # returned it as the HDI would fail the two lines above
    assert table.loc["e", "eti_low"] == pytest.approx(-np.log(0.9) / 1.5, abs=0.01)
    assert table.loc["e", "eti_high"] == pytest.approx(-np.log(0.1) / 1.5, abs=0.04)
    robust = summarize_draws(da, robust=True)
    assert robust["mean"].isna().all() and robust["median"].notna().all()


@pytest.mark.parametrize("prob", [0, 1, 1.5, -0.1, True, "0.9"])
def test_bad_prob_is_a_spec_error(prob: Any) -> None:
    da = xr.DataArray(np.zeros((1, 5)), dims=("chain", "draw"))
    with pytest.raises(SpecError, match="prob must be"):
        summarize_draws(da, prob=prob)


# --------------------------------------------------------------------------- implied distribution


def test_implied_distribution_matches_scipy() -> None:
    # one posterior draw: the implied moments are exact functions of (mu, sigma)
    panel = small_panel()
    mu_p, sd_p, mu_t, sd_t = np.log(0.8), 0.4, -0.05, 0.03
    fit = fake_fit(panel, {"price": mu_p, "time": mu_t}, {"price": sd_p, "time": sd_t}, chains=1, draws=1)
    ds = population_taste_draws(fit, quantiles=(0.1, 0.9)).isel(chain=0, draw=0)
    price = ds.sel(attribute="price")
    # the coefficient is -exp(eta): minus a scipy.stats.lognorm(s=sd, scale=exp(mu)) variable (scipy 1.x)
    ln = stats.lognorm(s=sd_p, scale=np.exp(mu_p))
    assert float(price["mean_across_people"]) == pytest.approx(-ln.mean())
    assert float(price["median_across_people"]) == pytest.approx(-ln.median())
    assert float(price["sd_across_people"]) == pytest.approx(ln.std())
    assert float(price["p10_across_people"]) == pytest.approx(-ln.ppf(0.9))
    assert float(price["p90_across_people"]) == pytest.approx(-ln.ppf(0.1))
    assert float(price["share_positive"]) == 0.0
    time = ds.sel(attribute="time")
    nd = stats.norm(mu_t, sd_t)
    assert float(time["p10_across_people"]) == pytest.approx(nd.ppf(0.1))
    assert float(time["share_positive"]) == pytest.approx(nd.sf(0.0))


def test_population_tastes_table_has_every_quantity_and_both_intervals() -> None:
    attrs = [
        SimAttribute("price", levels=[1.0, 2.0, 3.0], taste="lognormal", mean=0.0, sd=0.3, sign="negative"),
        SimAttribute("time", levels=[10.0, 20.0, 30.0], taste="normal", mean=-0.05, sd=0.02),
        SimAttribute("wifi", levels=[0.0, 1.0], taste="fixed", mean=0.3),
    ]
    panel = small_panel(attrs, correlation=0.2, covariates={"age": {"time": 0.01}})
    layout = model_layout(panel)
    corr = np.array([[1.0, 0.3], [0.3, 1.0]])
    gamma = np.full((1, len(layout.shifted)), 0.01)
    fit = fake_fit(panel, {"price": 0.0, "time": -0.05, "wifi": 0.3}, {"price": 0.3, "time": 0.02}, corr=corr,
                   spread=0.01, covariate_effect=gamma)
    table = population_tastes(fit, prob=0.9)
    assert list(table.columns) == ["quantity", "attribute", "other", "scale", "mean", "sd", "median", "hdi_low",
                                   "hdi_high", "eti_low", "eti_high", "prob"]
    q = set(table["quantity"])
    assert {"population_mean", "population_sd", "mean_across_people", "median_across_people", "sd_across_people",
            "p10_across_people", "p90_across_people", "share_positive", "correlation", "covariate_effect"} <= q
    # one row per unordered pair of random tastes
    corr_rows = table[table["quantity"] == "correlation"]
    assert corr_rows[["attribute", "other"]].values.tolist() == [["price", "time"]]
    assert corr_rows["median"].iloc[0] == pytest.approx(0.3)
    # a fixed taste has no spread rows, but does have its mean and sign share
    wifi = table[table["attribute"] == "wifi"]
    assert set(wifi["quantity"]) == {"population_mean", "mean_across_people", "share_positive",
                                     "covariate_effect"}
    assert table.set_index(["quantity", "attribute"]).loc[("population_mean", "price"), "scale"] == \
        "log(-coefficient)"
    assert (table["hdi_low"] <= table["hdi_high"] + 1e-12).all() and (table["eti_low"] <= table["eti_high"]).all()
    assert (table["prob"] == 0.9).all()


# --------------------------------------------------------------------------- individuals


def test_person_tastes_table_and_csv(tmp_path: Any) -> None:
    panel = small_panel()
    fit = fake_fit(panel, {"price": 0.0, "time": -0.05}, {"price": 0.3, "time": 0.02})
    table = person_tastes(fit, prob=0.8)
    assert len(table) == panel.n_persons * 2
    assert list(table.columns[:2]) == ["person", "attribute"]
    draws = fit.posterior["person_taste"]
    first = panel.persons[0]
    row = table[(table["person"] == first) & (table["attribute"] == "time")].iloc[0]
    flat = draws.sel(person=first, attribute="time").values.ravel()
    assert row["mean"] == pytest.approx(flat.mean())
    assert row["eti_low"] == pytest.approx(np.quantile(flat, 0.1))
    path = tmp_path / "person_tastes.csv"
    table.to_csv(path, index=False)
    back = pd.read_csv(path)
    assert back.shape == table.shape and np.allclose(back["mean"], table["mean"])


def test_person_tastes_need_person_draws() -> None:
    fit = fake_fit(small_panel(), {"price": 0.0, "time": -0.05}, {"price": 0.3, "time": 0.02},
                   person_draws=False)
    with pytest.raises(FitError, match="store_person_draws"):
        person_tastes(fit)


def test_shrinkage_separates_no_information_from_full_information() -> None:
    panel = small_panel(n_persons=60)
    mean, sd = {"price": 0.0, "time": -0.05}, {"price": 0.3, "time": 0.02}
    # person draws straight from the population: the data say nothing about anyone
    none = taste_shrinkage(fake_fit(panel, mean, sd, draws=400)).set_index("attribute")
    assert (none["information"].abs() < 0.15).all()
    assert (none["spread_ratio"] < 0.2).all()
    # person draws concentrated at each person's own value: the data pin everyone down
    fit = fake_fit(panel, mean, sd, draws=400)
    rng = np.random.default_rng(5)
    own = rng.normal(-0.05, 0.02, size=panel.n_persons)
    pt = fit.posterior["person_taste"].copy()
    pt.loc[{"attribute": "time"}] = own[None, None, :] + 1e-4 * rng.standard_normal(pt.sel(attribute="time").shape)
    fit.idata.posterior["person_taste"] = pt
    full = taste_shrinkage(fit).set_index("attribute")
    assert full.loc["time", "information"] > 0.95
    assert full.loc["time", "spread_ratio"] == pytest.approx(1.0, abs=0.25)
    # the latent scale of a lognormal taste is log(-beta)
    latent = person_latent_draws(fit).sel(attribute="price")
    assert np.allclose(np.exp(latent), -fit.posterior["person_taste"].sel(attribute="price"))


# --------------------------------------------------------------------------- new people


def test_simulated_people_follow_the_population_distribution() -> None:
    panel = small_panel(correlation=-0.5)  # the spec says model.correlated = true
    corr = np.array([[1.0, -0.5], [-0.5, 1.0]])
    fit = fake_fit(panel, {"price": np.log(0.8), "time": -0.05}, {"price": 0.4, "time": 0.02}, corr=corr,
                   chains=1, draws=2)
    beta = simulate_population_tastes(fit, n_persons=40_000, seed=1)
    assert beta.dims == ("chain", "draw", "sim_person", "attribute")
    price = beta.sel(attribute="price").values.ravel()
    time = beta.sel(attribute="time").values.ravel()
    assert (price < 0).all()
    eta = np.log(-price)
    assert eta.mean() == pytest.approx(np.log(0.8), abs=0.01) and eta.std() == pytest.approx(0.4, rel=0.02)
    assert time.mean() == pytest.approx(-0.05, abs=0.001) and time.std() == pytest.approx(0.02, rel=0.02)
    assert np.corrcoef(eta, time)[0, 1] == pytest.approx(-0.5, abs=0.02)
    # the same seed gives the same people; max_draws thins
    again = simulate_population_tastes(fit, n_persons=10, seed=1)
    assert np.array_equal(again.values, simulate_population_tastes(fit, n_persons=10, seed=1).values)
    assert simulate_population_tastes(fit, n_persons=5, max_draws=1).sizes["draw"] == 1
    with pytest.raises(SpecError, match="n_persons"):
        simulate_population_tastes(fit, n_persons=0)


def test_simulated_people_in_wtp_space_are_lambda_times_w() -> None:
    panel = small_panel(model={"wtp_space": True, "price": "price"})
    fit = fake_fit(panel, {"price": 0.0, "time": -0.1}, {"price": 0.3, "time": 0.04}, chains=1, draws=1)
    beta = simulate_population_tastes(fit, n_persons=20_000, seed=2)
    w = -beta.sel(attribute="time") / beta.sel(attribute="price")
    assert float(w.mean()) == pytest.approx(-0.1, abs=0.002)
    assert float(w.std()) == pytest.approx(0.04, rel=0.03)


def test_simulated_people_carry_covariate_shifts() -> None:
    panel = small_panel(covariates={"income": {"time": 0.02}})
    layout = model_layout(panel)
    gamma = np.zeros((1, len(layout.shifted)))
    gamma[0, layout.shifted_names.index("time")] = 0.05
    fit = fake_fit(panel, {"price": 0.0, "time": -0.05}, {"price": 0.3, "time": 0.001}, chains=1, draws=1,
                   covariate_effect=gamma)
    beta = simulate_population_tastes(fit, n_persons=20_000, seed=3).sel(attribute="time").values.ravel()
    # time = -0.05 + 0.05 (z - zbar) + small noise, z resampled from the panel's persons
    z = panel.Z[:, 0]
    assert beta.std() == pytest.approx(np.hypot(0.05 * z.std(), 0.001), rel=0.05)
    assert beta.mean() == pytest.approx(-0.05, abs=0.05 * z.std() * 0.05)
