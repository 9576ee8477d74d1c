"""Parameter recovery on invented panels (slow: real NUTS fits of a few hundred persons)."""

import numpy as np
import pytest

import hierchoice as hc

pytestmark = pytest.mark.slow


def _coverage(result, truth, prob=0.9):
    """(covered, total) of 90 % equal-tailed intervals of taste_mean / taste_sd / taste_corr over the truth."""
    post = result.posterior
    lo, hi = (1 - prob) / 2, 1 - (1 - prob) / 2
    hits, total, missed = 0, 0, []
    checks = [("taste_mean", "attribute", truth["taste_mean"]), ("taste_sd", "random_attribute", truth["taste_sd"])]
    for var, dim, values in checks:
        for name, true in values.items():
            s = post[var].sel({dim: name}).values.ravel()
            ok = np.quantile(s, lo) <= true <= np.quantile(s, hi)
            hits += ok
            total += 1
            if not ok:
                missed.append((var, name, true, np.quantile(s, [lo, hi])))
    if "taste_corr" in post:
        names = list(truth["taste_corr"].index)
        for i in range(len(names)):
            for j in range(i + 1, len(names)):
                s = post["taste_corr"].sel(random_attribute=names[i], random_attribute_bis=names[j]).values.ravel()
                true = truth["taste_corr"].iloc[i, j]
                ok = np.quantile(s, lo) <= true <= np.quantile(s, hi)
                hits += ok
                total += 1
                if not ok:
                    missed.append(("taste_corr", (names[i], names[j]), true, np.quantile(s, [lo, hi])))
    return hits, total, missed


def _person_correlation(result, truth):
    est = result.posterior["person_taste"].mean(("chain", "draw")).to_pandas()
    true = truth["person_taste"].loc[est.index, est.columns]
    return {c: np.corrcoef(est[c], true[c])[0, 1] for c in truth["taste_sd"].index}


@pytest.mark.parametrize("case", ["normal", "lognormal", "correlated"])
def test_recovery(case):
    if case == "normal":
        sim = hc.benchmark_scenario(300, 10, 3, 3, seed=21)
    elif case == "lognormal":
        sim = hc.simulate_panel(
            [hc.SimAttribute("price", levels=[1.0, 2.0, 3.0, 4.0], taste="lognormal", mean=-0.3, sd=0.5,
                             sign="negative"),
             hc.SimAttribute("quality", levels=[0.0, 1.0, 2.0], taste="normal", mean=0.8, sd=0.6)],
            n_persons=300, n_tasks=12, alternatives=("a", "b", "c"), seed=22,
        )
    else:
        sim = hc.simulate_panel(
            [hc.SimAttribute(f"x{k}", levels=[-1.0, -0.5, 0.0, 0.5, 1.0], taste="normal", mean=m, sd=s)
             for k, (m, s) in enumerate([(1.0, 1.0), (-0.8, 0.8), (0.5, 0.7)])],
            n_persons=400, n_tasks=12, alternatives=("a", "b", "c"), correlation=0.6, seed=23,
        )
    panel = hc.ChoicePanel.from_frame(sim.data, sim.spec)
    result = hc.fit(panel, draws=500, tune=500, chains=2, seed=3, progressbar=False)
    hits, total, missed = _coverage(result, sim.truth)
    # 90 % intervals: with a handful of parameters at most one miss is expected by chance
    assert total - hits <= 1, missed
    for name, r in _person_correlation(result, sim.truth).items():
        # each person answers ~10 tasks, so person tastes are shrunk but must track the truth
        assert r > 0.5, (name, r)


def test_stochastic_advi_population_means_near_nuts_on_b1():
    # The speed issue asks the approximate path for population means within 2 NUTS posterior SDs of NUTS on the
    # B1 panel (1000 persons, 10 tasks, 3 alternatives, 4 normal tastes). ADVI runs on the centred model by default
    # (model.parameterization = "auto"): mean-field ADVI on the non-centred model shrank the taste SDs and means
    # (0.8-2.2 SDs off), on the centred one the means landed within 1.72 SDs in nine runs (three seeds x whole
    # panel, batches of 500 and of 200 persons; docs/performance.md). Reference: NUTS on the same model.
    # Held to it here: the posterior means of the taste means and of the taste SDs. Not held: the widths of the
    # intervals, which mean-field ADVI makes too narrow (Blei, Kucukelbir & McAuliffe 2017, JASA 112, section 5).
    sim = hc.benchmark_scenario(1000, 10, 3, 4, seed=1)
    panel = hc.ChoicePanel.from_frame(sim.data, sim.spec)
    spec = hc.Spec.from_dict(panel.spec.to_dict() | {"sampling": {"store_person_draws": False}})
    nuts = hc.fit(panel, spec, draws=500, tune=500, chains=2, seed=3, progressbar=False)
    approx = hc.fit(panel, spec, draws=500, seed=2, method="advi", person_batch=200, advi_iterations=30_000,
                    progressbar=False)
    assert approx.info["person_batch"] == 200 and approx.approximate
    assert approx.spec.model.parameterization == "centred"
    n, a = (t.set_index(["quantity", "attribute"]) for t in (nuts.population(), approx.population()))
    rows = [r for r in n.index if r[0] in ("population_mean", "population_sd")]
    z = ((a.loc[rows, "mean"] - n.loc[rows, "mean"]) / n.loc[rows, "sd"]).abs()
    print("ADVI vs NUTS, |difference| in NUTS posterior SDs:", z.round(2).to_dict())
    assert (z < 2).all(), z
