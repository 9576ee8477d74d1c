"""Many-fits workloads: simulation-based calibration, recovery, power analysis, and running them on dask.

The fits in the default run are tiny (15 persons x 4 tasks x 2 alternatives, one normal taste; NUTS with
100 tuning steps and 100 draws, one chain, PyMC's backend) and share one two-worker local cluster. The
full-size calibration runs are marked slow.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, replace
from pathlib import Path

import distributed  # the "distributed" extra: dask[distributed]
import numpy as np
import pytest
import xarray as xr
from scipy import stats

import hierchoice as hc
from hierchoice import validation as cal
from hierchoice._io import MARKER
from hierchoice.exceptions import FitError, SpecError
from hierchoice.validation.distributed import local_cluster, run_tasks, task_seed, task_seed_sequence
from hierchoice.validation.fitters import _STREAM_FIT
from hierchoice.validation.sbc import _thinned_ranks

#: Short chains: enough for this one-attribute model (median bulk ESS of 100 draws is about 50-100).
NUTS = cal.NutsFitter(draws=100, tune=100, chains=1, backend="pymc")
THIN_TO = 20  # L = 20 thinned draws: ranks 0..20
SMALL_FITS = 30  # the default-run calibration; the slow tests use 50, and 150 for the milder wrong prior
SEED = 11


def _design() -> hc.ChoicePanel:
    """The tiny design: 15 persons x 4 tasks x 2 alternatives, one normal taste (invented)."""
    sim = hc.simulate_panel(
        [hc.SimAttribute("x", levels=[-1.0, -0.5, 0.0, 0.5, 1.0], taste="normal", mean=0.5, sd=0.5)],
        n_persons=15, n_tasks=4, alternatives=("a", "b"), seed=1,
    )
    return hc.ChoicePanel.from_frame(sim.data, sim.spec)


# --------------------------------------------------------------------------- fitters injected by the tests
# They live at module level so that worker processes can unpickle them.


@dataclass(frozen=True)
class WrongPrior:
    """Samples a model whose prior scales are ``scale`` times the true ones (the truths use the true prior)."""

    inner: cal.NutsFitter
    scale: float

    def __call__(self, panel, spec, seed):
        return self.inner(panel, replace(spec, model=replace(spec.model, prior_scale=self.scale)), seed)


@dataclass(frozen=True)
class PriorDraws:
    """Returns draws from the prior, ignoring the data: calibrated in the sense of SBC when ``scale`` is 1.

    Ranks cannot tell such a fitter from a good one (Talts et al. 2018 make the point; from memory); here it
    is a cheap stand-in for NUTS that tests the machinery with many fits.
    """

    draws: int = 100
    scale: float = 1.0

    def __call__(self, panel, spec, seed):
        import logging
        import warnings

        import pymc as pm

        spec = replace(spec, model=replace(spec.model, prior_scale=self.scale))
        logging.getLogger("pymc").setLevel(logging.WARNING)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            prior = pm.sample_prior_predictive(model=hc.build_model(panel, spec), draws=self.draws,
                                               random_seed=seed, var_names=["taste_mean", "taste_sd"]).prior
        return prior


@dataclass(frozen=True)
class Logged:
    """Appends each call's seed to ``log``; kills its own worker process on the call with ``kill_seed`` the first
    time (a marker file remembers), or raises on every call with ``fail_seed``."""

    inner: object
    log: str
    kill_seed: int | None = None
    fail_seed: int | None = None

    def __call__(self, panel, spec, seed):
        with open(self.log, "a") as fh:
            fh.write(f"{seed}\n")
        if seed == self.kill_seed:
            try:
                fd = os.open(self.log + ".killed", os.O_CREAT | os.O_EXCL | os.O_WRONLY)
            except FileExistsError:
                pass
            else:
                os.close(fd)
                os._exit(1)  # the worker process dies mid-task
        if seed == self.fail_seed:
            raise FitError(f"deliberate failure for seed {seed}")
        return self.inner(panel, spec, seed)


@dataclass(frozen=True)
class NormalPosterior:
    """A stand-in for a fit: a normal posterior around a noisy estimate (normal theory, invented numbers).

    With ``se = scale / sqrt(persons)``: estimate ~ N(truth + offset, se) and draws ~ N(estimate, se), so the
    central ``p`` interval is about estimate ± z_p se and (offset 0) covers the truth with probability p.
    """

    means: tuple[tuple[str, float], ...]
    sds: tuple[tuple[str, float], ...]
    scale: float
    offset: float = 0.0
    draws: int = 400

    def __call__(self, panel, spec, seed):
        rng = np.random.default_rng(seed)
        se = self.scale / np.sqrt(panel.n_persons)

        def draws(truth):
            centre = np.array(truth) + self.offset + rng.normal(0.0, se, size=len(truth))
            return centre + rng.normal(0.0, se, size=(1, self.draws, len(truth)))

        return xr.Dataset(
            {"taste_mean": (("chain", "draw", "attribute"), draws([v for _, v in self.means])),
             "taste_sd": (("chain", "draw", "random_attribute"), draws([v for _, v in self.sds]))},
            coords={"chain": [0], "draw": np.arange(self.draws), "attribute": [n for n, _ in self.means],
                    "random_attribute": [n for n, _ in self.sds]},
        )


# --------------------------------------------------------------------------- fixtures


@pytest.fixture(scope="module")
def client():
    with local_cluster(2) as cluster, distributed.Client(cluster, set_as_default=False) as c:
        yield c


@pytest.fixture(scope="module")
def design():
    return _design()


@pytest.fixture(scope="module")
def sbc_nuts(client, design):
    return cal.simulation_based_calibration(design, fits=SMALL_FITS, thin_to=THIN_TO, fitter=NUTS, seed=SEED,
                                            client=client, progress=False)


# --------------------------------------------------------------------------- pure kernels


def test_thinned_ranks_count_draws_below_and_break_ties_at_random():
    draws = np.arange(10, dtype=float)[:, None] / 10  # 0.0 .. 0.9; thinned to 5: 0, .2, .4, .6, .8 (by hand)
    rng = np.random.default_rng(0)
    assert _thinned_ranks(np.array([0.5]), draws, 5, rng)[0] == 3
    assert _thinned_ranks(np.array([-1.0]), draws, 5, rng)[0] == 0
    assert _thinned_ranks(np.array([9.0]), draws, 5, rng)[0] == 5
    tied = [int(_thinned_ranks(np.array([0.4]), draws, 5, rng)[0]) for _ in range(200)]
    assert set(tied) == {2, 3}  # 0.4 ties one kept draw: rank 2 or 3, each about half the time
    assert 60 < tied.count(2) < 140


def test_ecdf_band_holds_simultaneously_at_its_level():
    # Säilynoja, Bürkner & Vehtari (2022), Statistics and Computing 32:32: the band holds at every point at
    # once with probability prob; a pointwise band of the same level holds everywhere far less often.
    n, thin_to, prob = 40, 20, 0.9
    z, lower, upper = cal.ecdf_band(n, thin_to, prob=prob)
    assert np.all(lower <= z) and np.all(z <= upper)
    rng = np.random.default_rng(2)  # independent of the band's own simulation
    ranks = rng.integers(0, thin_to + 1, size=(3000, n))
    ecdf = np.cumsum(np.stack([np.bincount(r, minlength=thin_to + 1) for r in ranks]), axis=1)[:, :-1] / n
    inside = np.all((ecdf >= lower) & (ecdf <= upper), axis=1).mean()
    assert abs(inside - prob) < 0.03  # binomial SE of the share is about 0.005
    point_lo = stats.binom.ppf(0.05, n, z) / n
    point_hi = stats.binom.ppf(0.95, n, z) / n
    assert np.all((ecdf >= point_lo) & (ecdf <= point_hi), axis=1).mean() < 0.75


def test_rank_uniformity_chi_square_matches_the_formula_and_flags_a_frown():
    rng = np.random.default_rng(3)
    uniform = rng.integers(0, 21, size=200)
    frown = stats.betabinom.rvs(20, 4, 4, size=200, random_state=4)  # posteriors too wide: ranks pile up mid
    ranks = xr.DataArray(np.stack([uniform, frown], axis=1), dims=("fit", "parameter"),
                         coords={"parameter": ["u", "frown"]})
    res = cal.rank_uniformity(ranks, 20, alpha=0.01, bins=7)
    # Pearson's statistic by hand: 7 bins of 3 rank values, 200 * 3/21 expected in each
    observed = np.bincount(uniform, minlength=21).reshape(7, 3).sum(axis=1)
    expected = 200 * 3 / 21
    statistic = ((observed - expected) ** 2 / expected).sum()
    assert res["chi2_statistic"].sel(parameter="u") == pytest.approx(statistic)
    assert res["chi2_pvalue"].sel(parameter="u") == pytest.approx(stats.chi2.sf(statistic, 6))
    assert not bool(res["flagged"].sel(parameter="u"))
    assert bool(res["flagged"].sel(parameter="frown")) and bool(res["ecdf_outside"].sel(parameter="frown"))
    assert res.attrs["chi2_bins"] == 7 and res.attrs["fits_tested"] == 200


def test_failed_fits_are_left_out_of_the_uniformity_tests():
    ranks = xr.DataArray(np.array([[0], [20], [-1], [10]]), dims=("fit", "parameter"), coords={"parameter": ["a"]})
    assert cal.rank_uniformity(ranks, 20, bins=2).attrs["fits_tested"] == 3
    with pytest.raises(SpecError, match="thin_to"):
        cal.rank_uniformity(ranks + 5, 20)


def test_task_seeds_are_spawned_children_and_do_not_depend_on_the_number_of_tasks():
    # numpy's SeedSequence.spawn gives child i the spawn key (i,); our key is (0, task, stream)
    child = np.random.SeedSequence(7).spawn(1)[0].spawn(4)[3].spawn(3)[2]
    assert np.array_equal(child.generate_state(2), task_seed_sequence(7, 3, 2).generate_state(2))
    assert task_seed(7, 3) == task_seed(7, 3)
    assert len({task_seed(7, i, s) for i in range(50) for s in range(3)}) == 150
    assert task_seed(7, (100, 2)) != task_seed(7, (200, 2))
    with pytest.raises(SpecError, match="seed"):
        task_seed(-1, 0)


def test_simulate_choices_follows_the_logit_and_keeps_the_design(design):
    beta = np.full((design.n_persons, 1), 1.5)
    utility = np.einsum("ptjk,pk->ptj", design.X, beta)
    p_first = 1 / (1 + np.exp(utility[..., 1] - utility[..., 0]))  # two alternatives: the binary logit
    rng = np.random.default_rng(5)
    first = np.zeros(design.task_mask.shape)
    reps = 600
    for _ in range(reps):
        sim = cal.simulate_choices(design, beta, rng)
        assert np.array_equal(sim.X, design.X) and sim.persons == design.persons
        assert np.all(sim.chosen[~design.task_mask] == -1)
        first += sim.chosen == 0
    real = design.task_mask
    se = np.sqrt(p_first * (1 - p_first) / reps)[real]
    assert np.all(np.abs(first[real] / reps - p_first[real]) < 4.5 * se + 1e-9)
    with pytest.raises(SpecError, match="shape"):
        cal.simulate_choices(design, beta[:, :0], rng)


def test_a_lagged_choice_design_cannot_be_resimulated():
    sim = hc.simulate_panel([hc.SimAttribute("x", levels=[0.0, 1.0], mean=0.5, sd=0.3)], n_persons=6, n_tasks=3,
                            alternatives=("a", "b"), state_dependence=0.5, seed=2)
    panel = hc.ChoicePanel.from_frame(sim.data, sim.spec)
    with pytest.raises(SpecError, match="lagged_choice"):
        cal.simulation_based_calibration(panel, fits=4, fitter=NUTS, progress=False)


def test_bad_arguments_are_reported_by_name(design):
    with pytest.raises(SpecError, match="fits"):
        cal.simulation_based_calibration(design, fits=1, fitter=NUTS)
    with pytest.raises(SpecError, match="thin_to = 200"):
        cal.simulation_based_calibration(design, fits=2, thin_to=200, fitter=NUTS)
    with pytest.raises(SpecError, match="client"):
        cal.simulation_based_calibration(design, fits=2, fitter=NUTS, client=42, progress=False)
    with pytest.raises(SpecError, match="workers"):
        run_tasks(abs, [1], workers=0)
    attrs = [hc.SimAttribute("x", levels=[0.0, 1.0], mean=0.5, sd=0.3)]
    wtp_width, sd_detection = cal.WtpWidth("x", "fare"), cal.SdDetection("x", 0.1)
    with pytest.raises(SpecError, match="price"):
        cal.power_analysis(attrs, wtp_width, persons=(10,), simulation={"n_tasks": 2})
    with pytest.raises(SpecError, match="n_persons"):
        cal.power_analysis(attrs, sd_detection, simulation={"n_persons": 5})


# --------------------------------------------------------------------------- calibration with NUTS


def test_calibration_of_the_correct_model_is_not_flagged(sbc_nuts):
    ranks = sbc_nuts["rank"].values
    assert sbc_nuts.sizes == {"fit": SMALL_FITS, "parameter": 2, "ecdf_point": THIN_TO}
    assert list(sbc_nuts["parameter"].values) == ["taste_mean[x]", "taste_sd[x]"]
    assert not sbc_nuts["failed"].any()
    assert ranks.min() >= 0 and ranks.max() <= THIN_TO
    assert len(np.unique(sbc_nuts["prior_draw"].sel(parameter="taste_sd[x]"))) == SMALL_FITS  # a new truth each fit
    assert (sbc_nuts["prior_draw"].sel(parameter="taste_sd[x]") > 0).all()
    assert not sbc_nuts["flagged"].any(), cal.format_calibration(sbc_nuts)


def test_calibration_flags_a_fitter_with_the_wrong_prior(client, design):
    # the fitter's prior scales are a third of the ones the truths are drawn from: its posteriors are pulled
    # towards 0, so large truths rank above every draw and taste_sd ranks pile up at the top (a posterior
    # biased one way piles the ranks at one end: Talts et al. 2018, from memory)
    res = cal.simulation_based_calibration(design, fits=SMALL_FITS, thin_to=THIN_TO,
                                           fitter=WrongPrior(NUTS, 1 / 3), seed=SEED, client=client,
                                           progress=False)
    assert res["flagged"].all(), cal.format_calibration(res)
    assert float(res["rank"].sel(parameter="taste_sd[x]").mean()) > THIN_TO / 2


def test_same_results_on_one_and_two_workers(sbc_nuts, design):
    # the first fits of a run depend only on (seed, fit index): 4 fits on one worker repeat the first 4 of
    # the 30 run on two workers
    with local_cluster(1) as cluster, distributed.Client(cluster, set_as_default=False) as one:
        res = cal.simulation_based_calibration(design, fits=4, thin_to=THIN_TO, fitter=NUTS, seed=SEED,
                                               client=one, progress=False)
    ref = sbc_nuts.isel(fit=slice(0, 4))
    np.testing.assert_array_equal(res["rank"].values, ref["rank"].values)
    np.testing.assert_array_equal(res["seed"].values, ref["seed"].values)
    np.testing.assert_allclose(res["posterior_mean"].values, ref["posterior_mean"].values, rtol=1e-12)
    np.testing.assert_allclose(res["prior_draw"].values, ref["prior_draw"].values, rtol=1e-12)


def test_a_killed_worker_loses_no_finished_fit(client, sbc_nuts, design, tmp_path):
    log = str(tmp_path / "calls.log")
    victim = int(sbc_nuts["seed"].values[3])
    fitter = Logged(NUTS, log, kill_seed=victim)
    res = cal.simulation_based_calibration(design, fits=4, thin_to=THIN_TO, fitter=fitter, seed=SEED,
                                           client=client, progress=False)
    assert Path(log + ".killed").exists()  # the worker did die
    calls = [int(s) for s in Path(log).read_text().split()]
    assert calls.count(victim) == 2  # the first attempt died with its worker; the rerun finished
    assert not res["failed"].any()
    ref = sbc_nuts.isel(fit=slice(0, 4))
    np.testing.assert_array_equal(res["rank"].values, ref["rank"].values)
    np.testing.assert_allclose(res["posterior_mean"].values, ref["posterior_mean"].values, rtol=1e-12)


def test_a_failing_fit_is_retried_then_reported_and_the_others_kept(client, design, tmp_path):
    log = str(tmp_path / "calls.log")
    seeds = [task_seed(SEED, i, _STREAM_FIT) for i in range(6)]
    fitter = Logged(PriorDraws(), log, fail_seed=seeds[2])
    res = cal.simulation_based_calibration(design, fits=6, thin_to=THIN_TO, fitter=fitter, seed=SEED,
                                           client=client, retries=1, progress=False)
    assert res["failed"].values.tolist() == [False, False, True, False, False, False]
    assert "deliberate failure" in str(res["error"].values[2])
    assert (res["rank"].values[2] == -1).all() and (res["rank"].values[[0, 1, 3, 4, 5]] >= 0).all()
    assert [int(s) for s in Path(log).read_text().split()].count(seeds[2]) == 2  # one retry
    assert res.attrs["failed_fits"] == 1 and res.attrs["fits_tested"] == 5


def test_prior_draws_pass_and_a_threefold_prior_is_flagged(client, design):
    # A cheap, exact check of the whole chain of prior draws, re-simulation and ranks with many fits:
    # draws from the prior itself are calibrated; draws from a prior 3 x as wide are not.
    good = cal.simulation_based_calibration(design, fits=30, thin_to=THIN_TO, fitter=PriorDraws(), seed=3,
                                            client=client, progress=False)
    wide = cal.simulation_based_calibration(design, fits=30, thin_to=THIN_TO, fitter=PriorDraws(scale=3.0),
                                            seed=3, client=client, progress=False)
    assert not good["flagged"].any(), cal.format_calibration(good)
    assert wide["flagged"].all(), cal.format_calibration(wide)


def test_results_save_as_netcdf_and_plot(sbc_nuts, tmp_path):
    path = cal.save_result(sbc_nuts, tmp_path / "calibration.nc")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["calibration.nc"]  # no temporary file left
    back = cal.load_result(path)
    np.testing.assert_array_equal(back["rank"].values, sbc_nuts["rank"].values)
    assert back["flagged"].dtype == bool and back.attrs["thin_to"] == THIN_TO
    from hierchoice.diagnostics.plots import save_figure

    for name, fig in (("ranks.png", cal.plot_rank_histograms(back)), ("ecdf.png", cal.plot_ecdf_difference(back))):
        out = save_figure(fig, tmp_path / name)
        assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    with pytest.raises(hc.ArchiveError, match="does not exist"):
        cal.load_result(tmp_path / "absent.nc")


def test_calibrate_command_writes_the_folder(tmp_path, capsys):
    sim = hc.simulate_panel([hc.SimAttribute("x", levels=[-1.0, 0.0, 1.0], mean=0.5, sd=0.5)], n_persons=10,
                            n_tasks=3, alternatives=("a", "b"), seed=4)
    data = tmp_path / "choices.csv"
    sim.data.to_csv(data, index=False)
    spec = dict(sim.spec) | {"sampling": {"draws": 40, "tune": 40, "chains": 1, "backend": "pymc"}}
    spec_path = tmp_path / "spec.toml"
    spec_path.write_text(hc.Spec.from_dict(spec).to_toml())
    from hierchoice.cli import main

    code = main(["calibrate", str(data), "--spec", str(spec_path), "--fits", "3", "--out", str(tmp_path / "out"),
                 "--workers", "1", "--seed", "5"])
    assert code == 0  # 3 fits cannot reject uniformity at alpha = 0.01
    assert sorted(p.name for p in (tmp_path / "out").iterdir()) == [
        MARKER, "calibration.nc", "ecdf_difference.png", "rank_histograms.png"]
    printed = capsys.readouterr().out
    assert "taste_mean[x]" in printed and "3 of 3 fits" in printed
    assert cal.load_result(tmp_path / "out" / "calibration.nc").sizes["fit"] == 3


# --------------------------------------------------------------------------- recovery and power

ATTRS = [hc.SimAttribute("x", levels=[-1.0, 0.0, 1.0], taste="normal", mean=1.0, sd=0.5),
         hc.SimAttribute("price", levels=[1.0, 2.0, 3.0], taste="fixed", mean=-2.0)]
SIMULATION = {"n_persons": 20, "n_tasks": 4, "alternatives": ("a", "b")}


def _stand_in(scale: float, offset: float = 0.0) -> NormalPosterior:
    return NormalPosterior(means=(("x", 1.0), ("price", -2.0)), sds=(("x", 0.5),), scale=scale, offset=offset)


def test_recovery_bookkeeping_against_normal_theory(client):
    # normal theory: estimate ~ N(truth, se) and interval = estimate ± z_p se, so the coverage is
    # P(|Z| < z_p) = p; shifted by 3 se, the bias is 3 se and the 90 % interval covers the truth with
    # probability P(|N(3, 1)| < z) = Phi(z - 3) - Phi(-z - 3)
    scale = 1.0
    se = scale / np.sqrt(SIMULATION["n_persons"])
    fair = cal.parameter_recovery(ATTRS, replications=60, simulation=SIMULATION, fitter=_stand_in(scale), seed=2,
                                  client=client, progress=False)
    assert list(fair["parameter"].values) == ["taste_mean[x]", "taste_mean[price]", "taste_sd[x]"]
    np.testing.assert_allclose(fair["truth"].values, [1.0, -2.0, 0.5])
    for p in (0.5, 0.9):
        cov = fair["coverage"].sel(prob=p).values
        assert np.all(np.abs(cov - p) < 4 * np.sqrt(p * (1 - p) / 60)), cov
    assert np.all(np.abs(fair["bias"].values) < 4 * fair["bias_se"].values)
    shifted = cal.parameter_recovery(ATTRS, replications=60, simulation=SIMULATION,
                                     fitter=_stand_in(scale, offset=3 * se), seed=2, client=client, progress=False)
    assert np.all(np.abs(shifted["bias"].values - 3 * se) < 4 * shifted["bias_se"].values)
    z = stats.norm.ppf(0.95)
    expected = stats.norm.cdf(z - 3) - stats.norm.cdf(-z - 3)  # about 0.088
    cov90 = shifted["coverage"].sel(prob=0.9).values
    assert np.all(np.abs(cov90 - expected) < 4 * np.sqrt(expected * (1 - expected) / 60) + 0.02), cov90


def test_recovery_with_nuts_labels_the_truth(client):
    res = cal.parameter_recovery(ATTRS, replications=2, simulation=SIMULATION, fitter=NUTS, seed=1,
                                 client=client, progress=False)
    assert not res["failed"].any()
    np.testing.assert_allclose(res["truth"].sel(parameter=["taste_mean[x]", "taste_mean[price]"]), [1.0, -2.0])
    assert np.isfinite(res["posterior_mean"].values).all()
    assert (res["lower"] <= res["upper"]).all()
    assert (res["posterior_mean"].sel(parameter="taste_mean[price]") < 0).all()  # price clearly negative


def test_power_curve_against_normal_theory(client):
    # WTP = -m_x / m_p with both means ~ N(., se): by the delta method (normal theory) its SD is
    # se * sqrt(1 / m_p^2 + m_x^2 / m_p^4), so the 90 % width is 2 z of that and halves when n quadruples
    scale = 1.0
    persons = (25, 100)
    width = cal.power_analysis(ATTRS, cal.WtpWidth("x", "price"), persons=persons, replications=12,
                               simulation={"n_tasks": 2, "alternatives": ("a", "b")}, fitter=_stand_in(scale),
                               seed=3, client=client, progress=False)
    est = width["estimate"].values
    assert est[0] / est[1] == pytest.approx(2.0, rel=0.15)
    z = stats.norm.ppf(0.95)
    sd_wtp = scale / np.sqrt(100) * np.sqrt(1 / 2.0**2 + 1.0**2 / 2.0**4)
    assert est[1] == pytest.approx(2 * z * sd_wtp, rel=0.1)
    widths = width["value"].values
    np.testing.assert_allclose(width["mc_se"].values, widths.std(axis=1, ddof=1) / np.sqrt(12))
    assert width["coverage"].values.min() >= 0.5  # the stand-in's intervals are centred near the truth
    # detection: lower end = estimate - z se > threshold, estimate ~ N(0.5, se):
    # P = Phi((0.5 - threshold) / se - z)
    threshold = 0.3
    det = cal.power_analysis(ATTRS, cal.SdDetection("x", threshold), persons=persons, replications=40,
                             simulation={"n_tasks": 2, "alternatives": ("a", "b")}, fitter=_stand_in(scale),
                             seed=4, client=client, progress=False)
    p = det["estimate"].values
    expected = stats.norm.cdf((0.5 - threshold) / (scale / np.sqrt(np.array(persons))) - z)  # 0.13, 0.80
    assert np.all(np.abs(p - expected) < 4 * np.sqrt(expected * (1 - expected) / 40)), (p, expected)
    np.testing.assert_allclose(det["mc_se"].values, np.sqrt(p * (1 - p) / 40))
    assert det.attrs["target_kind"] == "probability" and "taste_sd[x]" in det.attrs["target"]
    fig = cal.plot_power_curve(det)
    assert len(fig.axes) == 1


# --------------------------------------------------------------------------- slow: full-size calibration


@pytest.mark.slow
def test_full_calibration_of_the_correct_model(client, design):
    res = cal.simulation_based_calibration(design, fits=50, thin_to=THIN_TO, fitter=NUTS, seed=101,
                                           client=client, progress=False)
    assert not res["failed"].any()
    assert not res["flagged"].any(), cal.format_calibration(res)


@pytest.mark.slow
def test_full_calibration_flags_the_wrong_prior(client, design):
    # prior scales 3 x the true ones: a milder fault on this design (50 fits put the chi-square p-value of
    # taste_sd near 0.08 in our runs), so it takes more fits to see
    res = cal.simulation_based_calibration(design, fits=150, thin_to=THIN_TO, fitter=WrongPrior(NUTS, 3.0),
                                           seed=101, client=client, progress=False)
    assert bool(res["flagged"].sel(parameter="taste_sd[x]")), cal.format_calibration(res)
    assert float(res["rank"].sel(parameter="taste_sd[x]").mean()) < THIN_TO / 2


@pytest.mark.slow
def test_recovery_and_power_with_nuts(client):
    attrs = [hc.SimAttribute("x", levels=[-1.0, -0.5, 0.0, 0.5, 1.0], taste="normal", mean=1.0, sd=0.8),
             hc.SimAttribute("price", levels=[1.0, 2.0, 3.0], taste="fixed", mean=-1.5)]
    sim = {"n_persons": 80, "n_tasks": 8, "alternatives": ("a", "b", "c")}
    fitter = cal.NutsFitter(draws=300, tune=300, chains=1, backend="pymc")
    rec = cal.parameter_recovery(attrs, replications=20, simulation=sim, fitter=fitter, seed=5, client=client,
                                 progress=False)
    # 20 replications of a calibrated 90 % interval: the covered count is Binomial(20, 0.9), and fewer than 14
    # has probability scipy.stats.binom.cdf(13, 20, 0.9) = 0.24 % per parameter, 0.72 % over the 3: the
    # false-alarm rate of the coverage line
    assert (rec["coverage"].sel(prob=0.9) >= 0.7).all(), rec["coverage"].values
    # bias / bias_se is a t statistic with 19 degrees of freedom: beyond 4 with probability 2 x
    # scipy.stats.t.sf(4, 19) = 0.077 % per parameter, 0.23 % over the 3; the 0.05 is not chance but room for the
    # pull of a posterior mean towards the prior (a posterior mean is not an unbiased estimate of the truth)
    assert (np.abs(rec["bias"]) < 4 * rec["bias_se"] + 0.05).all(), rec["bias"].values
    # negative control: a truth moved by twice each interval's half-width (a location bug) falls outside them
    moved = rec["truth"] + (rec["upper"] - rec["lower"]).sel(prob=0.9)
    outside = (moved < rec["lower"].sel(prob=0.9)) | (moved > rec["upper"].sel(prob=0.9))
    assert (outside.mean("replication") > 1 - 0.7).all()
    power = cal.power_analysis(attrs, cal.SdDetection("x", 0.2), persons=(20, 200), replications=10,
                               simulation={"n_tasks": 8, "alternatives": ("a", "b", "c")}, fitter=fitter,
                               seed=6, client=client, progress=False)
    p = power["estimate"].values
    assert p[1] >= 0.8 and p[1] > p[0], p
