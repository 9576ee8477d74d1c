"""The compact results folder (format 2) and the InferenceData that ArviZ uses whole.

One small invented panel (simulation with known truth, ``hierchoice.simulate``), one short fit shared by every test.
"""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr

import hierchoice as hc
import hierchoice.inference.results as results
from hierchoice.diagnostics.loo import task_loo
from hierchoice.diagnostics.predictive import ppc_shares
from hierchoice.inference.results import FOLDER_FORMAT, POSTERIOR_FILE, load_fit, save_fit


@pytest.fixture(scope="module")
def small():
    sim = hc.ferry_scenario(40, n_tasks=6, seed=4, correlated=False)
    panel = hc.ChoicePanel.from_frame(sim.data, sim.spec)
    result = hc.fit(panel, draws=60, tune=60, chains=2, seed=5, progressbar=False, posterior_predictive=True)
    return sim, result


@pytest.fixture(scope="module")
def folder(small, tmp_path_factory):
    return save_fit(small[1], tmp_path_factory.mktemp("fit") / "fit")


def test_loo_ppc_and_tastes_from_the_folder_equal_the_in_memory_fits(small, folder):
    _, result = small
    again = load_fit(folder)
    assert again.posterior["person_taste"].dtype == np.float32
    assert "log_likelihood" not in again.idata.groups()  # rebuilt from the person tastes on demand
    mem, disk = task_loo(result), task_loo(again)
    # float32 person tastes: relative rounding 2^-24 (IEEE 754) moves each log-likelihood by ~1e-7 relative,
    # far inside the 1e-4 relative the folder promises
    assert abs(disk.elpd_loo / mem.elpd_loo - 1) < 1e-6
    np.testing.assert_allclose(disk.loo_i.values, mem.loo_i.values, rtol=1e-5, atol=1e-7)
    np.testing.assert_allclose(disk.pareto_k.values, mem.pareto_k.values, atol=1e-4)
    pd_mem, pd_disk = ppc_shares(result, seed=1), ppc_shares(again, seed=1)
    np.testing.assert_allclose(pd_disk[["observed", "replicated_mean", "eti_low", "eti_high"]].values,
                               pd_mem[["observed", "replicated_mean", "eti_low", "eti_high"]].values, atol=1e-12)
    t_mem, t_disk = hc.person_tastes(result), hc.person_tastes(again)
    cols = ["mean", "sd"]
    np.testing.assert_allclose(t_disk[cols].values, t_mem[cols].values, rtol=1e-6, atol=1e-6)
    assert again.population().equals(result.population())  # population parameters stay float64
    # the on-request posterior predictive travels with the folder, unchanged (int8 choices)
    xr.testing.assert_equal(again.idata.posterior_predictive["chosen"], result.idata.posterior_predictive["chosen"])


def test_the_folder_is_compact_on_disk(folder):
    # read back with h5py, the HDF5 library's own reader, not through xarray: person tastes are float32,
    # every array is gzip-compressed after the byte shuffle, in chunks of one chain and at most 100 draws
    import h5py

    with h5py.File(folder / POSTERIOR_FILE, "r") as f:
        taste = f["posterior/person_taste"]
        assert taste.dtype == np.float32
        assert taste.compression == "gzip" and taste.shuffle
        assert taste.chunks[0] == 1 and taste.chunks[1] <= 100
        assert f["posterior/taste_mean"].dtype == np.float64 and f["posterior/taste_mean"].compression == "gzip"
        assert f["constant_data/row_x"].compression == "gzip"
        assert f["posterior"].attrs["hierchoice_folder_format"] == FOLDER_FORMAT


def _write_format1(result, target):
    """A folder as hierchoice wrote it before format 2: float64, uncompressed, chosen over (person, task)."""
    import arviz as az

    from hierchoice._io import atomic_dir

    groups = {g: getattr(result.idata, g) for g in ("posterior", "sample_stats")}
    dense = result.panel.to_xarray()  # formats 1 and 2 kept the padded panel arrays
    groups["constant_data"] = dense.drop_vars(["chosen"])
    groups["observed_data"] = xr.Dataset({"chosen": dense["chosen"]})
    groups["posterior"] = groups["posterior"].copy()
    groups["posterior"].attrs = results._attrs_for(result)
    with atomic_dir(target, kind="results") as tmp:
        az.InferenceData(**groups).to_netcdf(str(tmp / POSTERIOR_FILE), engine="h5netcdf")
        (tmp / "spec.toml").write_text(result.spec.to_toml(), encoding="utf-8")
    return target


def test_an_older_folder_is_read(small, tmp_path):
    _, result = small
    old = load_fit(_write_format1(result, tmp_path / "old"))
    np.testing.assert_array_equal(old.panel.chosen, result.panel.chosen)
    np.testing.assert_array_equal(old.posterior["person_taste"].values, result.posterior["person_taste"].values)
    assert abs(task_loo(old).elpd_loo - task_loo(result).elpd_loo) < 1e-9


def test_a_newer_or_damaged_folder_is_refused_naming_the_file(small, tmp_path, monkeypatch):
    _, result = small
    monkeypatch.setattr(results, "FOLDER_FORMAT", FOLDER_FORMAT + 1)
    newer = save_fit(result, tmp_path / "newer")
    monkeypatch.undo()
    with pytest.raises(hc.ArchiveError, match=rf"newer.*{POSTERIOR_FILE}.*format {FOLDER_FORMAT + 1}"):
        load_fit(newer)
    damaged = save_fit(result, tmp_path / "damaged")
    (damaged / POSTERIOR_FILE).write_bytes(b"not a NetCDF file")
    with pytest.raises(hc.ArchiveError, match=rf"damaged.*{POSTERIOR_FILE}"):
        load_fit(damaged)


