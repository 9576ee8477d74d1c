"""Predictive checks on the panel's real rows give what the padded (person, task, alternative) formulas give.

The panel is simulated with known tastes (simulation with known truth) and made heavy-tailed and unbalanced: each
person keeps a log-normal number of tasks (median about 7, a tail to 120), alternatives are unavailable at random and
there is an opt-out. The references are written here on the padded arrays: the logit probabilities are
``scipy.special.softmax`` of the utilities over each task's available alternatives (McFadden 1974), the hit is the
chosen alternative being the most probable, replicated choices are inverse-CDF draws, simulated choices the argmax of
utility plus Gumbel noise. Probabilities are compared to 1e-12 (floating-point rounding only).
"""

from __future__ import annotations

from typing import Any

import arviz as az
import numpy as np
import pytest
from scipy.special import logsumexp, softmax

from hierchoice import ChoicePanel, SimAttribute, simulate_panel
from hierchoice.analysis.shares import _design_range
from hierchoice.diagnostics.predictive import (
    hit_rate,
    posterior_choice_probabilities,
    ppc_shares,
    reliability,
    score_tasks,
    taste_draws,
)
from hierchoice.diagnostics.predictive_rows import Rows, replicate_choices, row_probabilities
from hierchoice.inference.results import ChoiceFit
from hierchoice.model.build import model_layout
from hierchoice.validation.sbc import simulate_choices

LEVELS = np.round(np.linspace(0.5, 3.5, 13), 3).tolist()  # above 0: the opt-out's zeros lie outside the range


@pytest.fixture(scope="module")
def ragged() -> dict[str, Any]:
    attrs = [SimAttribute("x", levels=LEVELS, mean=0.8, sd=0.6),
             SimAttribute("deck", levels=["open", "covered", "lounge"], mean=[0.5, 1.0], sd=[0.4, 0.4],
                          categorical=True)]
    sim = simulate_panel(attrs, n_persons=80, n_tasks=120, alternatives=("a", "b", "c", "d"), opt_out="none",
                         constants={"a": 1.0, "b": 0.3}, unavailable_rate=0.35, seed=21)
    rng = np.random.default_rng(22)
    keep = np.clip(np.ceil(np.exp(rng.normal(2.0, 1.0, size=80))), 1, 120).astype(int)
    persons = np.sort(sim.data["respondent"].unique())
    frame = sim.data[sim.data["task"].to_numpy() <= keep[np.searchsorted(persons, sim.data["respondent"])]]
    panel = ChoicePanel.from_frame(frame, sim.spec)
    truth = sim.truth["person_taste"].loc[list(panel.persons), list(panel.attributes)].to_numpy()
    tastes = truth + 0.3 * np.random.default_rng(23).standard_normal((2, 6) + truth.shape)
    return {"frame": frame, "spec": sim.spec, "tastes": tastes}


def _fit(panel: ChoicePanel, tastes: np.ndarray) -> ChoiceFit:
    idata = az.from_dict(posterior={"person_taste": tastes}, dims={"person_taste": ["person", "attribute"]},
                         coords={"person": list(panel.persons), "attribute": list(panel.attributes)})
    return ChoiceFit(idata=idata, panel=panel, spec=panel.spec, layout=model_layout(panel))


def _fresh(ragged: dict[str, Any]) -> ChoicePanel:
    return ChoicePanel.from_frame(ragged["frame"], ragged["spec"])


def _padded_probabilities(panel: ChoicePanel, beta: np.ndarray) -> np.ndarray:
    """Reference: softmax over each (person, task)'s available alternatives, shape (draw, P, T, J); NaN padded."""
    u = np.einsum("ptjk,spk->sptj", panel.X, beta)
    with np.errstate(invalid="ignore"):
        return softmax(np.where(panel.available, u, -np.inf), axis=-1)


def test_the_panel_is_heavy_tailed_with_varying_availability(ragged: dict[str, Any]) -> None:
    panel = _fresh(ragged)
    per_person = panel.tasks_per_person
    assert per_person.max() >= 5 * np.median(per_person)  # a long tail of tasks per person
    n_available = np.diff(panel.cells.row_ptr)
    assert len(set(n_available.tolist())) >= 3  # 2 to 5 alternatives available, task by task
    assert panel.X.size > 4 * panel.cells.x.size  # the padded grid is mostly padding


