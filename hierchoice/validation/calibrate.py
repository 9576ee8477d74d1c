r"""Validation workloads that need many fits: calibration, recovery and power analysis.

Three questions that one fit cannot answer, each answered by fitting the model
to many simulated data sets (independent tasks, run on ``dask.distributed`` by
:mod:`hierchoice.distributed`; a local cluster of single-threaded worker
processes by default):

:func:`simulation_based_calibration`
    Does the whole pipeline (your spec's priors, the model, the sampler and its
    settings) give calibrated posteriors **on your own design**? Draw the
    population and person tastes from the prior, simulate choices on your
    panel's alternatives and attribute levels, fit, and record the rank of the
    drawn value among :math:`L` thinned posterior draws. If the posteriors are
    right, each rank is uniform on :math:`\{0, \dots, L\}` (Talts, Betancourt,
    Simpson, Vehtari & Gelman 2018, *Validating Bayesian inference algorithms
    with simulation-based calibration*, arXiv:1804.06788):

    .. math::

        \theta^{(i)} \sim p(\theta),\quad y^{(i)} \sim p(y \mid \theta^{(i)}),\quad
        r_i = \#\{\ell \le L : \tilde\theta_\ell^{(i)} < \theta^{(i)}\},\quad
        \tilde\theta^{(i)}_{1..L} \sim p(\theta \mid y^{(i)})
        \;\Longrightarrow\; r_i \sim \mathcal{U}\{0, \dots, L\}.

    Uniformity is checked per parameter with a chi-square test on binned ranks
    and with simultaneous ECDF bands (Säilynoja, Bürkner & Vehtari 2022,
    *Graphical test for discrete uniformity and its applications in
    goodness-of-fit evaluation and multiple sample comparison*, Statistics and
    Computing 32:32).

:func:`parameter_recovery`
    At fixed true values (a :func:`hierchoice.simulate.simulate_panel` design),
    how biased are the posterior means and how often do the 50 % and 90 %
    intervals cover the truth?

:func:`power_analysis`
    How many respondents does a design need? At several numbers of respondents,
    the expected width of the 90 % interval of a willingness to pay
    (:class:`WtpWidth`) or the probability of detecting taste heterogeneity
    (:class:`SdDetection`), with Monte Carlo standard errors.

Each returns a labelled :class:`xarray.Dataset`; :func:`save_result` writes one
as NetCDF atomically. A *fitter* is any callable ``(panel, spec, seed) ->
posterior Dataset`` (the default, :class:`NutsFitter`, is :func:`hierchoice.fit`
on one core), so a different sampler, or a deliberately wrong one, can be
checked the same way.
"""

from __future__ import annotations

import json
import logging
import math
import time
import warnings
from collections.abc import Callable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Protocol

import numpy as np
import xarray as xr

from .._backend import load_backend
from .._io import write_with
from ..data.panel import ChoicePanel, Term
from ..data.simulate import SimAttribute, draw_choices, simulate_panel
from ..diagnostics.checks import population_draws
from ..exceptions import ArchiveError, FitError, SpecError, first_few
from ..model.build import POPULATION_VARS, build_model
from ..spec import Spec, _positive_int, load_spec
from .distributed import TaskFailure, run_tasks, task_seed, task_seed_sequence

__all__ = [
    "Fitter",
    "NutsFitter",
    "WtpWidth",
    "SdDetection",
    "simulate_choices",
    "simulation_based_calibration",
    "rank_uniformity",
    "ecdf_band",
    "parameter_recovery",
    "power_analysis",
    "plot_rank_histograms",
    "plot_ecdf_difference",
    "plot_power_curve",
    "save_result",
    "load_result",
    "format_calibration",
]

#: Random streams within one task (see :func:`hierchoice.distributed.task_seed_sequence`).
_STREAM_PRIOR, _STREAM_DATA, _STREAM_FIT, _STREAM_TIES = 0, 1, 2, 3

_REF_SBC = ("Talts, Betancourt, Simpson, Vehtari & Gelman (2018), Validating Bayesian inference algorithms with "
            "simulation-based calibration, arXiv:1804.06788")
_REF_ECDF = ("Säilynoja, Bürkner & Vehtari (2022), Graphical test for discrete uniformity and its applications in "
             "goodness-of-fit evaluation and multiple sample comparison, Statistics and Computing 32:32")


# --------------------------------------------------------------------------- fitters


class Fitter(Protocol):
    """What the workloads call to fit one simulated data set.

    It receives the simulated panel, the spec and an integer seed, and returns a
    posterior :class:`xarray.Dataset` with dims ``chain``, ``draw`` and the model's
    population variables (``taste_mean`` over ``attribute``, ``taste_sd`` over
    ``random_attribute``, ...) in the user's units, as ``ChoiceFit.posterior``.
    It runs inside a worker process, so it must be picklable (a module-level
    function or an instance of a module-level class).
    """

    def __call__(self, panel: ChoicePanel, spec: Spec, seed: int) -> xr.Dataset: ...


@contextmanager
def _quiet_sampler_logs() -> Iterator[None]:
    loggers = [logging.getLogger(name) for name in ("pymc", "pymc.sampling", "pymc.stats.convergence")]
    levels = [lg.level for lg in loggers]
    for lg in loggers:
        lg.setLevel(logging.WARNING)
    try:
        yield
    finally:
        for lg, level in zip(loggers, levels):
            lg.setLevel(level)


@dataclass(frozen=True)
class NutsFitter:
    """The default fitter: :func:`hierchoice.fit` with NUTS on one core, chains one after another.

    Person draws are not kept (only the population parameters are compared).
    The posterior's ``attrs["divergences"]`` counts divergent transitions.

    Parameters
    ----------
    draws, tune, chains : int, default 1000, 1000, 2
    backend : {"pymc", "nutpie", "numpyro", "auto"}, default "pymc"
        For many fits of one design ``"pymc"`` is the quickest we measured
        (``docs/calibration.md``): PyTensor caches the compiled C code of
        same-shaped models, while nutpie compiles each new model afresh.
    target_accept : float, optional
        Defaults to the spec's ``sampling.target_accept``.
    """

    draws: int = 1000
    tune: int = 1000
    chains: int = 2
    backend: str = "pymc"
    target_accept: float | None = None

    @classmethod
    def from_spec(cls, spec: Spec) -> NutsFitter:
        """The sampler settings of the spec's ``[sampling]`` table.

        ``backend = "auto"`` becomes ``"pymc"``: the quickest for many fits of one
        design (``docs/calibration.md``).
        """
        s = spec.sampling
        backend = "pymc" if s.backend == "auto" else s.backend
        return cls(draws=s.draws, tune=s.tune, chains=s.chains, backend=backend, target_accept=s.target_accept)

    def __call__(self, panel: ChoicePanel, spec: Spec, seed: int) -> xr.Dataset:
        from ..inference.sampling import fit

        spec = spec.with_sampling(store_person_draws=False)
        with _quiet_sampler_logs():
            result = fit(panel, spec, draws=self.draws, tune=self.tune, chains=self.chains, seed=seed,
                         backend=self.backend, target_accept=self.target_accept, cores=1, progressbar=False)
        post = result.posterior
        stats = result.idata.sample_stats if "sample_stats" in result.idata.groups() else None
        if stats is not None and "diverging" in stats:
            post.attrs["divergences"] = int(stats["diverging"].values.sum())
        return post


