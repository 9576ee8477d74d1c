"""Fitting, the results archive, and the fit command (small invented panels, few draws)."""

import os

import numpy as np
import pytest

import hierchoice as hc
from hierchoice._io import MARKER
from hierchoice.cli import main
from hierchoice.inference.results import load_fit, save_fit


@pytest.fixture(scope="module")
def small():
    sim = hc.ferry_scenario(40, n_tasks=6, seed=4, correlated=False)
    panel = hc.ChoicePanel.from_frame(sim.data, sim.spec)
    result = hc.fit(panel, draws=60, tune=60, chains=2, seed=5, progressbar=False)
    return sim, panel, result


def test_result_has_the_promised_groups_and_names(small):
    _, panel, result = small
    post = result.posterior
    assert set(result.idata.groups()) >= {"posterior", "sample_stats", "observed_data", "constant_data",
                                          "log_likelihood"}
    assert list(post["taste_mean"]["attribute"].values) == list(panel.attributes)
    assert post["person_taste"].dims == ("chain", "draw", "person", "attribute")
    assert post.sizes["chain"] == 2 and post.sizes["draw"] == 60
    # internal standardised variables are not reported
    assert not any(name.endswith("_std") for name in post.data_vars)
    # the log-likelihood has one entry per real task
    assert result.idata.log_likelihood["chosen"].sizes["obs"] == panel.n_tasks
    fare = panel.attributes.index("fare")
    assert np.all(post["person_taste"].values[..., fare] < 0)


def test_log_likelihood_matches_person_tastes(small):
    _, panel, result = small
    ll = result.idata.log_likelihood["chosen"].isel(chain=0, draw=3).values
    beta = result.posterior["person_taste"].isel(chain=0, draw=3).values
    from hierchoice.model.likelihood import choice_probabilities

    p = choice_probabilities(panel.X, panel.available, beta)
    pp, tt = np.nonzero(panel.task_mask)
    np.testing.assert_allclose(ll, np.log(p[pp, tt, panel.chosen[pp, tt]]), rtol=1e-10)


def test_archive_round_trip(small, tmp_path):
    _, panel, result = small
    out = save_fit(result, tmp_path / "fit")
    assert sorted(os.listdir(out)) == sorted([MARKER, "fit.log", "posterior.nc", "spec.toml"])
    again = load_fit(out)
    # the folder stores person tastes as float32: rounding to nearest, relative error at most 2^-24 (IEEE 754)
    assert again.posterior["person_taste"].dtype == np.float32
    np.testing.assert_allclose(again.posterior["person_taste"].values, result.posterior["person_taste"].values,
                               rtol=2.0**-24, atol=0)
    np.testing.assert_array_equal(again.panel.X, panel.X)
    np.testing.assert_array_equal(again.panel.chosen, panel.chosen)
    assert again.panel.persons == panel.persons
    assert again.panel.attributes == panel.attributes
    assert again.spec == result.spec
    assert again.population().equals(result.population())


def test_interrupted_write_keeps_the_earlier_folder(small, tmp_path, monkeypatch):
    _, _, result = small
    out = save_fit(result, tmp_path / "fit")
    before = (out / "fit.log").read_text()
    import hierchoice.inference.results as archive

    def boom(*args, **kwargs):
        raise RuntimeError("disk full")

    monkeypatch.setattr(archive, "_fit_log", boom)
    with pytest.raises(RuntimeError):
        save_fit(result, out)
    assert (out / "fit.log").read_text() == before
    assert [p.name for p in tmp_path.iterdir()] == ["fit"]  # no half-written sibling left behind


def test_load_fit_on_a_foreign_folder(tmp_path):
    with pytest.raises(hc.ArchiveError, match="posterior.nc"):
        load_fit(tmp_path)


def test_same_seed_same_posterior(small):
    _, panel, result = small
    again = hc.fit(panel, draws=60, tune=60, chains=2, seed=5, progressbar=False)
    np.testing.assert_array_equal(again.posterior["taste_mean"].values, result.posterior["taste_mean"].values)


def test_without_person_draws(small):
    _, panel, _ = small
    spec = hc.Spec.from_dict(panel.spec.to_dict() | {"sampling": {"store_person_draws": False}})
    result = hc.fit(panel, spec, draws=30, tune=30, chains=1, seed=1, progressbar=False)
    assert "person_taste" not in result.posterior and "log_likelihood" not in result.idata.groups()
    assert "taste_mean" in result.posterior


def test_nutpie_trace_holds_only_the_requested_variables(small):
    # nutpie would store every free variable with each draw (the person deviations included), so memory
    # grew with persons x draws even without person draws; the trimmed compile stores what is asked for
    from hierchoice.inference.nutpie_compile import compile_nutpie

    _, panel, _ = small
    model = hc.build_model(panel)
    compiled = compile_nutpie(model, ["taste_mean", "taste_sd"])
    assert set(compiled.shapes) == {"taste_mean", "taste_sd"}
    assert compiled.n_expanded == sum(int(np.prod(shape)) for shape in compiled.shapes.values())
    import nutpie

    trace = nutpie.sample(compiled, draws=20, tune=20, chains=1, seed=1, progress_bar=False)
    assert set(trace.posterior.data_vars) == {"taste_mean", "taste_sd"}
    assert trace.posterior["taste_sd"].shape[-1] == len(model.coords["random_attribute"])