def test_probabilities_match_the_padded_softmax(ragged: dict[str, Any]) -> None:
    panel = _fresh(ragged)
    fit = _fit(panel, ragged["tastes"])
    prob = posterior_choice_probabilities(fit)
    dense = _fresh(ragged)
    ref = _padded_probabilities(dense, taste_draws(fit, dense)).mean(axis=0)
    assert prob.dims == ("person", "task", "alternative") and prob.shape == dense.available.shape
    assert list(prob["task"].values) == list(range(dense.task_mask.shape[1]))
    assert list(prob["alternative"].values) == list(dense.alternatives)
    np.testing.assert_allclose(prob.values[dense.task_mask], ref[dense.task_mask], rtol=0, atol=1e-12)
    assert np.isnan(prob.values[~dense.task_mask]).all()
    assert (prob.values[dense.task_mask & ~dense.available.all(axis=-1)].min(axis=-1) == 0).all()


def _reference_hits(dense: ChoicePanel, p: np.ndarray) -> np.ndarray:
    """Per real task: 1 / (number tied at the top) if the chosen alternative is among them, else 0."""
    q = np.where(dense.available, np.nan_to_num(p), -np.inf)
    top = q >= q.max(axis=-1, keepdims=True) - 1e-12
    hit = np.take_along_axis(top, np.clip(dense.chosen, 0, None)[..., None], axis=-1)[..., 0] / top.sum(axis=-1)
    return hit[dense.task_mask]


def test_hits_reliability_and_task_scores_match_the_padded_formulas(ragged: dict[str, Any]) -> None:
    panel = _fresh(ragged)
    fit = _fit(panel, ragged["tastes"])
    dense = _fresh(ragged)
    betas = taste_draws(fit, dense)
    draws_p = _padded_probabilities(dense, betas)
    p = draws_p.mean(axis=0)
    hits = _reference_hits(dense, p)
    assert hit_rate(fit)["hit_rate"] == pytest.approx(hits.mean(), abs=1e-12)

    cells = dense.available & dense.task_mask[:, :, None]
    pred = p[cells]
    y = (dense.chosen[:, :, None] == np.arange(len(dense.alternatives)))[cells]
    idx = np.minimum((pred * 10).astype(int), 9)
    table = reliability(fit, bins=10)
    for _, row in table.iterrows():
        sel = idx == int(round(row["bin_lower"] * 10))
        assert row["n"] == sel.sum()
        assert row["mean_predicted"] == pytest.approx(pred[sel].mean(), abs=1e-12)
        assert row["observed"] == pytest.approx(y[sel].mean(), abs=1e-12)
    assert table["n"].sum() == cells.sum()

    scored = score_tasks(fit, panel)
    chosen_p = np.take_along_axis(draws_p, np.clip(dense.chosen, 0, None)[None, :, :, None], axis=-1)[..., 0]
    lpd = logsumexp(np.log(chosen_p[:, dense.task_mask]), axis=0) - np.log(betas.shape[0])
    np.testing.assert_allclose(scored["lpd"], lpd, rtol=0, atol=1e-10)
    np.testing.assert_allclose(scored["hit"], hits, rtol=0, atol=1e-12)
    np.testing.assert_array_equal(scored["n_available"], dense.available.sum(axis=-1)[dense.task_mask])


def test_replicated_choices_and_shares_match_padded_inverse_cdf_draws(ragged: dict[str, Any]) -> None:
    panel = _fresh(ragged)
    rows = Rows.of(panel)
    betas = ragged["tastes"].reshape((-1,) + ragged["tastes"].shape[2:])
    p_rows = row_probabilities(panel, rows, betas)
    chosen_rows = replicate_choices(p_rows, rows, np.random.default_rng(5))
    got = panel.cells.alt[chosen_rows]  # (draw, task)

    dense = _fresh(ragged)
    p = _padded_probabilities(dense, betas)
    np.testing.assert_allclose(p_rows, p[:, dense.available & dense.task_mask[:, :, None]], rtol=0, atol=1e-12)
    p_task = np.nan_to_num(p[:, dense.task_mask])  # (draw, task, J), tasks in the cells' order
    cum = np.cumsum(p_task, axis=-1)
    u = np.random.default_rng(5).random(p_task.shape[:2] + (1,)) * cum[..., -1:]  # one uniform per (draw, task)
    want = np.minimum((cum < u).sum(axis=-1), p_task.shape[-1] - 1)
    assert dense.available[dense.task_mask][np.arange(want.shape[1]), want].all()
    np.testing.assert_array_equal(got, want)
    n_j = len(dense.alternatives)
    shares = np.stack([np.bincount(g, minlength=n_j) for g in got]) / got.shape[1]
    np.testing.assert_allclose(shares, np.stack([(want == j).mean(axis=1) for j in range(n_j)], axis=1),
                               rtol=0, atol=1e-12)


