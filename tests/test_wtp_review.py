"""Issue 17, items 4 and 5: the mean WTP under a lognormal price, and the units of the report's tables.

Item 4: with a lognormal price coefficient ``-exp(z)``, ``1 / price`` is lognormal and has every moment, so the
population mean WTP exists whatever the log-SD; it is reported from its closed form and checked here against
one-dimensional quadrature (scipy) and direct simulation (numpy), independent of the package.

Item 5: in a willingness-to-pay-space fit the price row of a taste table is a utility coefficient and every other
row is money; each table names the unit of every row.
"""

from __future__ import annotations

import csv
import re
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from scipy import integrate, stats
from test_tastes import fake_fit, small_panel

import hierchoice as hc
from hierchoice import SimAttribute
from hierchoice.analysis.wtp import mean_wtp_across_people, person_wtp, population_wtp, taste_units
from hierchoice.report import write_report

# --------------------------------------------------------------------------- item 4: references


def _mean_normal_over_lognormal(m_b: float, s_b: float, m_z: float, s_z: float, rho: float) -> float:
    """E[b exp(-z)] for (b, z) bivariate normal, by quadrature over z (scipy), not by the closed form.

    E[b | z] = m_b + rho s_b / s_z (z - m_z) (bivariate normal regression), so E[b e^{-z}] is the one-dimensional
    integral of E[b | z] e^{-z} phi(z).
    """
    def f(z: float) -> float:
        return (m_b + rho * s_b / s_z * (z - m_z)) * np.exp(-z) * stats.norm.pdf(z, m_z, s_z)

    return integrate.quad(f, m_z - 14 * s_z, m_z + 14 * s_z, epsabs=0, epsrel=1e-11, limit=400)[0]


def _mean_lognormal_over_lognormal(m_k: float, s_k: float, m_z: float, s_z: float, rho: float) -> float:
    """E[exp(eta) exp(-z)] for (eta, z) bivariate normal, by quadrature over z (scipy).

    Given z, eta is normal with mean m_k + rho s_k / s_z (z - m_z) and variance s_k^2 (1 - rho^2), so
    E[e^eta | z] is the lognormal mean exp(mean + variance / 2).
    """
    def f(z: float) -> float:
        cond = m_k + rho * s_k / s_z * (z - m_z) + s_k**2 * (1 - rho**2) / 2
        return np.exp(cond - z) * stats.norm.pdf(z, m_z, s_z)

    return integrate.quad(f, m_z - 14 * s_z, m_z + 14 * s_z, epsabs=0, epsrel=1e-11, limit=400)[0]


PRICE = (np.log(0.5), 1.5)  # log(-beta_price) ~ N(mu, sd): log-SD 1.5, well past the old cut-off of about 1
TIME = (-0.05, 0.02)  # normal
QUALITY = (np.log(0.2), 0.4)  # lognormal, positive


def _three_term_fit(corr: np.ndarray | None, **kwargs: Any) -> hc.ChoiceFit:
    attrs = [
        SimAttribute("price", levels=[1.0, 2.0, 3.0, 4.0], taste="lognormal", mean=0.0, sd=0.3, sign="negative"),
        SimAttribute("time", levels=[10.0, 20.0, 30.0], taste="normal", mean=-0.05, sd=0.02),
        SimAttribute("quality", levels=[1.0, 2.0, 3.0], taste="lognormal", mean=-1.0, sd=0.3, sign="positive"),
    ]
    # correlation: the simulated panel's, which only makes the spec fit correlated tastes (the fake posterior's
    # correlation matrix is ``corr``)
    panel = small_panel(attrs, model={"price": "price"}, **({"correlation": 0.2} if corr is not None else {}))
    means = {"price": PRICE[0], "time": TIME[0], "quality": QUALITY[0]}
    sds = {"price": PRICE[1], "time": TIME[1], "quality": QUALITY[1]}
    return fake_fit(panel, means, sds, corr=corr, **kwargs)


