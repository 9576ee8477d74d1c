"""Hit rate, reliability, posterior-predictive shares, prior predictive, and holdout validation.

Most tests score invented posteriors (person tastes set near the simulated truth, or deliberately
wrong) so that the expected answer is known; the holdout test fits the mixed and the fixed-taste
model once each on a small invented panel (module-scoped).
"""

from __future__ import annotations

from typing import Any

import arviz as az
import numpy as np
import pandas as pd
import pytest

from hierchoice import ChoicePanel, DataError, SimAttribute, SpecError, ferry_scenario, simulate_panel
from hierchoice.diagnostics.predictive import (
    fixed_taste_spec,
    hit_rate,
    holdout_split,
    holdout_validation,
    posterior_choice_probabilities,
    ppc_shares,
    prior_predictive,
    reliability,
    score_tasks,
)
from hierchoice.inference.results import ChoiceFit
from hierchoice.model.build import model_layout
from hierchoice.spec import Spec

LEVELS = np.round(np.linspace(-3, 3, 25), 3).tolist()


def _fit_with_tastes(panel: ChoicePanel, tastes: np.ndarray) -> ChoiceFit:
    """A ChoiceFit whose posterior person tastes are ``tastes`` (chain, draw, person, attribute)."""
    idata = az.from_dict(posterior={"person_taste": tastes}, dims={"person_taste": ["person", "attribute"]},
                         coords={"person": list(panel.persons), "attribute": list(panel.attributes)})
    return ChoiceFit(idata=idata, panel=panel, spec=panel.spec, layout=model_layout(panel))


def _around(truth: np.ndarray, spread: float, seed: int, draws: int = 40) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return truth + spread * rng.standard_normal((2, draws) + truth.shape)


def _sim(attrs: list[SimAttribute], **kw: Any) -> tuple[ChoicePanel, np.ndarray, Any]:
    sim = simulate_panel(attrs, **kw)
    panel = ChoicePanel.from_frame(sim.data, sim.spec)
    truth = sim.truth["person_taste"].loc[list(panel.persons), list(panel.attributes)].to_numpy()
    return panel, truth, sim


# --------------------------------------------------------------------------- hit rate


def test_chance_rate_is_the_mean_of_one_over_available() -> None:
    # outside fact (common practice): guessing among the available alternatives hits with probability
    # 1 / (number available) in each task, so the chance hit rate is the mean of that over tasks
    panel, _, sim = _sim([SimAttribute("x", levels=LEVELS, mean=1.0)], n_persons=50, n_tasks=6,
                         alternatives=("a", "b", "c", "d"), unavailable_rate=0.4, seed=1)
    per_task = sim.data[sim.data["available"] == 1].groupby(["respondent", "task"]).size()
    assert per_task.nunique() > 1  # the design really mixes 2, 3 and 4 available alternatives
    assert panel.chance_rate == pytest.approx(float(np.mean(1.0 / per_task)), rel=1e-12)


def test_hit_rate_near_one_when_taste_differences_are_huge() -> None:
    # every person's taste is at least ~10 per unit of x, levels 0.25 apart: utility gaps of 2.5 and more
    panel, truth, _ = _sim([SimAttribute("x", levels=LEVELS, mean=40.0, sd=10.0)], n_persons=200, n_tasks=8,
                           seed=2)
    assert truth.min() > 5
    fit = _fit_with_tastes(panel, _around(truth, 0.5, seed=3))
    hr = hit_rate(fit)
    assert hr["n_tasks"] == panel.n_tasks and hr["chance_rate"] == pytest.approx(1 / 3)
    assert hr["hit_rate"] > 0.95
    assert hr["lift"] == pytest.approx(hr["hit_rate"] / hr["chance_rate"])


def test_hit_rate_at_chance_when_tastes_are_noise() -> None:
    # all true tastes 0: choices are pure noise; 3 or 4 alternatives available per task
    panel, truth, _ = _sim([SimAttribute("x", levels=LEVELS, taste="fixed", mean=0.0)], n_persons=400,
                           n_tasks=10, alternatives=("a", "b", "c", "d"), unavailable_rate=0.3, seed=4)
    assert np.all(truth == 0)
    # predictions that know nothing about the choices (random tastes) hit at the chance rate ...
    random_tastes = np.random.default_rng(5).standard_normal((2, 20) + truth.shape)
    hr = hit_rate(_fit_with_tastes(panel, random_tastes))
    se = np.sqrt(hr["chance_rate"] * (1 - hr["chance_rate"]) / panel.n_tasks)  # binomial standard error
    assert abs(hr["hit_rate"] - hr["chance_rate"]) < 4 * se
    # ... and the true (zero) tastes tie every alternative: ties share the hit, which is exactly chance
    exact = hit_rate(_fit_with_tastes(panel, np.zeros((1, 2) + truth.shape)))
    assert exact["hit_rate"] == pytest.approx(panel.chance_rate, abs=1e-12)


