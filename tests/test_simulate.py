"""The simulator: shapes, the truth it returns, and choice shares against the closed-form logit."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from hierchoice import ChoicePanel, SimAttribute, Spec, SpecError, benchmark_scenario, ferry_scenario, simulate_panel
from hierchoice.simulate import draw_choices


def test_ferry_scenario_shapes_and_spec() -> None:
    sim = ferry_scenario(n_persons=40, seed=3)
    spec = Spec.from_dict(sim.spec)  # the spec it returns validates
    assert spec.model.price == "fare" and spec.data.opt_out == "none"
    panel = ChoicePanel.from_frame(sim.data, sim.spec)
    assert panel.n_persons == 40
    assert panel.alternatives == ("ferry_a", "ferry_b", "none")
    assert panel.attributes == ("fare", "crossing_time", "departures_per_hour", "deck:covered", "deck:lounge",
                                "asc:ferry_a", "asc:ferry_b")
    assert panel.X.shape == (40, 12, 3, 7)
    assert 8 <= panel.tasks_per_person.min() and panel.tasks_per_person.max() <= 12
    truth = sim.truth
    assert list(truth["person_taste"].columns) == list(panel.attributes)
    assert truth["person_taste"].shape == (40, 7)
    # the deck's tastes are fixed in the demo: only fare, time and frequency vary across people
    assert list(truth["taste_sd"].index) == ["fare", "crossing_time", "departures_per_hour"]
    assert truth["taste_corr"].shape == (3, 3)
    assert (truth["person_taste"]["deck:lounge"] == truth["taste_mean"]["deck:lounge"]).all()
    assert truth["tastes"]["fare"] == "lognormal" and truth["tastes"]["asc:ferry_a"] == "fixed"
    # lognormal negative fare: every person's coefficient is negative
    assert (truth["person_taste"]["fare"] < 0).all()
    # the opt-out's attributes are missing, never zero-filled by the simulator
    assert sim.data.loc[sim.data["option"] == "none", "fare"].isna().all()


def test_person_tastes_are_one_row_per_person() -> None:
    sim = benchmark_scenario(n_persons=30, n_tasks=4, n_attributes=2, seed=5)
    tastes = sim.truth["person_taste"]
    assert tastes.index.is_unique and tastes.index.tolist() == sorted(sim.data["respondent"].unique())
    # normal tastes with sd > 0 differ across persons
    assert (tastes.std() > 0).all()


def test_tastes_are_constant_within_person() -> None:
    # A wide taste spread makes each choice nearly deterministic given the person's coefficient. If the
    # taste were redrawn per task, a person's choices would point both ways; kept within person, every
    # person consistently picks the alternative their own coefficient favours.
    sim = simulate_panel([SimAttribute("x", levels=[0.0, 10.0], taste="normal", mean=0.0, sd=3.0)],
                         n_persons=200, n_tasks=8, alternatives=("a", "b"), seed=2)
    beta = sim.truth["person_taste"]["x"]
    d = sim.data
    wide = d.pivot_table(index=["respondent", "task"], columns="option", values=["x", "chosen"])
    diff = (wide["x"]["b"] - wide["x"]["a"]).to_numpy()
    chose_b = wide["chosen"]["b"].to_numpy() == 1
    persons = wide.index.get_level_values("respondent").to_numpy()
    informative = diff != 0
    favours_b = np.sign(beta.loc[persons].to_numpy() * diff) > 0
    strong = np.abs(beta.loc[persons].to_numpy()) > 1.0
    use = informative & strong
    assert use.sum() > 300
    agree = (chose_b == favours_b)[use].mean()
    assert agree > 0.99


def test_unbalanced_task_counts() -> None:
    sim = benchmark_scenario(n_persons=200, n_tasks=5, n_attributes=1, seed=1)
    assert (sim.data.groupby("respondent")["task"].nunique() == 5).all()
    sim = simulate_panel([SimAttribute("x", levels=[-1.0, 0.0, 1.0], mean=0.5, sd=0.2)], n_persons=200,
                         n_tasks=(3, 7), seed=4)
    per_person = sim.data.groupby("respondent")["task"].nunique()
    assert per_person.min() == 3 and per_person.max() == 7  # both ends reached with 200 persons
    panel = ChoicePanel.from_frame(sim.data, sim.spec)
    np.testing.assert_array_equal(panel.tasks_per_person, per_person.to_numpy())
    assert panel.summary.tasks_per_person[0] == 3 and panel.summary.tasks_per_person[2] == 7


def test_unavailable_rate_keeps_two_available() -> None:
    sim = simulate_panel([SimAttribute("x", levels=[-1.0, 0.0, 1.0], mean=0.5, sd=0.2)], n_persons=150,
                         n_tasks=6, alternatives=("a", "b", "c", "d"), unavailable_rate=0.5, seed=9)
    d = sim.data
    assert set(d["available"].unique()) == {0, 1}
    per_task = d.groupby(["respondent", "task"])["available"].sum()
    assert per_task.min() >= 2
    assert (d.loc[d["chosen"] == 1, "available"] == 1).all()
    # each of the four alternatives is dropped at rate 0.5 except that two are always kept
    share_unavailable = 1 - d["available"].mean()
    assert 0.15 < share_unavailable < 0.45
    panel = ChoicePanel.from_frame(d, sim.spec)
    assert sim.spec["columns"]["available"] == "available"
    assert (panel.available.sum(axis=2)[panel.task_mask] >= 2).all()


def test_covariates_state_dependence_and_constants_in_the_truth() -> None:
    sim = simulate_panel([SimAttribute("x", levels=[0.0, 1.0, 2.0], taste="fixed", mean=-0.5),
                          SimAttribute("deck", levels=["open", "lounge"], taste="normal", mean=0.4, sd=0.2,
                                       categorical=True)],
                         n_persons=60, n_tasks=4, alternatives=("a", "b", "c"), constants={"a": 0.7},
                         covariates={"age": {"x": 0.3}}, state_dependence=0.8, seed=6)
    assert sim.spec["constants"] == {"reference": "b"}
    assert sim.spec["dynamics"] == {"lagged_choice": True, "first_task": "drop"}
    assert sim.truth["state_dependence"] == 0.8
    assert sim.truth["taste_mean"]["asc:a"] == 0.7 and sim.truth["taste_mean"]["asc:c"] == 0.0
    assert sim.truth["covariate_effect"].loc["age", "x"] == 0.3
    # the age covariate is constant within person and shifts the fixed x taste person by person
    assert (sim.data.groupby("respondent")["age"].nunique() == 1).all()
    age = sim.data.groupby("respondent")["age"].first()
    np.testing.assert_allclose(sim.truth["person_taste"]["x"], -0.5 + 0.3 * age.to_numpy())
    panel = ChoicePanel.from_frame(sim.data, sim.spec)
    assert "lagged_choice" in panel.attributes and panel.covariates == ("age",)
    assert panel.n_tasks == 60 * 3  # the first task of each person is dropped


def test_constants_for_every_alternative_is_a_spec_error() -> None:
    with pytest.raises(SpecError, match="leave one"):
        simulate_panel([SimAttribute("x", levels=[0.0, 1.0])], n_persons=3, alternatives=("a", "b"),
                       constants={"a": 1.0, "b": 2.0})


def test_wrong_number_of_level_means_is_a_spec_error() -> None:
    with pytest.raises(SpecError, match="deck.mean: expected 2 values"):
        simulate_panel([SimAttribute("deck", levels=["a", "b", "c"], mean=[0.1], categorical=True)], n_persons=3)
    with pytest.raises(SpecError, match="unknown attribute 'y'"):
        simulate_panel([SimAttribute("x", levels=[0.0, 1.0])], n_persons=3, covariates={"z": {"y": 1.0}})


def test_same_seed_same_panel() -> None:
    a = ferry_scenario(n_persons=20, seed=11)
    b = ferry_scenario(n_persons=20, seed=11)
    c = ferry_scenario(n_persons=20, seed=12)
    pd.testing.assert_frame_equal(a.data, b.data)
    assert not a.data.equals(c.data)


def test_draw_choices_never_picks_unavailable() -> None:
    rng = np.random.default_rng(0)
    utility = np.zeros((5000, 3))
    utility[:, 2] = 50.0  # the best alternative is never available
    available = np.ones((5000, 3), dtype=bool)
    available[:, 2] = False
    picks = draw_choices(utility, available, rng)
    assert set(np.unique(picks)) == {0, 1}


def test_shares_match_the_closed_form_logit() -> None:
    """With fixed tastes, P(j) = exp(V_j) / sum_k exp(V_k) over the available alternatives (McFadden 1974,
    "Conditional logit analysis of qualitative choice behavior"). The share of each alternative over all
    tasks must match the mean of these probabilities within sampling error."""
    sim = simulate_panel(
        [SimAttribute("price", levels=[1.0, 2.0, 3.0, 4.0], taste="fixed", mean=-0.6),
         SimAttribute("quality", levels=[0.0, 1.0, 2.0], taste="fixed", mean=0.8)],
        n_persons=2000, n_tasks=10, alternatives=("a", "b", "c"), constants={"a": 0.5, "c": -0.4},
        unavailable_rate=0.2, seed=21,
    )
    panel = ChoicePanel.from_frame(sim.data, sim.spec)
    beta = sim.truth["taste_mean"][list(panel.attributes)].to_numpy()
    assert (sim.truth["person_taste"].nunique() == 1).all()  # fixed tastes: the same for everyone
    v = np.einsum("ptjk,k->ptj", panel.X, beta)
    v = np.where(panel.available, v, -np.inf)
    prob = np.exp(v - v.max(axis=2, keepdims=True))
    prob /= prob.sum(axis=2, keepdims=True)
    mask = panel.task_mask
    n = int(mask.sum())
    expected = prob[mask].mean(axis=0)
    observed = np.bincount(panel.chosen[mask], minlength=3) / n
    se = np.sqrt(expected * (1 - expected) / n)
    assert np.all(np.abs(observed - expected) < 4.5 * se), (observed, expected, se)
    # and the shares depend on the design: the constant of a (0.5) beats that of c (-0.4)
    assert observed[0] > observed[2]
