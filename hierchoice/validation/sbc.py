r"""Simulation-based calibration: ranks of prior draws among posterior draws, on your own design.

:func:`simulation_based_calibration`
    Does the whole pipeline (your spec's priors, the model, the sampler and its
    settings) give calibrated posteriors **on your own design**? Draw the
    population and person tastes from the prior, simulate choices on your
    panel's alternatives and attribute levels (:func:`simulate_choices`), fit,
    and record the rank of the drawn value among :math:`L` thinned posterior
    draws. If the posteriors are right, each rank is uniform on
    :math:`\{0, \dots, L\}` (Talts, Betancourt, Simpson, Vehtari & Gelman 2018,
    *Validating Bayesian inference algorithms with simulation-based
    calibration*, arXiv:1804.06788):

    .. math::

        \theta^{(i)} \sim p(\theta),\quad y^{(i)} \sim p(y \mid \theta^{(i)}),\quad
        r_i = \#\{\ell \le L : \tilde\theta_\ell^{(i)} < \theta^{(i)}\},\quad
        \tilde\theta^{(i)}_{1..L} \sim p(\theta \mid y^{(i)})
        \;\Longrightarrow\; r_i \sim \mathcal{U}\{0, \dots, L\}.

    Uniformity is checked per parameter with a chi-square test on binned ranks
    and with simultaneous ECDF bands (:func:`rank_uniformity`, :func:`ecdf_band`;
    Säilynoja, Bürkner & Vehtari 2022, *Graphical test for discrete uniformity
    and its applications in goodness-of-fit evaluation and multiple sample
    comparison*, Statistics and Computing 32:32). :func:`format_calibration`
    gives a plain-text account of a result.

The fits run as independent tasks on ``dask.distributed``
(:mod:`hierchoice.validation.distributed`).

May import: :mod:`~hierchoice.validation.fitters`, :mod:`~hierchoice.validation.results`,
:mod:`~hierchoice.validation.distributed`, ``hierchoice.diagnostics`` and everything below it.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from .._backend import load_backend
from ..data.panel import ChoicePanel
from ..diagnostics.checks import population_draws
from ..exceptions import FitError, SpecError, first_few
from ..model.build import POPULATION_VARS, build_model
from ..simulate import draw_choices
from ..spec import Spec, _positive_int, load_spec
from .distributed import TaskFailure, run_tasks, task_seed, task_seed_sequence
from .fitters import (
    _STREAM_DATA,
    _STREAM_FIT,
    _STREAM_PRIOR,
    _STREAM_TIES,
    Fitter,
    NutsFitter,
    _call_fitter,
    _quiet_sampler_logs,
)
from .results import _first_success, _per_fit_fields

__all__ = [
    "simulate_choices",
    "simulation_based_calibration",
    "rank_uniformity",
    "ecdf_band",
    "format_calibration",
]

_REF_SBC = ("Talts, Betancourt, Simpson, Vehtari & Gelman (2018), Validating Bayesian inference algorithms with "
            "simulation-based calibration, arXiv:1804.06788")
_REF_ECDF = ("Säilynoja, Bürkner & Vehtari (2022), Graphical test for discrete uniformity and its applications in "
             "goodness-of-fit evaluation and multiple sample comparison, Statistics and Computing 32:32")


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
        See :func:`hierchoice.validation.distributed.run_tasks`.

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


# --------------------------------------------------------------------------- plain-text account


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