def _call_fitter(fitter: Fitter, panel: ChoicePanel, spec: Spec, seed: int) -> tuple[xr.Dataset, dict[str, Any]]:
    """Run the fitter, check what it returns, and time it (wall and CPU seconds of this process)."""
    t0, c0 = time.perf_counter(), time.process_time()
    post = fitter(panel, spec, seed)
    seconds, cpu = time.perf_counter() - t0, time.process_time() - c0
    if not isinstance(post, xr.Dataset) or "taste_mean" not in post or not {"chain", "draw"} <= set(post.dims):
        raise FitError(
            f"The fitter {fitter!r} must return a posterior xarray.Dataset with dims chain and draw and the "
            f"variable taste_mean (as ChoiceFit.posterior); it returned {type(post).__name__}."
        )
    return post, {"seconds": seconds, "cpu_seconds": cpu, "divergences": int(post.attrs.get("divergences", -1))}


# --------------------------------------------------------------------------- simulation on a design


def _check_resimulable(panel: ChoicePanel) -> None:
    lagged = [t.name for t in panel.terms if t.kind == "lagged_choice"]
    if lagged:
        raise SpecError(
            f"The panel has the term {lagged[0]!r}, which depends on earlier choices: choices cannot be simulated "
            "again on this design. Run the calibration with a spec without dynamics.lagged_choice (lags and leads "
            "of attributes are fine)."
        )


def simulate_choices(panel: ChoicePanel, person_taste: np.ndarray, rng: np.random.Generator) -> ChoicePanel:
    r"""A copy of ``panel`` with new logit choices drawn at the given person tastes.

    The design (attribute values, availability, tasks, persons, covariates) is kept;
    each real task's choice is drawn from
    :math:`P_{ntj} \propto \exp(x_{ntj}\cdot\beta_n)` over the available alternatives
    (:func:`hierchoice.simulate.draw_choices`).

    Parameters
    ----------
    panel : ChoicePanel
    person_taste : ndarray, shape (n_persons, n_attributes)
        Coefficients in the user's units, in the panel's attribute order.
    rng : numpy.random.Generator
    """
    _check_resimulable(panel)
    beta = np.asarray(person_taste, dtype=float)
    shape = (panel.n_persons, len(panel.attributes))
    if beta.shape != shape:
        raise SpecError(f"person_taste must have shape (persons, attributes) = {shape}, got {beta.shape}.")
    utility = np.einsum("ptjk,pk->ptj", panel.X, beta)  # (P, T, J)
    offered = panel.available & panel.task_mask[:, :, None]
    chosen = np.where(panel.task_mask, draw_choices(utility, offered, rng), -1).astype(np.int64)
    return ChoicePanel(
        X=panel.X, available=panel.available, task_mask=panel.task_mask, chosen=chosen, task_ids=panel.task_ids,
        lag_missing=panel.lag_missing, Z=panel.Z, persons=panel.persons, alternatives=panel.alternatives,
        terms=panel.terms, covariates=panel.covariates, summary=panel.summary, spec=panel.spec,
    )


def _prior_draw(panel: ChoicePanel, spec: Spec, seed: int) -> tuple[xr.DataArray, np.ndarray]:
    """One draw from the model's prior: the population parameters and the person tastes (user's units)."""
    load_backend()
    import pymc as pm

    model = build_model(panel, spec)
    names = [v for v in POPULATION_VARS if v in model.named_vars] + ["person_taste"]
    with _quiet_sampler_logs(), warnings.catch_warnings():
        # the likelihood is a Potential: leaving it out is what makes these prior draws
        warnings.filterwarnings("ignore", message="The effect of Potentials", category=UserWarning)
        prior = pm.sample_prior_predictive(model=model, draws=1, random_seed=seed, var_names=names).prior
    population = population_draws(prior).isel(chain=0, draw=0)
    person = prior["person_taste"].isel(chain=0, draw=0).transpose("person", "attribute").values
    return population, person


# --------------------------------------------------------------------------- ranks and uniformity