def test_probabilities_are_labelled_and_sum_to_one() -> None:
    panel, truth, _ = _sim([SimAttribute("x", levels=LEVELS, mean=0.5, sd=0.5)], n_persons=20, n_tasks=(3, 6),
                           seed=6)
    prob = posterior_choice_probabilities(_fit_with_tastes(panel, _around(truth, 0.2, seed=1)))
    assert prob.dims == ("person", "task", "alternative")
    assert list(prob["alternative"].values) == list(panel.alternatives)
    sums = prob.sum("alternative").values
    np.testing.assert_allclose(sums[panel.task_mask], 1.0)
    assert np.isnan(prob.values[~panel.task_mask]).all()  # padded tasks (unbalanced panel) are NaN


# --------------------------------------------------------------------------- reliability


def test_reliability_is_calibrated_with_true_tastes_and_not_when_overconfident() -> None:
    panel, truth, _ = _sim([SimAttribute("x", levels=LEVELS, mean=0.3, sd=0.6),
                            SimAttribute("z", levels=LEVELS, mean=-0.4, sd=0.3)], n_persons=300, n_tasks=10, seed=7)
    good = reliability(_fit_with_tastes(panel, truth[None, None]), bins=10)
    assert good["n"].sum() == int((panel.available & panel.task_mask[:, :, None]).sum())
    big = good[good["n"] >= 50]
    assert len(big) >= 5
    assert np.all(np.abs(big["observed"] - big["mean_predicted"]) < 4 * big["se"])
    # tripled tastes make every prediction too extreme: the top bin is chosen far less often than predicted
    over = reliability(_fit_with_tastes(panel, 3 * truth[None, None]), bins=10)
    top = over.iloc[-1]
    assert top["mean_predicted"] > 0.9
    assert top["observed"] < top["mean_predicted"] - 4 * top["se"]
    fit = _fit_with_tastes(panel, truth[None, None])
    with pytest.raises(SpecError, match="bins"):
        reliability(fit, bins=0)


# --------------------------------------------------------------------------- posterior-predictive shares


def _deck_panel(coding: str, seed: int = 8) -> tuple[ChoicePanel, np.ndarray, Any]:
    attrs = [SimAttribute("x", levels=LEVELS, mean=0.5, sd=0.3),
             SimAttribute("deck", levels=["open", "covered", "lounge"], mean=[0.5, 1.0], sd=[0.2, 0.2],
                          categorical=True)]
    sim = simulate_panel(attrs, n_persons=150, n_tasks=8, alternatives=("a", "b"), opt_out="none",
                         constants={"a": 1.5, "b": 0.5}, seed=seed)
    sim.spec["attributes"]["deck"]["coding"] = coding
    panel = ChoicePanel.from_frame(sim.data, sim.spec)
    truth = sim.truth["person_taste"].loc[list(panel.persons), list(panel.attributes)].to_numpy()
    return panel, truth, sim


@pytest.mark.parametrize("coding", ["dummy", "effects"])
def test_ppc_observed_level_shares_match_the_raw_table(coding: str) -> None:
    panel, truth, sim = _deck_panel(coding)
    table = ppc_shares(_fit_with_tastes(panel, truth[None, None].repeat(5, axis=1)), draws=5, seed=0)
    chosen = sim.data[sim.data["chosen"] == 1]
    n_tasks = len(chosen)
    levels = table[table["statistic"] == "level"].set_index("level")["observed"]
    assert list(levels.index) == ["open", "covered", "lounge"]  # the base first, then the coded levels
    for level, share in levels.items():
        assert share == pytest.approx((chosen["deck"] == level).sum() / n_tasks)
    alts = table[table["statistic"] == "alternative"].set_index("level")["observed"]
    assert alts.sum() == pytest.approx(1.0)
    # the opt-out has no deck: level shares and the opt-out share add up to 1
    assert levels.sum() + alts["none"] == pytest.approx(1.0)