def test_ppc_shares_observed_exact_and_replicated_near_the_expected_share(ragged: dict[str, Any]) -> None:
    panel = _fresh(ragged)
    fit = _fit(panel, ragged["tastes"])
    table = ppc_shares(fit, draws=12, seed=3).set_index(["statistic", "level"])
    dense = _fresh(ragged)
    n = dense.task_mask.sum()
    p = np.nan_to_num(_padded_probabilities(dense, taste_draws(fit, dense, max_draws=12)))  # (S, P, T, J)
    for j, alt in enumerate(dense.alternatives):
        observed = ((dense.chosen == j) & dense.task_mask).sum() / n
        assert table.loc[("alternative", alt), "observed"] == pytest.approx(observed, abs=1e-12)
        # replicated share of draw s: a sum of independent Bernoulli(p) over tasks / n, mean and variance known;
        # 5 standard errors of the mean over the 12 draws: false alarm ~6e-7 per alternative (normal approx.)
        expected = p[..., j].sum(axis=(1, 2)) / n
        se = np.sqrt((p[..., j] * (1 - p[..., j])).sum(axis=(1, 2)).sum()) / n / p.shape[0]
        assert abs(table.loc[("alternative", alt), "replicated_mean"] - expected.mean()) < 5 * se + 1e-12


def test_simulated_choices_and_design_range_match_the_padded_arrays(ragged: dict[str, Any]) -> None:
    panel = _fresh(ragged)
    beta = ragged["tastes"][0, 0]
    sim = simulate_choices(panel, beta, np.random.default_rng(9))
    dense = _fresh(ragged)
    real = dense.available & dense.task_mask[:, :, None]
    noise = np.full(real.shape, -np.inf)  # the Gumbel draws, one per real row in the cells' order
    noise[real] = np.random.default_rng(9).gumbel(size=int(real.sum()))
    utility = np.einsum("ptjk,pk->ptj", dense.X, beta) + noise
    np.testing.assert_array_equal(sim.cells.chosen, np.argmax(utility, axis=-1)[dense.task_mask])
    assert sim.persons == dense.persons and (sim.cells.x is panel.cells.x)

    fit = _fit(panel, ragged["tastes"])
    use = real.copy()
    use[:, :, dense.alternatives.index("none")] = False
    for k in range(len(dense.attributes)):
        values = dense.X[..., k][use]
        assert _design_range(fit, k) == (values.min(), values.max())


def test_checks_build_no_padded_arrays(ragged: dict[str, Any]) -> None:
    panel = _fresh(ragged)
    fit = _fit(panel, ragged["tastes"])
    assert panel._dense is None
    hit_rate(fit)
    reliability(fit)
    ppc_shares(fit, draws=4)
    score_tasks(fit, panel)
    posterior_choice_probabilities(fit)
    simulate_choices(panel, ragged["tastes"][0, 0], np.random.default_rng(0))
    _design_range(fit, 0)
    assert panel._dense is None


def test_ties_share_the_hit_as_in_the_padded_formula(ragged: dict[str, Any]) -> None:
    # zero tastes: every available alternative ties, so each task scores 1 / (number available), i.e. chance
    panel = _fresh(ragged)
    fit = _fit(panel, np.zeros_like(ragged["tastes"][:, :2]))
    dense = _fresh(ragged)
    hits = _reference_hits(dense, _padded_probabilities(dense, taste_draws(fit, dense)).mean(axis=0))
    np.testing.assert_allclose(score_tasks(fit, panel)["hit"], hits, rtol=0, atol=1e-12)
    assert hit_rate(fit)["hit_rate"] == pytest.approx(panel.chance_rate, abs=1e-12)