def test_lognormal_price_with_a_wide_log_sd_reports_the_closed_form_mean() -> None:
    """Independent tastes: E[WTP] = E[b] E[1/lambda], E[1/lambda] = exp(-mu + s^2 / 2) (lognormal moments)."""
    fit = _three_term_fit(None, chains=1, draws=40)
    table = population_wtp(fit, n_persons=2000)
    assert not table.attrs["robust"]
    # the long tail is still said, as information, not as a reason to withhold the mean
    assert [(r.kind, r.level) for r in table.attrs["warnings"]] == [("long_tail", "info")]
    mean = table[table["quantity"] == "mean_across_people"].set_index("attribute")
    # WTP = -beta_k / beta_price = beta_k exp(-z); lognormal moments (Train 2009, sec. 6.2; from memory)
    inv_lambda = np.exp(-PRICE[0] + PRICE[1] ** 2 / 2)
    expected = {"time": TIME[0] * inv_lambda, "quality": np.exp(QUALITY[0] + QUALITY[1] ** 2 / 2) * inv_lambda}
    for name, value in expected.items():
        # the same by quadrature (scipy), with no correlation
        reference = (_mean_normal_over_lognormal(TIME[0], TIME[1], *PRICE, 0.0) if name == "time" else
                     _mean_lognormal_over_lognormal(*QUALITY, *PRICE, 0.0))
        assert reference == pytest.approx(value, rel=1e-8)
        # a posterior without spread: every draw gives the same population mean, and so does its interval
        for column in ("mean", "median", "hdi_low", "hdi_high", "eti_low", "eti_high"):
            assert mean.loc[name, column] == pytest.approx(reference, rel=1e-9), (name, column)
        assert np.isfinite(mean.loc[name, "sd"])


def test_correlated_tastes_use_the_joint_normal_closed_form() -> None:
    """E[b e^{-z}] = (mu_b - cov(b, z)) e^{-mu_z + s_z^2 / 2}, checked by quadrature and by direct simulation."""
    rho_time, rho_quality = -0.6, 0.5
    corr = np.array([[1.0, rho_time, rho_quality], [rho_time, 1.0, 0.0], [rho_quality, 0.0, 1.0]])
    fit = _three_term_fit(corr, chains=1, draws=10)
    means = mean_wtp_across_people(fit).mean(("chain", "draw"))
    ref_time = _mean_normal_over_lognormal(*TIME, *PRICE, rho_time)  # scipy quadrature
    ref_quality = _mean_lognormal_over_lognormal(*QUALITY, *PRICE, rho_quality)
    assert float(means.sel(attribute="time")) == pytest.approx(ref_time, rel=1e-8)
    assert float(means.sel(attribute="quality")) == pytest.approx(ref_quality, rel=1e-8)
    # the correlation matters: cov = -0.6 x 0.02 x 1.5 = -0.018, so ignoring it would be 36 % off for time here
    assert abs(ref_time / (TIME[0] * np.exp(-PRICE[0] + PRICE[1] ** 2 / 2)) - 1) > 0.3
    # direct simulation of the population (numpy, 4 million people): the mean of b e^{-z} within 5 Monte Carlo
    # SEs (a normal tail of 5 SEs: false-alarm rate below 1e-6 for each of the two checks)
    rng = np.random.default_rng(17)
    sd = np.array([PRICE[1], TIME[1], QUALITY[1]])
    eta = np.array([PRICE[0], TIME[0], QUALITY[0]]) + rng.multivariate_normal(
        np.zeros(3), corr * np.outer(sd, sd), size=4_000_000)
    inv_lambda = np.exp(-eta[:, 0])
    for ref, draws in ((ref_time, eta[:, 1] * inv_lambda), (ref_quality, np.exp(eta[:, 2]) * inv_lambda)):
        se = draws.std() / np.sqrt(draws.size)
        assert abs(draws.mean() - ref) < 5 * se, (draws.mean(), ref, se)
    # and the reported table carries it
    table = population_wtp(fit, n_persons=500).set_index(["quantity", "attribute"])
    assert table.loc[("mean_across_people", "time"), "mean"] == pytest.approx(ref_time, rel=1e-8)