def test_observed_data_log_likelihood_and_replicates_share_the_users_ids(small):
    sim, result = small
    idata = result.idata
    obs, ll, rep = (idata.observed_data["chosen"], idata.log_likelihood["chosen"],
                    idata.posterior_predictive["chosen"])
    assert ll.dims == rep.dims == ("chain", "draw", "obs") and obs.dims == ("obs",)
    for coord in ("obs_person", "obs_task"):
        np.testing.assert_array_equal(ll[coord].values, obs[coord].values)
        np.testing.assert_array_equal(rep[coord].values, obs[coord].values)
    # the observed choice of each (person id, task id) read straight from the user's table
    frame = sim.data[sim.data["chosen"] == 1]
    truth = {(str(p), str(t)): a for p, t, a in zip(frame["respondent"], frame["task"], frame["option"])}
    labels = obs.attrs["alternatives"]
    got = {(p, t): labels[c] for p, t, c in zip(obs["obs_person"].values, obs["obs_task"].values, obs.values)}
    assert got == truth
    for group in ("posterior", "sample_stats", "log_likelihood", "posterior_predictive"):
        ds = getattr(idata, group)
        np.testing.assert_array_equal(ds["chain"].values, np.arange(2))
        np.testing.assert_array_equal(ds["draw"].values, np.arange(60))


def test_replicated_choices_follow_the_logit_probabilities(small):
    # each replicate is one draw from the logit probabilities of its draw's tastes (McFadden 1974), computed
    # here with scipy's softmax, not the package's own: the count of each alternative over all draws and
    # tasks is a sum of independent Bernoulli variables with mean sum(p) and variance sum(p(1-p));
    # |z| < 3.29 per alternative is a 0.1 % two-sided false alarm each (normal approximation), 0.3 % for three
    from scipy.special import softmax

    _, result = small
    panel = result.panel
    beta = result.posterior["person_taste"].transpose("chain", "draw", "person", "attribute").values
    util = np.einsum("ptjk,cdpk->cdptj", panel.X, beta)
    util = np.where(panel.available, util, -np.inf)
    prob = softmax(util, axis=-1)
    pp, tt = np.nonzero(panel.task_mask)
    prob = prob[:, :, pp, tt]  # (chain, draw, obs, alternative)
    rep = result.idata.posterior_predictive["chosen"].values
    for j in range(len(panel.alternatives)):
        expected = prob[..., j].sum()
        z = ((rep == j).sum() - expected) / np.sqrt((prob[..., j] * (1 - prob[..., j])).sum())
        assert abs(z) < 3.29, (panel.alternatives[j], z)


def test_arviz_runs_whole_on_the_fits_inference_data(small):
    import arviz as az
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    _, result = small
    idata = result.idata
    axes = az.plot_ppc(idata, var_names=["chosen"], num_pp_samples=20, random_seed=0)
    assert np.size(axes) >= 1
    plt.close("all")
    pit = az.loo_pit(idata, y="chosen")
    assert pit.shape == (result.panel.n_tasks,) and np.all((pit >= 0) & (pit <= 1))
    table = az.compare({"a": idata, "b": idata})
    # a model compared with itself: no difference (ArviZ's elpd_diff of identical log-likelihoods)
    assert set(table.index) == {"a", "b"} and np.allclose(table["elpd_diff"], 0)
    # the population summary stays short with the call docs/diagnostics.md gives
    summary = az.summary(idata, var_names=["^taste_", "^covariate_effect$"], filter_vars="regex")
    layout = result.layout
    assert len(summary) == len(layout.names) + len(layout.random_names)


def test_posterior_predictive_needs_person_draws(small):
    sim, _ = small
    spec = hc.Spec.from_dict(sim.spec | {"sampling": {"store_person_draws": False}})
    panel = hc.ChoicePanel.from_frame(sim.data, spec)
    with pytest.raises(hc.FitError, match="store_person_draws"):  # before any sampling
        hc.fit(panel, spec, draws=10, tune=10, chains=1, seed=1, progressbar=False, posterior_predictive=True)


def test_the_folder_keeps_the_panels_real_rows_not_a_padded_grid(small, folder):
    """Format 3 stores the panel as its real rows (available alternatives of real tasks) with CSR offsets: the
    reopened panel has the same rows and builds no padded array on the way back (memory linear in the data)."""
    import h5py

    _, result = small
    with h5py.File(folder / POSTERIOR_FILE, "r") as f:
        assert "constant_data/x" not in f and "constant_data/available" not in f  # no (person, task, alt) grid
        assert f["constant_data/row_x"].shape == result.panel.cells.x.shape
    loaded = load_fit(folder)
    assert loaded.panel._dense is None
    mine, theirs = result.panel.cells, loaded.panel.cells
    for name in ("x", "alt", "row_ptr", "person_ptr", "chosen", "position", "lag_missing"):
        np.testing.assert_array_equal(getattr(theirs, name), getattr(mine, name))
    assert [str(v) for v in theirs.task_id] == [str(v) for v in mine.task_id]
    # and the padded view built from them on demand equals the fitted panel's
    np.testing.assert_array_equal(loaded.panel.X, result.panel.X)
    np.testing.assert_array_equal(loaded.panel.chosen, result.panel.chosen)
