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

import functools
import math
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from .._backend import load_backend, quiet_pymc_logs
from ..data.panel import ChoicePanel
from ..diagnostics.checks import population_draws
from ..exceptions import FitError, SpecError, first_few
from ..model.build import POPULATION_VARS, build_model
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
    (the Gumbel draw of :func:`hierchoice.simulate.draw_choices`, on the panel's real rows only).

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
    cells = panel.cells  # the real rows only: memory linear in them, whatever the spread of tasks per person
    task = cells.row_task
    starts = cells.row_ptr[:-1]
    # the argmax of utility plus i.i.d. Gumbel noise over each task's rows, as in draw_choices
    total = np.einsum("rk,rk->r", cells.x, beta[cells.task_owner[task]]) + rng.gumbel(size=cells.alt.size)
    if total.size:
        best = total >= np.maximum.reduceat(total, starts)[task]
        first = np.flatnonzero(best)  # the first best row of each task (ties have probability 0)
        chosen = cells.alt[first[np.searchsorted(first, starts)]]
    else:
        chosen = cells.chosen.copy()
    return ChoicePanel(
        cells=replace(cells, chosen=chosen.astype(np.int64)), Z=panel.Z, persons=panel.persons,
        alternatives=panel.alternatives, terms=panel.terms, covariates=panel.covariates, summary=panel.summary,
        spec=panel.spec,
    )


def _prior_draw(panel: ChoicePanel, spec: Spec, seed: int) -> tuple[xr.DataArray, np.ndarray]:
    """One draw from the model's prior: the population parameters and the person tastes (user's units)."""
    load_backend()
    import pymc as pm

    model = build_model(panel, spec)
    names = [v for v in POPULATION_VARS if v in model.named_vars] + ["person_taste"]
    with quiet_pymc_logs(), warnings.catch_warnings():
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


def _rank_counts(ranks: np.ndarray, thin_to: int) -> np.ndarray:
    """How many ranks take each value 0..thin_to: shape (L+1,) for ranks (N,), (L+1, P) for ranks (N, P)."""
    flat = ranks.reshape(ranks.shape[0], -1)
    width = thin_to + 1
    columns = flat.shape[1]
    counts = np.bincount((flat + width * np.arange(columns)).ravel(), minlength=width * columns)
    return counts.reshape(columns, width).T.reshape((width,) + ranks.shape[1:])


def _binned(ranks: np.ndarray, groups: list[np.ndarray], thin_to: int) -> tuple[np.ndarray, np.ndarray]:
    """Observed counts per bin, shape (B,) or (B, P) like ``ranks``, and the expected count per bin (B,)."""
    counts = _rank_counts(ranks, thin_to)
    observed = np.stack([counts[g].sum(axis=0) for g in groups]).astype(float)
    expected = ranks.shape[0] * np.array([g.size for g in groups], dtype=float) / (thin_to + 1)
    return observed, expected


def ecdf_band(n_fits: int, thin_to: int, *, prob: float = 0.99) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    r"""Simultaneous ``prob`` band for the ECDF of ``n_fits`` ranks uniform on ``0..thin_to``.

    The ECDF is evaluated at :math:`z_i = i/(L+1)`, :math:`i = 1..L`, where it is the
    share :math:`C_i/N` of ranks below :math:`i`; under uniformity
    :math:`C_i \sim \mathrm{Binomial}(N, z_i)`. For a pointwise level :math:`\gamma` the
    band at :math:`z_i` is

    .. math:: \ell_i(\gamma) = \min\{c : F_{N,z_i}(c) \ge \gamma/2\},\qquad
              u_i(\gamma) = \min\{c : 1 - F_{N,z_i}(c) \le \gamma/2\},

    and the ECDF is inside when :math:`\ell_i \le C_i \le u_i` at every :math:`i`.
    :math:`\gamma` is set by the optimisation method of Säilynoja, Bürkner & Vehtari
    (2022, Statistics and Computing 32:32): the probability that uniform ranks stay
    inside the band at every point at once is computed exactly, by a forward
    recursion over the points (given :math:`C_i = c`, the other :math:`N - c` ranks
    are uniform on :math:`\{i, \dots, L\}`, so
    :math:`C_{i+1} - C_i \sim \mathrm{Binomial}(N - c, 1/(L - i + 1))`), and
    :math:`\gamma` is the largest value, found by bisection, whose band holds with
    probability at least ``prob`` (their method takes the :math:`\gamma` whose coverage
    is closest to ``prob``, which can fall on either side). Counts are whole numbers,
    so the exact coverage can exceed ``prob`` a little but is never below it: the band's
    false-alarm rate on uniform ranks is at most ``1 - prob`` (0.93-1.00 % for
    ``prob = 0.99`` at the sizes in docs/calibration.md). No simulation is involved;
    results are cached by ``(n_fits, thin_to, prob)``; a band for 1,000 fits and
    ``thin_to = 1000`` takes about 2 s.

    Parameters
    ----------
    n_fits : int
        :math:`N`, the number of ranks.
    thin_to : int
        :math:`L`; ranks run from 0 to L.
    prob : float, default 0.99
        Simultaneous coverage under uniform ranks.

    Returns
    -------
    z, lower, upper : ndarray, shape (thin_to,)
        Evaluation points and the band's bounds on the ECDF (counts divided by N).
    """
    _check_band_args(n_fits, thin_to, prob)
    lower, upper, _ = _band_counts(int(n_fits), int(thin_to), float(prob))
    z = np.arange(1, thin_to + 1) / (thin_to + 1)
    return z, lower / n_fits, upper / n_fits


def _check_band_args(n_fits: int, thin_to: int, prob: float) -> None:
    if not 0 < prob < 1:
        raise SpecError(f"prob must be in (0, 1), got {prob!r}.")
    for name, value in (("n_fits", n_fits), ("thin_to", thin_to)):
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
            raise SpecError(f"{name} must be a whole number >= 1 for the ECDF band, got {value!r}.")


@functools.lru_cache(maxsize=64)
def _band_counts(n_fits: int, thin_to: int, prob: float) -> tuple[np.ndarray, np.ndarray, float]:
    """The tightest band of the family below whose exact coverage is at least ``prob``.

    Returns the count bounds (inclusive, shape (thin_to,), read-only) and the exact
    probability that uniform ranks stay inside them. Cached: a calibration asks once.
    """
    from scipy import special, stats

    z = np.arange(1, thin_to + 1) / (thin_to + 1)
    c = np.arange(n_fits + 1)
    cdf = stats.binom.cdf(c[None, :], n_fits, z[:, None])  # (L, N+1): P(C_i <= c)
    sf = stats.binom.sf(c[None, :], n_fits, z[:, None])  # (L, N+1): P(C_i > c)
    log_fact = special.gammaln(c + 1.0)
    seen: dict[bytes, float] = {}

    def band(gamma: float) -> tuple[np.ndarray, np.ndarray, float]:
        lower = (cdf < gamma / 2).sum(axis=1)  # smallest c with P(C_i <= c) >= gamma/2
        upper = (sf > gamma / 2).sum(axis=1)  # smallest c with P(C_i > c) <= gamma/2
        key = lower.tobytes() + upper.tobytes()
        if key not in seen:
            seen[key] = _band_coverage(lower, upper, n_fits, log_fact)
        return lower, upper, seen[key]

    best = band(1.0)
    if best[2] < prob:
        good, bad = 1.0, 1.0
        while best[2] < prob and good > 1e-300:  # bracket: widen the band tenfold in gamma at a time
            bad, good = good, good / 10
            best = band(good)
        if best[2] < prob:  # prob so close to 1 that only the whole range [0, N] will do
            best = (np.zeros(thin_to, dtype=np.int64), np.full(thin_to, n_fits, dtype=np.int64), 1.0)
        else:
            for _ in range(80):  # bisect in log(gamma) while the band can still change
                if bad / good < 1 + 1e-12:
                    break
                mid = math.sqrt(good * bad)
                trial = band(mid)
                if trial[2] >= prob:
                    good, best = mid, trial
                else:
                    bad = mid
    lower, upper, coverage = best
    lower, upper = lower.astype(np.int64), upper.astype(np.int64)
    lower.setflags(write=False)
    upper.setflags(write=False)
    return lower, upper, float(coverage)


def _band_coverage(lower: np.ndarray, upper: np.ndarray, n_fits: int, log_fact: np.ndarray) -> float:
    r"""Exact probability that the counts :math:`C_i` of uniform ranks below ``i`` stay in ``[lower, upper]``.

    Forward recursion over the evaluation points: given :math:`C_i = c`, the other
    :math:`N - c` ranks are uniform on :math:`\{i, \dots, L\}`, so
    :math:`C_{i+1} - C_i \sim \mathrm{Binomial}(N - c,\, 1/(L - i + 1))`.
    """
    thin_to = lower.size
    state = np.arange(lower[0], upper[0] + 1)
    q = 1.0 / (thin_to + 1)
    mass = np.exp(log_fact[n_fits] - log_fact[state] - log_fact[n_fits - state]
                  + state * math.log(q) + (n_fits - state) * math.log1p(-q))
    for i in range(1, thin_to):  # from C_i to C_{i+1} (1-based i)
        q = 1.0 / (thin_to - i + 1)
        nxt = np.arange(lower[i], upper[i] + 1)
        rest = n_fits - state[:, None]  # (a, 1) ranks at or above i
        step = nxt[None, :] - state[:, None]  # (a, b) ranks equal to i
        ok = (step >= 0) & (step <= rest)
        k = np.where(ok, step, 0)
        log_p = (log_fact[rest] - log_fact[k] - log_fact[rest - k] + k * math.log(q)
                 + (rest - k) * math.log1p(-q))
        mass = mass @ np.where(ok, np.exp(log_p), 0.0)
        state = nxt
    return float(mass.sum())


def rank_uniformity(ranks: xr.DataArray, thin_to: int, *, alpha: float = 0.01, bins: int | None = None) -> xr.Dataset:
    """Test each parameter's ranks for uniformity on ``0..thin_to``.

    Parameters
    ----------
    ranks : DataArray, dims (fit, parameter)
        Negative values (failed fits) are left out.
    thin_to : int
        The number of thinned posterior draws :math:`L`; ranks run from 0 to L.
    alpha : float, default 0.01
        Level of each test: the chi-square p-value below which a parameter is
        flagged, and 1 - the coverage of the simultaneous ECDF band
        (:func:`ecdf_band`, exact: its false-alarm rate on uniform ranks is at most
        ``alpha``). The chi-square p-value is the usual asymptotic one; on uniform
        ranks with the default bins its false-alarm rate measured 1.00-1.06 % at
        ``alpha = 0.01`` (docs/calibration.md). A parameter is flagged when either
        test rejects, so a correct parameter is flagged with probability at most
        ``2 * alpha`` (measured 1.6-2.1 % at ``alpha = 0.01``).
    bins : int, optional
        Chi-square bins (consecutive groups of rank values); by default about five
        fits expected per bin.

    Returns
    -------
    xarray.Dataset
        Over ``parameter``: ``chi2_statistic``, ``chi2_pvalue``
        (:func:`scipy.stats.chisquare` on the binned ranks), ``ecdf_outside`` (the
        ECDF leaves the simultaneous band somewhere), ``ecdf_max_deviation``
        (largest ``|ECDF - uniform|``), ``flagged`` (either test rejects); over
        ``ecdf_point``: ``ecdf_lower``, ``ecdf_upper`` (the band) with coordinate
        ``z``; attributes ``alpha``, ``chi2_bins``, ``fits_tested``,
        ``ecdf_band_coverage`` (the band's exact simultaneous coverage, at least
        ``1 - alpha``).
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
    _check_band_args(n, thin_to, 1 - alpha)
    low_count, high_count, coverage = _band_counts(n, int(thin_to), float(1 - alpha))
    z = np.arange(1, thin_to + 1) / (thin_to + 1)
    observed, expected = _binned(values, groups, thin_to)  # (B, P), (B,)
    res = stats.chisquare(observed, expected[:, None], axis=0)
    pvals = np.asarray(res.pvalue, dtype=float)
    below = np.cumsum(_rank_counts(values, thin_to), axis=0)[:-1]  # (L, P): C_i, ranks below i = 1..L
    outside = np.any((below < low_count[:, None]) | (below > high_count[:, None]), axis=0)
    deviation = np.max(np.abs(below / n - z[:, None]), axis=0)
    out = xr.Dataset(
        {
            "chi2_statistic": ("parameter", np.asarray(res.statistic, dtype=float)),
            "chi2_pvalue": ("parameter", pvals),
            "ecdf_outside": ("parameter", outside),
            "ecdf_max_deviation": ("parameter", deviation),
            "flagged": ("parameter", outside | (pvals < alpha)),
            "ecdf_lower": ("ecdf_point", low_count / n),
            "ecdf_upper": ("ecdf_point", high_count / n),
        },
        coords={"parameter": ranks["parameter"].values, "z": ("ecdf_point", z)},
    )
    out.attrs.update({"alpha": float(alpha), "chi2_bins": len(groups), "fits_tested": int(n),
                      "ecdf_band_coverage": coverage})
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