def _thinned_ranks(truth: np.ndarray, draws: np.ndarray, thin_to: int, rng: np.random.Generator) -> np.ndarray:
    """Rank of each truth among ``thin_to`` evenly spaced draws; ties broken at random.

    ``truth``: (P,); ``draws``: (S, P) in (chain, draw) order. Returns ints in 0..thin_to.
    """
    n = draws.shape[0]
    kept = draws[(np.arange(thin_to) * n) // thin_to]  # (L, P)
    below = (kept < truth).sum(axis=0)
    ties = (kept == truth).sum(axis=0)
    return below + rng.integers(0, ties + 1)


def _rank_bins(thin_to: int, n_fits: int, bins: int | None) -> list[np.ndarray]:
    """Consecutive groups of the rank values 0..thin_to; by default about 5 fits expected per bin."""
    values = np.arange(thin_to + 1)
    if bins is None:
        bins = max(2, min(thin_to + 1, n_fits // 5))
    if isinstance(bins, bool) or not isinstance(bins, (int, np.integer)) or not 2 <= bins <= thin_to + 1:
        raise SpecError(f"bins must be a whole number from 2 to thin_to + 1 = {thin_to + 1}, got {bins!r}.")
    return [g for g in np.array_split(values, int(bins)) if g.size]


def _binned(ranks: np.ndarray, groups: list[np.ndarray], thin_to: int) -> tuple[np.ndarray, np.ndarray]:
    counts = np.bincount(ranks, minlength=thin_to + 1)
    observed = np.array([counts[g].sum() for g in groups], dtype=float)
    expected = ranks.size * np.array([g.size for g in groups], dtype=float) / (thin_to + 1)
    return observed, expected


def ecdf_band(n_fits: int, thin_to: int, *, prob: float = 0.99, n_sim: int = 5000,
              seed: int = 0) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    r"""Simultaneous ``prob`` band for the ECDF of ``n_fits`` ranks uniform on ``0..thin_to``.

    The ECDF is evaluated at :math:`z_i = i/(L+1)`, :math:`i = 1..L`, where it is the
    share of ranks below :math:`i`; under uniformity the count below :math:`i` is
    :math:`\mathrm{Binomial}(N, z_i)`. The pointwise level :math:`\gamma` is adjusted by
    simulation so that the band holds at every point at once (the simulation method of
    Säilynoja, Bürkner & Vehtari 2022): for each of ``n_sim`` simulated uniform rank samples take the
    smallest two-sided pointwise tail probability

    .. math:: \gamma_m = \min_i 2\min\{F_{N,z_i}(c_i),\, 1 - F_{N,z_i}(c_i - 1)\},

    set :math:`\gamma` to the :math:`1 - \text{prob}` quantile of the :math:`\gamma_m`,
    and bound the ECDF by the binomial quantiles :math:`F^{-1}_{N,z_i}(\gamma/2)/N` and
    :math:`F^{-1}_{N,z_i}(1-\gamma/2)/N`.

    Returns
    -------
    z, lower, upper : ndarray, shape (thin_to,)
    """
    from scipy import stats

    if not 0 < prob < 1:
        raise SpecError(f"prob must be in (0, 1), got {prob!r}.")
    if n_fits < 1 or thin_to < 1:
        raise SpecError(f"ecdf_band needs n_fits >= 1 and thin_to >= 1, got {n_fits!r} and {thin_to!r}.")
    rng = np.random.default_rng(seed)
    z = np.arange(1, thin_to + 1) / (thin_to + 1)
    sims = rng.integers(0, thin_to + 1, size=(n_sim, n_fits))
    offsets = (np.arange(n_sim) * (thin_to + 1))[:, None]
    counts = np.bincount((sims + offsets).ravel(), minlength=n_sim * (thin_to + 1)).reshape(n_sim, -1)  # (M, L+1)
    below = np.cumsum(counts, axis=1)[:, :-1]  # (M, L): ranks < i for i = 1..L
    tail = 2 * np.minimum(stats.binom.cdf(below, n_fits, z), stats.binom.sf(below - 1, n_fits, z))
    gamma_m = np.minimum(tail, 1.0).min(axis=1)
    gamma = float(np.sort(gamma_m)[int(math.floor((1 - prob) * n_sim))])
    lower = stats.binom.ppf(gamma / 2, n_fits, z) / n_fits
    upper = stats.binom.ppf(1 - gamma / 2, n_fits, z) / n_fits
    return z, lower, upper


def rank_uniformity(ranks: xr.DataArray, thin_to: int, *, alpha: float = 0.01, bins: int | None = None,
                    n_sim: int = 5000, seed: int = 0) -> xr.Dataset:
    """Test each parameter's ranks for uniformity on ``0..thin_to``.

    Parameters
    ----------
    ranks : DataArray, dims (fit, parameter)
        Negative values (failed fits) are left out.
    thin_to : int
        The number of thinned posterior draws :math:`L`; ranks run from 0 to L.
    alpha : float, default 0.01
        Level of each test: the chi-square p-value below which a parameter is
        flagged, and 1 - the level of the simultaneous ECDF band.
    bins : int, optional
        Chi-square bins (consecutive groups of rank values); by default about five
        fits expected per bin.
    n_sim, seed :
        Simulations for the ECDF band (:func:`ecdf_band`).

    Returns
    -------
    xarray.Dataset
        Over ``parameter``: ``chi2_statistic``, ``chi2_pvalue``
        (:func:`scipy.stats.chisquare` on the binned ranks), ``ecdf_outside`` (the
        ECDF leaves the simultaneous band somewhere), ``ecdf_max_deviation``
        (largest ``|ECDF - uniform|``), ``flagged`` (either test rejects); over
        ``ecdf_point``: ``ecdf_lower``, ``ecdf_upper`` (the band) with coordinate
        ``z``; attributes ``alpha``, ``chi2_bins``, ``fits_tested``.
    """
    from scipy import stats

    if not 0 < alpha < 1:
        raise SpecError(f"alpha must be in (0, 1), got {alpha!r}.")
    values = np.asarray(ranks.transpose("fit", "parameter").values)
    ok = (values >= 0).all(axis=1)
    values = values[ok].astype(np.int64)
    n = values.shape[0]
    if n < 2:
        raise FitError(f"Uniformity needs ranks from at least 2 fits, got {n}.")
    if values.max(initial=0) > thin_to:
        raise SpecError(f"ranks run up to {int(values.max())}, above thin_to = {thin_to}.")
    groups = _rank_bins(thin_to, n, bins)
    z, lower, upper = ecdf_band(n, thin_to, prob=1 - alpha, n_sim=n_sim, seed=seed)
    chi2, pval, outside, deviation = [], [], [], []
    for p in range(values.shape[1]):
        observed, expected = _binned(values[:, p], groups, thin_to)
        res = stats.chisquare(observed, expected)
        chi2.append(float(res.statistic))
        pval.append(float(res.pvalue))
        ecdf = np.cumsum(np.bincount(values[:, p], minlength=thin_to + 1))[:-1] / n
        outside.append(bool(np.any((ecdf < lower) | (ecdf > upper))))
        deviation.append(float(np.max(np.abs(ecdf - z))))
    pvals = np.array(pval)
    out = xr.Dataset(
        {
            "chi2_statistic": ("parameter", np.array(chi2)),
            "chi2_pvalue": ("parameter", pvals),
            "ecdf_outside": ("parameter", np.array(outside, dtype=bool)),
            "ecdf_max_deviation": ("parameter", np.array(deviation)),
            "flagged": ("parameter", np.array(outside, dtype=bool) | (pvals < alpha)),
            "ecdf_lower": ("ecdf_point", lower),
            "ecdf_upper": ("ecdf_point", upper),
        },
        coords={"parameter": ranks["parameter"].values, "z": ("ecdf_point", z)},
    )
    out.attrs.update({"alpha": float(alpha), "chi2_bins": len(groups), "fits_tested": int(n)})
    return out


# --------------------------------------------------------------------------- simulation-based calibration


@dataclass(frozen=True)
class _SbcItem:
    index: int
    seed: int


def _flat_draws(posterior: xr.Dataset, labels: Sequence[str]) -> tuple[np.ndarray, xr.DataArray]:
    da = population_draws(posterior)
    missing = [p for p in labels if p not in set(da["parameter"].values.tolist())]
    if missing:
        raise FitError(f"The fitter's posterior lacks the population parameter(s) {first_few(missing)}.")
    da = da.sel(parameter=list(labels))
    return da.values.reshape(-1, len(labels)), da


def _ess_bulk(da: xr.DataArray) -> np.ndarray:
    import arviz as az

    with np.errstate(invalid="ignore", divide="ignore"):
        ess = az.ess(xr.Dataset({"p": da.drop_vars("variable", errors="ignore")}), method="bulk")["p"]
    return np.asarray(ess.values, dtype=float)


def _sbc_task(item: _SbcItem, *, panel: ChoicePanel, spec: Spec, fitter: Fitter, thin_to: int) -> dict[str, Any]:
    population, person = _prior_draw(panel, spec, task_seed(item.seed, item.index, _STREAM_PRIOR))
    labels = [str(p) for p in population["parameter"].values]
    truth = population.values.astype(float)
    data_rng = np.random.default_rng(task_seed_sequence(item.seed, item.index, _STREAM_DATA))
    simulated = simulate_choices(panel, person, data_rng)
    post, timing = _call_fitter(fitter, simulated, spec, task_seed(item.seed, item.index, _STREAM_FIT))
    draws, da = _flat_draws(post, labels)
    if draws.shape[0] < thin_to:
        raise SpecError(
            f"The fitter returned {draws.shape[0]} posterior draws, fewer than thin_to = {thin_to}: take more "
            "draws or a smaller thin_to."
        )
    tie_rng = np.random.default_rng(task_seed_sequence(item.seed, item.index, _STREAM_TIES))
    return {
        "labels": labels, "variables": [str(v) for v in population["variable"].values],
        "truth": truth, "rank": _thinned_ranks(truth, draws, thin_to, tie_rng),
        "mean": draws.mean(axis=0), "sd": draws.std(axis=0, ddof=1), "ess_bulk": _ess_bulk(da),
        "n_draws": int(draws.shape[0]),
    } | timing


def simulation_based_calibration(
    panel: ChoicePanel,
    spec: Spec | Mapping[str, Any] | str | Path | None = None,
    *,
    fits: int = 100,
    thin_to: int = 20,
    fitter: Fitter | None = None,
    seed: int = 0,
    alpha: float = 0.01,
    bins: int | None = None,
    client: Any = None,
    workers: int | None = None,
    retries: int = 2,
    progress: bool = True,
) -> xr.Dataset:
    r"""Simulation-based calibration of the model of ``spec`` on the design of ``panel``.

    For fit :math:`i`: draw the population and person tastes from the prior of the
    model :func:`hierchoice.build_model` builds for ``panel`` under ``spec``; draw new
    choices on the panel's design (:func:`simulate_choices`); fit them with
    ``fitter``; record the rank of each drawn population parameter
    (``taste_mean``, ``taste_sd``, upper-triangle ``taste_corr``,
    ``covariate_effect``) among ``thin_to`` evenly spaced posterior draws (Talts et
    al. 2018, with thinning). If the fits are calibrated the ranks are uniform on
    ``0..thin_to``; :func:`rank_uniformity` tests them.

    Parameters
    ----------
    panel : ChoicePanel
        Your validated panel: its alternatives, attribute levels, availability and
        tasks are the design. Its observed choices are not used.
    spec : Spec, mapping or path, optional
        Defaults to the panel's spec.
    fits : int, default 100
    thin_to : int, default 20
        :math:`L`, the posterior draws each truth is ranked among (ranks 0..L). The
        fitter must return at least L draws; thinning spreads them over the chains
        so that they are close to independent (compare ``ess_bulk`` with L).
    fitter : callable, optional
        ``(panel, spec, seed) -> posterior Dataset``; default
        :meth:`NutsFitter.from_spec` (the spec's ``[sampling]`` settings).
    seed : int, default 0
        Fit ``i`` depends only on ``(seed, i)``: the same seed gives the same ranks on
        any number of workers, and more fits extend a run.
    alpha, bins :
        See :func:`rank_uniformity`.
    client, workers, retries, progress :
        See :func:`hierchoice.distributed.run_tasks`.

    Returns
    -------
    xarray.Dataset
        Over (fit, parameter): ``rank``, ``prior_draw`` (the truth),
        ``posterior_mean``, ``posterior_sd``, ``ess_bulk``; over fit: ``seed``,
        ``divergences`` (-1 if the fitter did not say), ``seconds``, ``failed``,
        ``error``; over parameter the uniformity tests of :func:`rank_uniformity`.
        Failed fits have rank -1 and are left out of the tests. Attributes record
        the settings and the spec (TOML).

    Notes
    -----
    Ranks test calibration, not informativeness: a fitter that ignored the data and
    returned prior draws would pass. Failed fits are not missing at random (they
    tend to be extreme prior draws), so many failures make the check optimistic.
    With several parameters, each tested at ``alpha`` by two tests, some flag
    among correct parameters has probability up to about ``2 * alpha * P``.
    """
    spec = panel.spec if spec is None else load_spec(spec)
    _positive_int(fits, "fits", minimum=2)
    _positive_int(thin_to, "thin_to")
    _check_resimulable(panel)
    fitter = NutsFitter.from_spec(spec) if fitter is None else fitter
    if isinstance(fitter, NutsFitter) and fitter.draws * fitter.chains < thin_to:
        raise SpecError(
            f"thin_to = {thin_to} is more than the {fitter.draws * fitter.chains} posterior draws of {fitter!r}: "
            "take more draws (sampling.draws) or a smaller thin_to."
        )
    items = [_SbcItem(i, seed) for i in range(fits)]
    task_seed(seed, 0)  # checks the seed here rather than in every task
    results = run_tasks(_sbc_task, items, common={"panel": panel, "spec": spec, "fitter": fitter,
                                                  "thin_to": thin_to},
                        client=client, workers=workers, retries=retries, progress=progress, label="calibration fits")
    first = _first_success(results, "calibration fits")
    labels, variables = first["labels"], first["variables"]
    n, p = fits, len(labels)
    rank = np.full((n, p), -1, dtype=np.int64)
    fields = {k: np.full((n, p), np.nan) for k in ("prior_draw", "posterior_mean", "posterior_sd", "ess_bulk")}
    per_fit = _per_fit_fields(results)
    for i, res in enumerate(results):
        if isinstance(res, TaskFailure):
            continue
        rank[i] = res["rank"]
        for key, name in (("prior_draw", "truth"), ("posterior_mean", "mean"), ("posterior_sd", "sd"),
                          ("ess_bulk", "ess_bulk")):
            fields[key][i] = res[name]
    per_fit["seed"] = np.array([task_seed(seed, i, _STREAM_FIT) for i in range(n)], dtype=np.int64)
    ds = xr.Dataset(
        {"rank": (("fit", "parameter"), rank)}
        | {k: (("fit", "parameter"), v) for k, v in fields.items()}
        | {k: ("fit", v) for k, v in per_fit.items()},
        coords={"fit": np.arange(n), "parameter": labels, "variable": ("parameter", variables)},
    )
    uniformity = rank_uniformity(ds["rank"], thin_to, alpha=alpha, bins=bins)
    ds = ds.merge(uniformity)
    ds.attrs.update(uniformity.attrs)
    ds.attrs.update({
        "workload": "simulation-based calibration", "thin_to": int(thin_to), "fits": int(n), "seed": int(seed),
        "alpha": float(alpha), "fitter": repr(fitter), "failed_fits": int(per_fit["failed"].sum()),
        "hierchoice_spec_toml": spec.to_toml(), "persons": panel.n_persons, "tasks": panel.n_tasks,
        "references": f"{_REF_SBC}; {_REF_ECDF}",
    })
    return ds


def _per_fit_fields(results: Sequence[Any]) -> dict[str, np.ndarray]:
    """Per task: failed, error, wall and CPU seconds of the fit, divergences (-1: not reported)."""
    n = len(results)
    out = {"failed": np.zeros(n, dtype=bool), "error": np.full(n, "", dtype=object),
           "seconds": np.full(n, np.nan), "cpu_seconds": np.full(n, np.nan),
           "divergences": np.full(n, -1, dtype=np.int64)}
    for i, res in enumerate(results):
        if isinstance(res, TaskFailure):
            out["failed"][i], out["error"][i] = True, res.error
        else:
            for key in ("seconds", "cpu_seconds", "divergences"):
                out[key][i] = res[key]
    return out


def _first_success(results: Sequence[Any], what: str) -> dict[str, Any]:
    for res in results:
        if not isinstance(res, TaskFailure):
            return res
    raise FitError(f"All {len(results)} {what} failed; the first: {results[0]}")


# --------------------------------------------------------------------------- recovery at fixed truth


def _truth_labels(truth: Mapping[str, Any]) -> dict[str, float]:
    """The population truth of :func:`hierchoice.simulate.simulate_panel`, by parameter label."""
    out = {f"taste_mean[{k}]": float(v) for k, v in truth["taste_mean"].items()}
    out |= {f"taste_sd[{k}]": float(v) for k, v in truth["taste_sd"].items()}
    corr = truth.get("taste_corr")
    if corr is not None:
        names = list(corr.index)
        for i in range(len(names)):
            for j in range(i + 1, len(names)):
                out[f"taste_corr[{names[i]},{names[j]}]"] = float(corr.iloc[i, j])
    effect = truth.get("covariate_effect")
    if effect is not None:
        for c in effect.index:
            for a in effect.columns:
                out[f"covariate_effect[{c},{a}]"] = float(effect.loc[c, a])
    if "state_dependence" in truth:
        out["taste_mean[lagged_choice]"] = float(truth["state_dependence"])
    return out


def _simulate(attributes: Sequence[SimAttribute], options: Mapping[str, Any], seed: int) -> tuple[ChoicePanel, Any]:
    sim = simulate_panel(list(attributes), **dict(options), seed=seed)
    return ChoicePanel.from_frame(sim.data, sim.spec), sim


def _check_simulation(simulation: Mapping[str, Any] | None) -> dict[str, Any]:
    options = dict(simulation or {})
    if "seed" in options:
        raise SpecError("simulation must not set seed: each replication's seed comes from the seed argument.")
    return options


@dataclass(frozen=True)
class _SimItem:
    key: tuple[int, ...]
    seed: int
    n_persons: int | None = None


def _recovery_task(item: _SimItem, *, attributes: Sequence[SimAttribute], simulation: Mapping[str, Any],
                   fitter: Fitter, probs: Sequence[float]) -> dict[str, Any]:
    data_seed = task_seed(item.seed, item.key, _STREAM_DATA)
    panel, sim = _simulate(attributes, simulation, data_seed)
    post, timing = _call_fitter(fitter, panel, panel.spec, task_seed(item.seed, item.key, _STREAM_FIT))
    truth = _truth_labels(sim.truth)
    da = population_draws(post)
    labels = [str(p) for p in da["parameter"].values if str(p) in truth]
    draws = da.sel(parameter=labels).values.reshape(-1, len(labels))
    qs = [q for p in probs for q in ((1 - p) / 2, 1 - (1 - p) / 2)]
    quant = np.quantile(draws, qs, axis=0)  # (2 * n_probs, P)
    return {
        "labels": labels, "truth": np.array([truth[p] for p in labels]), "mean": draws.mean(axis=0),
        "sd": draws.std(axis=0, ddof=1), "lower": quant[0::2], "upper": quant[1::2],
    } | timing


def parameter_recovery(
    attributes: Sequence[SimAttribute],
    *,
    replications: int = 20,
    simulation: Mapping[str, Any] | None = None,
    fitter: Fitter | None = None,
    probs: Sequence[float] = (0.5, 0.9),
    seed: int = 0,
    client: Any = None,
    workers: int | None = None,
    retries: int = 2,
    progress: bool = True,
) -> xr.Dataset:
    r"""Bias and interval coverage of the population parameters at fixed true values.

    Each replication simulates a new panel with :func:`hierchoice.simulate.simulate_panel`
    (the true tastes of ``attributes``, the design options of ``simulation``, a
    seed of its own), fits it and compares the posterior with the truth. Over
    :math:`R` successful replications with posterior means :math:`\hat\theta_r`:

    .. math::

        \text{bias} = \frac1R\sum_r (\hat\theta_r - \theta),\qquad
        \text{coverage}_p = \frac1R\sum_r 1\{\theta \in I_{p,r}\},

    with Monte Carlo standard errors :math:`s/\sqrt R` and
    :math:`\sqrt{c(1-c)/R}`; :math:`I_{p,r}` is the central (equal-tailed)
    ``p`` interval. Coverage near ``p`` is expected on average over the prior; at one
    fixed truth a weakly identified parameter can be over- or under-covered.

    Parameters
    ----------
    attributes : sequence of SimAttribute
        The design's attributes and their true population tastes.
    replications : int, default 20
    simulation : mapping, optional
        Keyword arguments of :func:`~hierchoice.simulate.simulate_panel` other
        than ``attributes`` and ``seed`` (``n_persons``, ``n_tasks``,
        ``alternatives``, ``opt_out``, ``constants``, ``correlation``, ...).
    fitter : callable, optional
        Default :class:`NutsFitter` ``()``.
    probs : sequence of float, default (0.5, 0.9)
    seed, client, workers, retries, progress :
        As for :func:`simulation_based_calibration`.

    Returns
    -------
    xarray.Dataset
        ``truth`` (parameter); over (replication, parameter): ``posterior_mean``,
        ``posterior_sd``, and over (replication, parameter, prob) ``lower``,
        ``upper``, ``covered``; over replication ``seed``, ``divergences``,
        ``seconds``, ``failed``, ``error``; summaries over parameter ``bias``,
        ``bias_se``, ``rmse`` and over (parameter, prob) ``coverage``,
        ``coverage_se``.
    """
    _positive_int(replications, "replications")
    options = _check_simulation(simulation)
    probs = [float(p) for p in probs]
    if not probs or not all(0 < p < 1 for p in probs):
        raise SpecError(f"probs must be interval probabilities in (0, 1), got {probs!r}.")
    fitter = NutsFitter() if fitter is None else fitter
    task_seed(seed, 0)
    _simulate(attributes, options, 0)  # a bad design fails here, not in every task
    items = [_SimItem((r,), seed) for r in range(replications)]
    results = run_tasks(_recovery_task, items,
                        common={"attributes": list(attributes), "simulation": options, "fitter": fitter,
                                "probs": probs},
                        client=client, workers=workers, retries=retries, progress=progress, label="recovery fits")
    first = _first_success(results, "recovery fits")
    labels = first["labels"]
    n, p, k = replications, len(labels), len(probs)
    mean, sd = np.full((n, p), np.nan), np.full((n, p), np.nan)
    lower, upper = np.full((n, p, k), np.nan), np.full((n, p, k), np.nan)
    per_fit = _per_fit_fields(results)
    for i, res in enumerate(results):
        if isinstance(res, TaskFailure):
            continue
        mean[i], sd[i] = res["mean"], res["sd"]
        lower[i], upper[i] = res["lower"].T, res["upper"].T
    per_fit["seed"] = np.array([task_seed(seed, (r,), _STREAM_DATA) for r in range(n)], dtype=np.int64)
    truth = np.asarray(first["truth"], dtype=float)
    ok = ~per_fit["failed"]
    covered = (lower <= truth[None, :, None]) & (truth[None, :, None] <= upper)
    err = mean[ok] - truth
    n_ok = int(ok.sum())
    cov = covered[ok].mean(axis=0)
    ds = xr.Dataset(
        {
            "truth": ("parameter", truth),
            "posterior_mean": (("replication", "parameter"), mean),
            "posterior_sd": (("replication", "parameter"), sd),
            "lower": (("replication", "parameter", "prob"), lower),
            "upper": (("replication", "parameter", "prob"), upper),
            "covered": (("replication", "parameter", "prob"), covered & ok[:, None, None]),
            "bias": ("parameter", err.mean(axis=0)),
            "bias_se": ("parameter", err.std(axis=0, ddof=1) / np.sqrt(n_ok) if n_ok > 1 else np.full(p, np.nan)),
            "rmse": ("parameter", np.sqrt((err**2).mean(axis=0))),
            "coverage": (("parameter", "prob"), cov),
            "coverage_se": (("parameter", "prob"), np.sqrt(cov * (1 - cov) / n_ok)),
        }
        | {k_: ("replication", v) for k_, v in per_fit.items()},
        coords={"replication": np.arange(n), "parameter": labels, "prob": probs},
    )
    ds.attrs.update({"workload": "parameter recovery", "replications": int(n), "seed": int(seed),
                     "fitter": repr(fitter), "failed_fits": int((~ok).sum()),
                     "simulation": _options_json(options), "attributes": repr(list(attributes))})
    return ds


# --------------------------------------------------------------------------- power analysis


def _term(terms: Sequence[Term], name: str, what: str) -> Term:
    for term in terms:
        if term.name == name:
            return term
    names = first_few([t.name for t in terms], 10)
    raise SpecError(f"{what} = {name!r} is not a model attribute; the design has {names}.")


def _mean_coefficient(term: Term, mean: np.ndarray, sd: np.ndarray | float) -> np.ndarray:
    r"""The population mean coefficient: :math:`\mu`, or :math:`s e^{\mu + \sigma^2/2}` for a lognormal taste."""
    if term.taste == "lognormal":
        sign = -1.0 if term.sign == "negative" else 1.0
        return sign * np.exp(np.asarray(mean) + np.asarray(sd) ** 2 / 2)
    return np.asarray(mean, dtype=float)


def _draws_of(post: xr.Dataset, var: str, dim: str, name: str) -> np.ndarray:
    if var not in post or name not in post[var][dim].values:
        raise FitError(f"The posterior has no {var}[{name}]; the target needs it.")
    return post[var].sel({dim: name}).values.ravel()


@dataclass(frozen=True)
class WtpWidth:
    r"""Target: the width of the central ``prob`` interval of the WTP at the population mean tastes.

    .. math:: \mathrm{WTP}_k = -\bar\beta_k / \bar\beta_{\text{price}},

    with :math:`\bar\beta` the population mean coefficient (:math:`\mu`, or
    :math:`s e^{\mu+\sigma^2/2}` for a lognormal taste), computed draw by draw.
    Reported per number of respondents: the mean width with its Monte Carlo
    standard error (the SD of the widths over replications / √R), and the
    coverage of the true WTP.
    """

    attribute: str
    price: str
    prob: float = 0.9

    kind = "width"

    def check(self, terms: Sequence[Term]) -> None:
        _term(terms, self.attribute, "WtpWidth.attribute")
        _term(terms, self.price, "WtpWidth.price")
        if not 0 < self.prob < 1:
            raise SpecError(f"WtpWidth.prob must be in (0, 1), got {self.prob!r}.")

    def _wtp(self, terms: Sequence[Term], mean: Callable[[str], Any], sd: Callable[[str], Any]) -> np.ndarray:
        a, p = _term(terms, self.attribute, "attribute"), _term(terms, self.price, "price")
        b_a = _mean_coefficient(a, mean(a.name), sd(a.name) if a.taste == "lognormal" else 0.0)
        b_p = _mean_coefficient(p, mean(p.name), sd(p.name) if p.taste == "lognormal" else 0.0)
        with np.errstate(divide="ignore", invalid="ignore"):
            return -b_a / b_p

    def evaluate(self, posterior: xr.Dataset, terms: Sequence[Term], truth: Mapping[str, float]) -> dict[str, float]:
        w = self._wtp(terms, lambda n: _draws_of(posterior, "taste_mean", "attribute", n),
                      lambda n: _draws_of(posterior, "taste_sd", "random_attribute", n))
        true = float(self._wtp(terms, lambda n: truth[f"taste_mean[{n}]"], lambda n: truth[f"taste_sd[{n}]"]))
        lo, hi = np.quantile(w, [(1 - self.prob) / 2, 1 - (1 - self.prob) / 2])
        return {"value": float(hi - lo), "hit": float(lo <= true <= hi), "truth": true}

    def describe(self) -> str:
        return (f"width of the {100 * self.prob:g} % interval of the WTP for {self.attribute} "
                f"(-mean coefficient of {self.attribute} / mean coefficient of {self.price})")


@dataclass(frozen=True)
class SdDetection:
    r"""Target: the probability of detecting heterogeneity in a taste.

    A replication *detects* it when the lower end of the central ``prob`` interval
    of ``taste_sd[attribute]`` lies above ``threshold`` (in the taste's units; for a
    lognormal taste, of the log-taste). Choose the threshold as the smallest SD that
    matters: every posterior of an SD is above 0. Reported per number of
    respondents: the share of replications that detect, with its binomial standard
    error :math:`\sqrt{p(1-p)/R}` (0 when no or every replication detects; then take
    more replications).
    """

    attribute: str
    threshold: float
    prob: float = 0.9

    kind = "probability"

    def check(self, terms: Sequence[Term]) -> None:
        term = _term(terms, self.attribute, "SdDetection.attribute")
        if term.taste == "fixed":
            raise SpecError(f"SdDetection.attribute = {self.attribute!r} has a fixed taste: it has no taste_sd.")
        if not 0 < self.prob < 1:
            raise SpecError(f"SdDetection.prob must be in (0, 1), got {self.prob!r}.")
        if not self.threshold >= 0:
            raise SpecError(f"SdDetection.threshold must be >= 0, got {self.threshold!r}.")

    def evaluate(self, posterior: xr.Dataset, terms: Sequence[Term], truth: Mapping[str, float]) -> dict[str, float]:
        s = _draws_of(posterior, "taste_sd", "random_attribute", self.attribute)
        lower = float(np.quantile(s, (1 - self.prob) / 2))
        return {"value": lower, "hit": float(lower > self.threshold),
                "truth": float(truth.get(f"taste_sd[{self.attribute}]", np.nan))}

    def describe(self) -> str:
        return (f"probability that the lower end of the {100 * self.prob:g} % interval of taste_sd[{self.attribute}] "
                f"is above {self.threshold:g}")


def _power_task(item: _SimItem, *, attributes: Sequence[SimAttribute], simulation: Mapping[str, Any],
                fitter: Fitter, target: WtpWidth | SdDetection) -> dict[str, Any]:
    options = dict(simulation) | {"n_persons": item.n_persons}
    panel, sim = _simulate(attributes, options, task_seed(item.seed, item.key, _STREAM_DATA))
    post, timing = _call_fitter(fitter, panel, panel.spec, task_seed(item.seed, item.key, _STREAM_FIT))
    return target.evaluate(post, panel.terms, _truth_labels(sim.truth)) | timing


def power_analysis(
    attributes: Sequence[SimAttribute],
    target: WtpWidth | SdDetection,
    *,
    persons: Sequence[int] = (100, 200, 400),
    replications: int = 20,
    simulation: Mapping[str, Any] | None = None,
    fitter: Fitter | None = None,
    seed: int = 0,
    client: Any = None,
    workers: int | None = None,
    retries: int = 2,
    progress: bool = True,
) -> xr.Dataset:
    r"""How a target quantity improves with the number of respondents, with Monte Carlo error.

    For each number of respondents in ``persons``, ``replications`` panels are
    simulated (:func:`hierchoice.simulate.simulate_panel` with the true tastes of
    ``attributes``), fitted, and scored by ``target``: :class:`WtpWidth` (the mean
    width of a WTP interval; standard error :math:`s/\sqrt R`) or
    :class:`SdDetection` (the probability of detecting a taste SD; binomial
    standard error :math:`\sqrt{p(1-p)/R}`).

    Parameters
    ----------
    attributes : sequence of SimAttribute
    target : WtpWidth or SdDetection
    persons : sequence of int, default (100, 200, 400)
    replications : int, default 20
        Per number of respondents.
    simulation : mapping, optional
        Other keyword arguments of :func:`~hierchoice.simulate.simulate_panel`
        (``n_tasks``, ``alternatives``, ...); ``n_persons`` comes from ``persons``.
    fitter, seed, client, workers, retries, progress :
        As for :func:`parameter_recovery`. The replication ``r`` at ``n`` persons
        depends only on ``(seed, n, r)``.

    Returns
    -------
    xarray.Dataset
        Over (persons, replication): ``value`` (the interval width, or the lower
        interval end of the SD), ``hit`` (WTP interval covers the truth / SD
        detected), ``failed``, ``error``, ``seconds``, ``divergences``; over persons:
        ``estimate`` (mean width / detection probability), ``mc_se``, ``n_ok``, and
        ``coverage`` for a width target. ``attrs["target"]`` describes the target.
    """
    if not isinstance(target, (WtpWidth, SdDetection)):
        raise SpecError(f"target must be a WtpWidth or an SdDetection, got {type(target).__name__}.")
    sizes = [_positive_int(n, "persons", minimum=2) for n in persons]
    if not sizes or len(set(sizes)) != len(sizes):
        raise SpecError(f"persons must list different numbers of respondents, got {list(persons)!r}.")
    _positive_int(replications, "replications")
    options = _check_simulation(simulation)
    if "n_persons" in options:
        raise SpecError("simulation must not set n_persons: the numbers of respondents come from persons.")
    fitter = NutsFitter() if fitter is None else fitter
    task_seed(seed, 0)
    panel, _ = _simulate(attributes, options | {"n_persons": sizes[0]}, 0)
    target.check(panel.terms)
    items = [_SimItem((n, r), seed, n) for n in sizes for r in range(replications)]
    results = run_tasks(_power_task, items,
                        common={"attributes": list(attributes), "simulation": options, "fitter": fitter,
                                "target": target},
                        client=client, workers=workers, retries=retries, progress=progress, label="power fits")
    _first_success(results, "power fits")
    shape = (len(sizes), replications)
    per_fit = {k: v.reshape(shape) for k, v in _per_fit_fields(results).items()}  # items are persons-major
    value, hit, truth = np.full(shape, np.nan), np.full(shape, np.nan), np.full(shape, np.nan)
    for item, res in zip(items, results):
        if not isinstance(res, TaskFailure):
            i, r = sizes.index(item.n_persons or 0), item.key[1]
            value[i, r], hit[i, r], truth[i, r] = res["value"], res["hit"], res["truth"]
    failed = per_fit["failed"]
    n_ok = (~failed).sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        if target.kind == "width":
            estimate = np.nanmean(value, axis=1)
            mc_se = np.nanstd(value, axis=1, ddof=1) / np.sqrt(n_ok)
        else:
            estimate = np.nanmean(hit, axis=1)
            mc_se = np.sqrt(estimate * (1 - estimate) / n_ok)
    data: dict[str, Any] = {
        "value": (("persons", "replication"), value), "hit": (("persons", "replication"), hit),
        "truth": (("persons", "replication"), truth),
        **{k: (("persons", "replication"), v) for k, v in per_fit.items()},
        "estimate": ("persons", estimate), "mc_se": ("persons", mc_se), "n_ok": ("persons", n_ok),
    }
    if target.kind == "width":
        data["coverage"] = ("persons", np.nanmean(hit, axis=1))
    ds = xr.Dataset(data, coords={"persons": sizes, "replication": np.arange(replications)})
    ds.attrs.update({"workload": "power analysis", "target": target.describe(), "target_kind": target.kind,
                     "target_repr": repr(target), "replications": int(replications), "seed": int(seed),
                     "fitter": repr(fitter), "failed_fits": int(failed.sum()),
                     "simulation": _options_json(options), "attributes": repr(list(attributes))})
    return ds


def _options_json(options: Mapping[str, Any]) -> str:
    """The simulation options as JSON, for the result's attributes (arrays as lists)."""
    return json.dumps(dict(options), default=lambda o: o.tolist() if hasattr(o, "tolist") else str(o))


# --------------------------------------------------------------------------- plots


def _grid(n: int, width: float = 3.2, height: float = 2.6) -> tuple[Any, list[Any]]:
    from matplotlib.figure import Figure

    cols = min(4, max(1, n))
    rows = math.ceil(n / cols)
    fig = Figure(figsize=(width * cols, height * rows))
    axes = np.atleast_1d(fig.subplots(rows, cols, squeeze=False)).ravel().tolist()
    for ax in axes[n:]:
        ax.set_visible(False)
    return fig, axes[:n]


def _sbc_ranks(result: xr.Dataset) -> tuple[np.ndarray, int]:
    if "rank" not in result or "thin_to" not in result.attrs:
        raise FitError("Expected the result of simulation_based_calibration (variables rank, attrs thin_to).")
    ranks = result["rank"].transpose("fit", "parameter").values
    return ranks[(ranks >= 0).all(axis=1)], int(result.attrs["thin_to"])


def _title(ax: Any, result: xr.Dataset, p: int, label: str) -> None:
    flagged = bool(result["flagged"].values[p]) if "flagged" in result else False
    pval = float(result["chi2_pvalue"].values[p]) if "chi2_pvalue" in result else float("nan")
    ax.set_title(f"{label}\nchi-square p = {pval:.3g}" + ("  FLAGGED" if flagged else ""), fontsize="small",
                 color="tab:red" if flagged else "black")


def plot_rank_histograms(result: xr.Dataset) -> Any:
    """Histograms of the calibration ranks, one panel per parameter (as in Talts et al. 2018).

    Bars are the chi-square bins; the grey band is the central ``1 - alpha`` range of
    each bin's count under uniform ranks (pointwise, binomial). A smile says the
    posteriors are too narrow, a frown too wide, ranks piled at one end that they are
    biased to one side.
    Returns a :class:`matplotlib.figure.Figure` (save it with
    :func:`hierchoice.diagnostic_plots.save_figure`).
    """
    from scipy import stats

    ranks, thin_to = _sbc_ranks(result)
    n = ranks.shape[0]
    alpha = float(result.attrs.get("alpha", 0.01))
    groups = _rank_bins(thin_to, n, int(result.attrs.get("chi2_bins", 0)) or None)
    labels = [str(p) for p in result["parameter"].values]
    fig, axes = _grid(len(labels))
    edges = np.array([g[0] for g in groups] + [thin_to + 1]) - 0.5
    widths = np.diff(edges)
    for p, ax in enumerate(axes):
        observed, expected = _binned(ranks[:, p], groups, thin_to)
        share = expected / n
        lo, hi = stats.binom.ppf(alpha / 2, n, share), stats.binom.ppf(1 - alpha / 2, n, share)
        ax.bar(edges[:-1], observed / widths, width=widths, align="edge", color="tab:blue", alpha=0.7,
               edgecolor="white")
        ax.fill_between(edges, np.append(lo / widths, lo[-1] / widths[-1]),
                        np.append(hi / widths, hi[-1] / widths[-1]), step="post", color="grey", alpha=0.3, lw=0)
        ax.stairs(expected / widths, edges, color="black", lw=1)
        ax.set(xlim=(-0.5, thin_to + 0.5), xlabel=f"rank (0..{thin_to})", ylabel="fits per rank value")
        _title(ax, result, p, labels[p])
    fig.suptitle(f"Calibration ranks of {n} fits (grey: {100 * (1 - alpha):g} % range per bin if uniform)",
                 fontsize="medium")
    fig.tight_layout()
    return fig


def plot_ecdf_difference(result: xr.Dataset) -> Any:
    """ECDF of the ranks minus the uniform CDF, with the simultaneous band (Säilynoja et al. 2022).

    A curve that leaves the grey band anywhere is flagged; the band holds at every
    point at once with probability ``1 - alpha`` under uniform ranks.
    """
    ranks, thin_to = _sbc_ranks(result)
    n = ranks.shape[0]
    z = result["z"].values
    lower, upper = result["ecdf_lower"].values, result["ecdf_upper"].values
    labels = [str(p) for p in result["parameter"].values]
    fig, axes = _grid(len(labels))
    for p, ax in enumerate(axes):
        ecdf = np.cumsum(np.bincount(ranks[:, p], minlength=thin_to + 1))[:-1] / n
        ax.fill_between(z, lower - z, upper - z, step="mid", color="grey", alpha=0.3, lw=0)
        ax.step(z, ecdf - z, where="mid", color="tab:blue")
        ax.axhline(0, color="black", lw=0.8)
        ax.set(xlim=(0, 1), xlabel="fractional rank", ylabel="ECDF - uniform")
        _title(ax, result, p, labels[p])
    alpha = float(result.attrs.get("alpha", 0.01))
    fig.suptitle(f"ECDF difference of {n} fits (grey: simultaneous {100 * (1 - alpha):g} % band)",
                 fontsize="medium")
    fig.tight_layout()
    return fig


def plot_power_curve(result: xr.Dataset) -> Any:
    """The target of :func:`power_analysis` against the number of respondents, ±2 Monte Carlo SE."""
    from matplotlib.figure import Figure

    if "estimate" not in result or "persons" not in result.dims:
        raise FitError("Expected the result of power_analysis (variables estimate, mc_se over persons).")
    fig = Figure(figsize=(5.5, 4))
    ax = fig.subplots()
    x = result["persons"].values
    ax.errorbar(x, result["estimate"].values, yerr=2 * result["mc_se"].values, fmt="o-", capsize=3)
    kind = result.attrs.get("target_kind", "")
    ax.set(xlabel="respondents", ylabel="mean interval width" if kind == "width" else "probability",
           title=str(result.attrs.get("target", "power analysis")))
    ax.title.set_fontsize("small")
    if kind == "probability":
        ax.set_ylim(-0.05, 1.05)
    fig.tight_layout()
    return fig


# --------------------------------------------------------------------------- saving


def save_result(result: xr.Dataset, path: str | Path) -> Path:
    """Write a workload's Dataset as NetCDF (h5netcdf) atomically: a reader never sees half a file."""
    ds = result.copy()
    for name in list(ds.variables):
        if ds[name].dtype == object:
            ds[name] = ds[name].astype(str)
    return write_with(Path(path), lambda tmp: ds.to_netcdf(tmp, engine="h5netcdf"))


def load_result(path: str | Path) -> xr.Dataset:
    """Read a Dataset written by :func:`save_result` (loaded into memory, file closed)."""
    path = Path(path)
    if not path.exists():
        raise ArchiveError(f"{str(path)!r} does not exist.")
    try:
        with xr.open_dataset(path, engine="h5netcdf") as ds:
            return ds.load()
    except (OSError, ValueError) as err:
        raise ArchiveError(f"Could not read {str(path)!r}: {type(err).__name__}: {err}") from None


def format_calibration(result: xr.Dataset) -> str:
    """A plain-text account of a :func:`simulation_based_calibration` result."""
    ok = ~result["failed"].values
    lines = [f"simulation-based calibration: {int(ok.sum())} of {result.sizes['fit']} fits, ranks 0..."
             f"{result.attrs['thin_to']}, alpha {result.attrs['alpha']:g}", ""]
    labels = [str(p) for p in result["parameter"].values]
    width = max(len(s) for s in labels)
    ess = np.nanmedian(result["ess_bulk"].values[ok], axis=0) if ok.any() else np.full(len(labels), np.nan)
    lines.append(f"  {'parameter':<{width}}  chi2 p   ECDF band  median ESS  verdict")
    for p, label in enumerate(labels):
        outside = bool(result["ecdf_outside"].values[p])
        verdict = "FLAGGED" if bool(result["flagged"].values[p]) else "ok"
        lines.append(f"  {label:<{width}}  {float(result['chi2_pvalue'].values[p]):7.3g}  "
                     f"{'outside' if outside else 'inside':>9}  {ess[p]:10.0f}  {verdict}")
    n_failed = int((~ok).sum())
    if n_failed:
        first = next(str(e) for e, f in zip(result["error"].values, result["failed"].values) if f)
        lines += ["", f"note: {n_failed} fits failed and are left out (the first: {first}); failures are not "
                      "random, so the check is optimistic"]
    div = result["divergences"].values
    if (div > 0).any():
        lines.append(f"note: {int((div > 0).sum())} fits had divergent transitions")
    return "\n".join(lines)
