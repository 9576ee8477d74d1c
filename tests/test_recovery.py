"""Parameter recovery on invented panels (slow: real NUTS fits of a few hundred persons)."""

import numpy as np
import pytest
from scipy import stats

import hierchoice as hc
from hierchoice.diagnostics.checks import parameter_diagnostics

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


def _shifted_truth(result, truth, k=3.0):
    """The truth moved k posterior SDs up, parameter by parameter: what a fit with a scale or location bug sees."""
    post = result.posterior
    out = dict(truth)
    out["taste_mean"] = truth["taste_mean"] + k * post["taste_mean"].std(("chain", "draw")).to_pandas()
    out["taste_sd"] = truth["taste_sd"] + k * post["taste_sd"].std(("chain", "draw")).to_pandas()
    if "taste_corr" in post:
        sd = post["taste_corr"].std(("chain", "draw")).to_pandas().to_numpy()
        out["taste_corr"] = truth["taste_corr"] + k * sd
    return out


def _allowed_misses(total, prob=0.9, alarm=0.01):
    """The most misses of ``total`` calibrated ``prob`` intervals with P(more) <= ``alarm`` (binomial quantile)."""
    return int(stats.binom.ppf(1 - alarm, total, 1 - prob))


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
    # 90 % intervals of a calibrated posterior: misses ~ Binomial(total, 0.1) (approximately: the intervals share
    # one posterior). Allowed: the 99 % binomial quantile, so the false-alarm rate is <= 1 % per case
    # (6 parameters: 3 misses allowed, P(more) = 0.13 %; 4: 2, 0.37 %; 9: 3, 0.83 %; scipy.stats.binom).
    allowed = _allowed_misses(total)
    assert total - hits <= allowed, missed
    # negative control: a truth 3 posterior SDs away from each estimate (a location or scale bug) is missed by
    # more intervals than allowed
    shifted_hits, _, _ = _coverage(result, _shifted_truth(result, sim.truth))
    assert total - shifted_hits > allowed
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
    # The line 2 is the requirement, not a chance bound; the chance part of z is the Monte Carlo error of the two
    # means: NUTS's MCSE = SD / sqrt(ESS) (ESS >= 100, the checks' fail line, asserted: <= 0.1 posterior SDs) and
    # ADVI's 500 independent draws (<= 0.045 SDs), together <= 0.11 SDs. With the largest z measured in nine runs
    # (1.72, see above) the chance of crossing 2 is P(N(0, 0.11^2) > 0.28) = 0.5 % (normal): the false-alarm rate.
    names = {"population_mean": "taste_mean", "population_sd": "taste_sd"}  # the posterior's variable names
    ess = parameter_diagnostics(nuts.idata).loc[[f"{names[q]}[{attr}]" for q, attr in rows], "ess_bulk"]
    assert (ess >= 100).all(), ess
    assert (z < 2).all(), z