def test_the_mean_interval_is_that_of_the_closed_form_over_the_posterior() -> None:
    """With posterior spread, the interval of the mean is the quantiles of the closed form over the draws."""
    fit = _three_term_fit(None, chains=2, draws=200, spread=0.05, seed=5)
    table = population_wtp(fit, n_persons=200, prob=0.8).set_index(["quantity", "attribute"])
    mu = fit.posterior["taste_mean"]
    per_draw = (mu.sel(attribute="time") * np.exp(-mu.sel(attribute="price") + PRICE[1] ** 2 / 2)).values.ravel()
    row = table.loc[("mean_across_people", "time")]
    assert row["mean"] == pytest.approx(per_draw.mean(), rel=1e-9)
    assert row["eti_low"] == pytest.approx(np.quantile(per_draw, 0.1), rel=1e-9)
    assert row["eti_high"] == pytest.approx(np.quantile(per_draw, 0.9), rel=1e-9)


def test_covariate_shifts_are_averaged_over_the_population() -> None:
    """With covariates the closed form averages over people's covariates; checked by direct simulation."""
    panel = small_panel(covariates={"income": {"price": 0.2, "time": 0.02}}, model={"price": "price"})
    layout = hc.model_layout(panel)
    gamma = np.zeros((1, len(layout.shifted)))
    gamma[0, layout.shifted_names.index("price")] = 0.4
    gamma[0, layout.shifted_names.index("time")] = 0.03
    fit = fake_fit(panel, {"price": 0.0, "time": -0.05}, {"price": 1.2, "time": 0.02}, chains=1, draws=2,
                   covariate_effect=gamma)
    got = float(mean_wtp_across_people(fit).sel(attribute="time").mean())
    # simulate: people's covariates drawn from the panel's, then their tastes (numpy, 4 million people)
    rng = np.random.default_rng(3)
    z = panel.Z[rng.integers(0, panel.Z.shape[0], 4_000_000), 0] - panel.Z[:, 0].mean()
    b = -0.05 + 0.03 * z + 0.02 * rng.standard_normal(z.size)
    w = b * np.exp(-(0.4 * z + 1.2 * rng.standard_normal(z.size)))
    se = w.std() / np.sqrt(w.size)
    assert abs(w.mean() - got) < 5 * se, (w.mean(), got, se)  # 5 SEs: false alarm below 1e-6


def test_person_means_are_reported_for_a_lognormal_price() -> None:
    """Each person's posterior of log(-price) has normal tails, so their WTP mean exists and is reported."""
    fit = _three_term_fit(None, chains=1, draws=100, seed=2)
    table = person_wtp(fit)
    many = table["price_near_zero"] > 0.01
    assert many.any()  # persons that the old rule withheld
    assert table["mean"].notna().all() and table["sd"].notna().all()
    assert [r.kind for r in table.attrs["warnings"]] == ["long_tail"]
    beta = fit.posterior["person_taste"]
    direct = (-beta.sel(attribute="time") / beta.sel(attribute="price")).mean(("chain", "draw"))
    got = table[table["attribute"] == "time"].set_index("person")["mean"]
    assert np.allclose(got.loc[direct["person"].values].to_numpy(), direct.values)


def test_prices_without_a_mean_still_withhold_it() -> None:
    """Negative controls: a normal price, and a fixed price whose posterior reaches zero, have no mean."""
    attrs = [SimAttribute("price", levels=[1.0, 2.0, 3.0], taste="normal", mean=-1.0, sd=0.5),
             SimAttribute("time", levels=[10.0, 20.0, 30.0], taste="normal", mean=-0.05, sd=0.02)]
    normal = fake_fit(small_panel(attrs, model={"price": "price"}), {"price": -1.0, "time": -0.05},
                      {"price": 0.5, "time": 0.02}, draws=20)
    assert np.isnan(mean_wtp_across_people(normal).values).all()
    table = population_wtp(normal, n_persons=200)
    assert table.attrs["robust"] and "mean_across_people" not in set(table["quantity"])
    fixed_attrs = [SimAttribute("price", levels=[1.0, 2.0, 3.0], taste="fixed", mean=-1.0),
                   SimAttribute("time", levels=[10.0, 20.0, 30.0], taste="fixed", mean=-0.05)]
    fixed = fake_fit(small_panel(fixed_attrs, model={"price": "price"}), {"price": -0.05, "time": -0.05},
                     spread=0.05, seed=3, draws=50)
    table = population_wtp(fixed, n_persons=50)
    assert table.attrs["robust"] and [r.kind for r in table.attrs["warnings"]] == ["price_near_zero"]
    assert person_wtp(fixed)["mean"].isna().all()


# --------------------------------------------------------------------------- item 5: units in the report