def test_ppc_shares_cover_the_truth_and_flag_a_missing_constant() -> None:
    panel, truth, _ = _deck_panel("dummy", seed=9)
    good = ppc_shares(_fit_with_tastes(panel, _around(truth, 0.05, seed=2, draws=100)), draws=200, seed=1)
    assert len(good) == 3 + 3  # three alternatives, three deck levels
    spread = (good["eti_high"] - good["eti_low"]) / (2 * 1.645)  # the 90 % interval in replicated SDs
    # the observed share is a draw from (near) the posterior predictive distribution, so each standardised
    # difference is about N(0, 1) or narrower (posterior predictive p-values are conservative; Meng 1994, Annals
    # of Statistics 22(3)). 3.14 = scipy.stats.norm.isf(0.01 / 12): false-alarm rate <= 1 % over the 6 shares
    # (two-sided, Bonferroni)
    assert np.all(np.abs(good["observed"] - good["replicated_mean"]) < 3.14 * spread)
    # drop the constants from the posterior: the model now under-predicts option "a" badly
    wrong = truth.copy()
    wrong[:, [panel.attributes.index("asc:a"), panel.attributes.index("asc:b")]] = 0.0
    bad = ppc_shares(_fit_with_tastes(panel, _around(wrong, 0.05, seed=2, draws=100)), draws=200, seed=1)
    row = bad[(bad["statistic"] == "alternative") & (bad["level"] == "a")].iloc[0]
    assert row["outside"] and row["observed"] > row["eti_high"] and row["p_value"] == 0.0
    # the same line as above flags it (negative control of the 3.14-SD check)
    bad_spread = (row["eti_high"] - row["eti_low"]) / (2 * 1.645)
    assert abs(row["observed"] - row["replicated_mean"]) > 3.14 * bad_spread


# --------------------------------------------------------------------------- holdout split and the fixed-taste spec


def test_holdout_split_last_and_random() -> None:
    panel, _, _ = _sim([SimAttribute("x", levels=LEVELS, mean=1.0)], n_persons=30, n_tasks=(1, 6), seed=10)
    n_i = panel.task_mask.sum(axis=1)
    train, test = holdout_split(panel, tasks=2, method="last")
    assert train.persons == panel.persons  # everyone keeps at least one training task
    assert train.n_tasks + test.n_tasks == panel.n_tasks
    held = dict(zip(test.persons, test.task_mask.sum(axis=1)))
    for person, n in zip(panel.persons, n_i):
        assert held.get(person, 0) == min(2, n - 1)
    # "last" holds out each person's last tasks in task order
    i = int(np.argmax(n_i))
    last_ids = [t for t in panel.task_ids[i][panel.task_mask[i]]][-2:]
    j = test.persons.index(panel.persons[i])
    assert list(test.task_ids[j][test.task_mask[j]]) == last_ids
    r1 = holdout_split(panel, tasks=2, method="random", seed=1)[1]
    r1b = holdout_split(panel, tasks=2, method="random", seed=1)[1]
    r2 = holdout_split(panel, tasks=2, method="random", seed=2)[1]
    assert np.array_equal(r1.task_ids, r1b.task_ids)
    assert not np.array_equal(r1.task_ids, r2.task_ids)
    assert r1.n_tasks == test.n_tasks
    with pytest.raises(SpecError, match="method"):
        holdout_split(panel, method="first")
    with pytest.raises(SpecError, match="tasks"):
        holdout_split(panel, tasks=0)
    single, _, _ = _sim([SimAttribute("x", levels=LEVELS, mean=1.0)], n_persons=5, n_tasks=1, seed=11)
    with pytest.raises(DataError, match="single task"):
        holdout_split(single)


def test_fixed_taste_spec_fixes_every_taste() -> None:
    spec = Spec.from_dict(ferry_scenario(n_persons=10).spec)
    assert spec.model.correlated and spec.attributes["fare"].taste == "lognormal"
    fixed = fixed_taste_spec(spec)
    assert all(a.taste == "fixed" and a.sign is None for a in fixed.attributes.values())
    assert not fixed.model.correlated and not fixed.model.wtp_space
    assert fixed.constants is not None and fixed.constants.taste == "fixed"
    assert fixed.columns == spec.columns and fixed.data == spec.data  # the same data, only the tastes change


# --------------------------------------------------------------------------- with real fits


@pytest.fixture(scope="module")
def holdout() -> Any:
    """Mixed and fixed-taste fits on 6 of 8 tasks of 60 invented persons whose x1 taste varies widely."""
    panel, _, _ = _sim([SimAttribute("x1", levels=np.linspace(-1.5, 1.5, 7).tolist(), mean=0.0, sd=2.5),
                        SimAttribute("x2", levels=np.linspace(-1.5, 1.5, 7).tolist(), mean=1.0, sd=0.3)],
                       n_persons=60, n_tasks=8, seed=12)
    return holdout_validation(panel, tasks=2, method="last", draws=150, tune=200, chains=2, backend="nutpie",
                              fit_seed=3)