def test_nutpie_draws_go_through_a_temporary_store_that_is_removed(small, tmp_path, monkeypatch):
    # nutpie keeps every draw's unconstrained point and gradient; hierchoice has it write them to a zarr
    # store in a temporary folder (memory then stays flat as draws grow) and reads back only what it reports
    import tempfile

    _, panel, _ = small
    monkeypatch.setattr(tempfile, "tempdir", str(tmp_path))
    result = hc.fit(panel, draws=30, tune=30, chains=2, seed=4, backend="nutpie", progressbar=False)
    assert not list(tmp_path.glob("hierchoice-draws-*")), "the temporary store should be removed"
    stats = result.idata.sample_stats
    assert {"diverging", "n_steps", "energy"} <= set(stats.data_vars)
    assert all(set(da.dims) <= {"chain", "draw"} for da in stats.data_vars.values())
    assert result.posterior.sizes["draw"] == 30
    assert not [g for g in result.idata.groups() if g.startswith("warmup")]  # the tuning phase is not read back


def test_fit_command_writes_a_results_folder(tmp_path, capsys):
    from hierchoice.demo import write_demo_data

    data, spec = write_demo_data(tmp_path, persons=25, seed=3)
    code = main(["fit", str(data), "--spec", str(spec), "--out", str(tmp_path / "res"), "--draws", "30",
                 "--tune", "30", "--chains", "1", "--quiet"])
    assert code == 0
    assert (tmp_path / "res" / "posterior.nc").exists()
    out = capsys.readouterr().out
    assert "population_mean" in out and "fare" in out and "hdi_low" in out  # the population table is printed


def test_fit_command_bad_backend_option_is_a_clean_error(tmp_path, capsys):
    from hierchoice.demo import write_demo_data

    data, spec = write_demo_data(tmp_path, persons=10, seed=3)
    import re

    text = re.sub(r"(?m)^draws = \d+$", "draws = -1", spec.read_text())
    assert "draws = -1" in text
    spec.write_text(text)
    code = main(["fit", str(data), "--spec", str(spec), "--out", str(tmp_path / "res")])
    assert code == 2
    assert "sampling.draws" in capsys.readouterr().err


def test_approximate_path_is_flagged_and_close_to_nuts():
    sim = hc.benchmark_scenario(150, 8, 3, 2, seed=8)
    panel = hc.ChoicePanel.from_frame(sim.data, sim.spec)
    nuts = hc.fit(panel, draws=200, tune=200, chains=2, seed=2, progressbar=False)
    approx = hc.fit(panel, draws=200, seed=2, method="advi", progressbar=False)
    assert approx.approximate and not nuts.approximate
    assert approx.info["method"].startswith("ADVI")
    # "auto" parameterisation: centred for ADVI, non-centred for NUTS, and the saved spec says which
    assert approx.spec.model.parameterization == "centred" and nuts.spec.model.parameterization == "noncentred"
    assert set(approx.posterior.data_vars) == set(nuts.posterior.data_vars)
    assert "approximate" in repr(approx)
    # population means of normal tastes within 2 posterior SDs of NUTS (the target for the approximate path;
    # mean-field ADVI is known to understate SDs, so only the means are held to it)
    a, n = (t.set_index(["quantity", "attribute"]) for t in (approx.population(), nuts.population()))
    rows = [r for r in n.index if r[0] == "population_mean"]
    z = ((a.loc[rows, "mean"] - n.loc[rows, "mean"]) / n.loc[rows, "sd"]).abs()
    assert (z < 2).all(), z


def test_person_batches_for_advi_only_and_checked():
    sim = hc.benchmark_scenario(60, 4, 3, 2, seed=8)
    panel = hc.ChoicePanel.from_frame(sim.data, sim.spec)
    with pytest.raises(hc.SpecError, match="method='advi' only"):
        hc.fit(panel, person_batch=10)
    for bad in (0, -3, 2.5, "many", True):
        with pytest.raises(hc.SpecError, match="person_batch"):
            hc.fit(panel, method="advi", person_batch=bad)
    approx = hc.fit(panel, draws=50, seed=1, method="advi", person_batch=20, advi_iterations=300, progressbar=False)
    assert approx.info["person_batch"] == 20 and approx.approximate
    # "auto" keeps small panels whole
    assert hc.fit(panel, draws=20, seed=1, method="advi", advi_iterations=50,
                  progressbar=False).info["person_batch"] is None


def test_a_spec_with_other_tastes_is_what_gets_fitted(small):
    _, panel, _ = small
    table = panel.spec.to_dict()
    table["attributes"]["crossing_time"] = {"taste": "fixed"}
    other = hc.Spec.from_dict(table)
    model = hc.build_model(panel, other)
    assert "crossing_time" not in list(model.coords["random_attribute"])
    # a spec that reads the data differently needs the table validated again
    table["attributes"]["deck"] = {"taste": "normal", "coding": "effects", "base": "open"}
    with pytest.raises(hc.SpecError, match="validate the table again"):
        hc.build_model(panel, hc.Spec.from_dict(table))


def test_numpyro_backend_runs_on_the_cpu():
    pytest.importorskip("jax", reason="the JAX backend is optional: pip install 'hierchoice[jax]'")
    sim = hc.benchmark_scenario(60, 5, 3, 2, seed=3)
    panel = hc.ChoicePanel.from_frame(sim.data, sim.spec)
    result = hc.fit(panel, draws=100, tune=100, chains=2, backend="numpyro", progressbar=False)
    assert result.info["backend"] == "numpyro"
    assert result.posterior["person_taste"].shape[:2] == (2, 100)
    assert np.isfinite(result.population()["mean"]).all()


def test_missing_backend_is_a_clean_error(monkeypatch):
    import importlib.util

    from hierchoice.inference.sampling import resolve_backend

    real = importlib.util.find_spec
    monkeypatch.setattr(importlib.util, "find_spec", lambda name, *a: None if name == "numpyro" else real(name, *a))
    with pytest.raises(hc.FitError, match="pip install"):
        resolve_backend("numpyro")