@pytest.fixture(scope="module")
def wtp_space_report(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    """A tiny real WTP-space fit (30 persons, 2 chains x 60 draws) and its report."""
    attrs = [
        SimAttribute("fare", levels=[1.0, 2.0, 3.0, 4.0], taste="lognormal", mean=0.0, sd=0.3, sign="negative"),
        SimAttribute("minutes", levels=[10.0, 20.0, 30.0], taste="normal", mean=-0.05, sd=0.02),
    ]
    sim = hc.simulate_panel(attrs, n_persons=30, n_tasks=6, alternatives=("a", "b", "c"), seed=4)
    sim.spec["model"] = {"wtp_space": True, "price": "fare"}
    panel = hc.ChoicePanel.from_frame(sim.data, sim.spec)
    result = hc.fit(panel, draws=60, tune=100, chains=2, seed=1, backend="nutpie", progressbar=False)
    folder = hc.save_fit(result, tmp_path_factory.mktemp("wtp_space") / "results")
    page = write_report(folder).read_text(encoding="utf-8")
    return {"result": result, "folder": folder, "page": page}


def _html_table_after(page: str, marker: str) -> list[list[str]]:
    """The first table after ``marker``: its header then its rows, as text (tags stripped)."""
    start = page.index("<table", page.index(marker))
    block = page[start:page.index("</table>", start)]
    rows = re.findall(r"<tr>(.*?)</tr>", block, flags=re.S)
    return [[re.sub(r"<[^>]+>", "", c).strip() for c in re.findall(r"<t[hd][^>]*>(.*?)</t[hd]>", r, flags=re.S)]
            for r in rows]


def test_wtp_space_population_table_names_the_unit_of_each_row(wtp_space_report: dict[str, Any]) -> None:
    rows = _html_table_after(wtp_space_report["page"], "<section id='tastes'>")
    head, body = rows[0], {r[0]: r for r in rows[1:]}
    assert "unit" in head
    unit = head.index("unit")
    # the price row is its utility coefficient, the others are money (fare) per unit: one unit per row
    assert body["fare"][unit] == "utility per unit of fare"
    assert body["minutes"][unit] == "fare per unit of minutes"


def test_wtp_space_csv_tables_carry_a_unit_per_row(wtp_space_report: dict[str, Any]) -> None:
    folder: Path = wtp_space_report["folder"]
    pop = pd.read_csv(folder / "population_tastes.csv")
    assert "unit" in pop.columns and pop["unit"].notna().all()
    by = {(q, a): u for q, a, u in zip(pop["quantity"], pop["attribute"], pop["unit"])}
    assert by[("mean_across_people", "fare")] == "utility per unit of fare"
    assert by[("mean_across_people", "minutes")] == "fare per unit of minutes"
    assert by[("population_mean", "fare")] == "log(−x), x in utility per unit of fare"
    assert by[("population_mean", "minutes")] == "fare per unit of minutes"
    assert by[("share_positive", "minutes")] == "share of people"
    # person tastes are utility coefficients (lambda w) in either space; person WTP is money
    persons = pd.read_csv(folder / "person_tastes.csv")
    assert set(zip(persons["attribute"], persons["unit"])) == {("fare", "utility per unit of fare"),
                                                               ("minutes", "utility per unit of minutes")}
    with open(folder / "wtp.csv", encoding="utf-8") as handle:
        wtp_rows = list(csv.DictReader(handle))
    assert {r["unit"] for r in wtp_rows if r["quantity"] != "share_positive"} == {"fare per unit of minutes"}
    person = pd.read_csv(folder / "person_wtp.csv")
    assert set(person["unit"]) == {"fare per unit of minutes"}


def test_wtp_space_shrinkage_table_names_units(wtp_space_report: dict[str, Any]) -> None:
    rows = _html_table_after(wtp_space_report["page"], "<section id='individual'>")
    head, body = rows[0], {r[0]: r for r in rows[1:]}
    unit = head.index("unit (SDs)")
    assert body["fare"][unit] == "log(−x), x in utility per unit of fare"
    assert body["minutes"][unit] == "fare per unit of minutes"
    assert taste_units(wtp_space_report["result"]) == {"fare": "utility per unit of fare",
                                                       "minutes": "fare per unit of minutes"}