def test_holdout_validation_prefers_the_mixed_model(holdout: Any) -> None:
    table = holdout.table
    assert list(table.index) == ["mixed", "fixed", "chance"]
    assert (table["n_tasks"] == 120).all()  # 2 held-out tasks x 60 persons
    assert table.loc["chance", "hit_rate"] == pytest.approx(1 / 3)
    assert table.loc["chance", "mean_lpd"] == pytest.approx(-np.log(3))
    # the population mean of x1 is 0, so without person tastes x1 predicts nothing; with them it does
    assert table.loc["mixed", "mean_lpd"] > table.loc["fixed", "mean_lpd"] + 0.1
    assert table.loc["mixed", "hit_rate"] > table.loc["chance", "hit_rate"] + 0.1
    assert "taste_sd" not in holdout.fits["fixed"].posterior  # the comparison fit really is fixed-taste
    assert holdout.train.n_tasks == 360 and holdout.test.n_tasks == 120
    # holdout scores are out of sample: the training tasks are not among them
    scored = holdout.tasks[holdout.tasks["model"] == "mixed"]
    assert set(zip(scored["person"], scored["task"].astype(int))).isdisjoint(
        set(zip(np.repeat(holdout.train.persons, holdout.train.task_mask.sum(axis=1)),
                holdout.train.task_ids[holdout.train.task_mask].astype(int))))


def test_in_sample_checks_on_a_real_fit(holdout: Any) -> None:
    fit = holdout.fits["mixed"]
    hr = hit_rate(fit)
    assert hr["hit_rate"] > hr["chance_rate"] + 0.15
    shares = ppc_shares(fit, draws=100, seed=0)
    assert list(shares["level"]) == list(fit.panel.alternatives)  # no categorical attribute here
    assert shares["replicated_mean"].sum() == pytest.approx(1.0)
    rows = score_tasks(fit, holdout.test)
    assert len(rows) == holdout.test.n_tasks and (rows["lpd"] < 0).all()
    other, _, _ = _sim([SimAttribute("x1", levels=LEVELS, mean=0.0), SimAttribute("x2", levels=LEVELS)],
                       n_persons=70, n_tasks=2, seed=1)
    with pytest.raises(DataError, match="no posterior tastes"):
        score_tasks(fit, other)


def test_prior_predictive_wider_priors_give_more_deterministic_choices() -> None:
    panel, _, _ = _sim([SimAttribute("x1", levels=LEVELS, mean=0.5, sd=0.5),
                        SimAttribute("x2", levels=LEVELS, mean=-0.5, sd=0.5)], n_persons=40, n_tasks=5, seed=13)
    narrow = prior_predictive(panel, draws=200, seed=1)
    wide_spec = Spec.from_dict(panel.spec.to_dict() | {"model": {"prior_scale": 10.0}})
    wide = prior_predictive(panel, wide_spec, draws=200, seed=1)
    assert narrow["share"].shape == (200, 3)
    np.testing.assert_allclose(narrow["share"].sum("alternative"), 1.0)
    observed = pd.Series(panel.chosen[panel.task_mask]).value_counts(normalize=True).sort_index().to_numpy()
    np.testing.assert_allclose(narrow["observed_share"].values, observed)
    assert narrow.attrs["chance_rate"] == pytest.approx(1 / 3)
    # a 10x wider prior on standardised tastes puts far more tasks at near-certain choices
    assert float(wide["near_deterministic"].mean()) > float(narrow["near_deterministic"].mean()) + 0.2
    assert float(wide["max_probability"].mean()) > float(narrow["max_probability"].mean())


@pytest.mark.slow
def test_holdout_on_pure_noise_is_at_chance() -> None:
    # every true taste is 0: no model can beat guessing out of sample
    panel, truth, _ = _sim([SimAttribute("x1", levels=LEVELS, mean=0.0, sd=0.0),
                            SimAttribute("x2", levels=LEVELS, mean=0.0, sd=0.0)], n_persons=100, n_tasks=10, seed=14)
    assert np.all(truth == 0)
    result = holdout_validation(panel, tasks=3, draws=300, tune=300, chains=2, backend="nutpie", fit_seed=2)
    table = result.table
    se = np.sqrt(table.loc["chance", "hit_rate"] * (1 - table.loc["chance", "hit_rate"]) / 300)  # binomial
    for model in ("mixed", "fixed"):
        assert abs(table.loc[model, "hit_rate"] - table.loc["chance", "hit_rate"]) < 4 * se
        assert abs(table.loc[model, "mean_lpd"] - table.loc["chance", "mean_lpd"]) < 0.1
