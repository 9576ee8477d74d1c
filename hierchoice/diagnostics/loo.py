r"""Model comparison by PSIS-LOO at two levels: a new task of a known person, or a new person.

**Task level** (:func:`task_loo`): the pointwise log-likelihood of each task given
the person's posterior tastes (the ``log_likelihood`` group a fit stores) goes to
:func:`arviz.loo`. It estimates how well the model predicts *another task of the
same persons*.

**Person level** (:func:`person_loo`): the unit left out is a whole person. Its
pointwise log-likelihood is the person's *marginal* likelihood, their tastes
integrated over the population distribution at each posterior draw
:math:`\theta^{(d)}` of the population parameters (mean, SD, correlation,
covariate effects):

.. math::

    L_n(\theta) = \int \prod_t P_{nt}(\beta)\, g(\beta \mid \theta, z_n)\, d\beta ,

estimated by importance sampling around the person's own posterior — the integrated
importance sampling of latent-variable models (Vehtari, Mononen, Tolvanen, Sivula & Winther
2016, *JMLR* 17(103); Merkle, Furr & Rabe-Hesketh 2019, *Psychometrika* 84(3), on using marginal
rather than conditional likelihoods to compare latent-variable models). With :math:`u` the
random tastes on their latent (normal) scale and :math:`g(u \mid \theta, z_n)` their population
density,

.. math::

    \log \hat L_n(\theta) = \log \frac1S \sum_{s=1}^S w_s + \frac{\hat c^2}{2S}, \qquad
    w_s = \frac{\prod_t P_{nt}(\beta(u^{(s)}))\, g(u^{(s)} \mid \theta, z_n)}{q_{n\theta}(u^{(s)})},
    \qquad u^{(s)} \sim q_{n\theta}\ \text{i.i.d.}

The proposal :math:`q_{n\theta}` is a multivariate t (30 degrees of freedom; Geweke 1989,
*Econometrica* 57(6)) at the Laplace approximation of the person's posterior under :math:`\theta`:
the likelihood's Gaussian approximation in :math:`u` (Newton's method at the posterior mean of the
population, finite-difference derivatives) combined exactly with the normal :math:`g` of each
draw. Because :math:`g` is normal, the likelihood at most 1 and :math:`q` has heavier tails, the
weights are bounded, so their variance is finite and the error obeys the central limit theorem.
:math:`\frac1S\sum_s w_s` is unbiased for :math:`L_n`; its logarithm has variance about
:math:`c^2/S` and bias about :math:`-c^2/(2S)` (delta method), where :math:`c^2 =
\operatorname{Var}_q[w]/L_n^2`, estimated from the same :math:`S` weights. The bias is added back
(the :math:`\hat c^2/(2S)` term), and :func:`person_log_marginal` returns the Monte Carlo standard
error :math:`\sqrt{\hat c^2/S}` with each value. A good proposal keeps :math:`c^2` small and
roughly constant as the number of tasks grows (about 0.1 on a 12-task panel), where drawing
:math:`u` from the population itself makes :math:`c^2` grow with the tasks and the bias with it.
:func:`person_loo` carries these errors through the LOO average (second-order delta method,
removing the bias it adds) and states the Monte Carlo standard error of the total elpd. This
answers "how well does the model predict *a new person* from the same population" — what a
market simulation does.

:func:`compare_models` puts several fits into :func:`arviz.compare` at either
level, with the Pareto :math:`\hat k` diagnostics (Vehtari, Simpson, Gelman, Yao &
Gabry 2024, *JMLR* 25(72)) counted in the table and :func:`pareto_k_checks`
turning them into :class:`hierchoice.checks.Check` records.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from .._args import NOT_GIVEN, aliased, whole_number
from .._display import Progress, want_progress
from .._records import Check
from ..exceptions import FitError, SpecError, first_few
from ..inference.results import thin_draws
from ..model.build import POPULATION_VARS
from ..model.likelihood import RaggedDifferences, cell_differences, person_loglik_cells
from ..model.transforms import latent_to_coefficient

__all__ = ["PERSON_LOGLIK", "PARETO_K_UNUSABLE", "task_loo", "person_log_marginal", "person_loo", "pareto_k_checks",
           "compare_models"]

_REF_PSIS = "Vehtari, Simpson, Gelman, Yao & Gabry (2024), JMLR 25(72)"
#: Pareto k above this: the importance ratios have no finite mean and the LOO term is unusable.
PARETO_K_UNUSABLE = 1.0
_BLOCK_CELLS = 4_000_000
#: Name of the person-level log-likelihood variable handed to ArviZ.
PERSON_LOGLIK = "person_marginal"
#: Degrees of freedom of the multivariate t proposal of the person marginal likelihood.
_T_DOF = 30.0
_NEWTON_STEPS = 50
_FD_STEP = 1e-4


def _loo(idata: Any, var_name: str) -> Any:
    import arviz as az

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # Pareto-k warnings are returned as records by pareto_k_checks
        return az.loo(idata, var_name=var_name, pointwise=True)


def task_loo(result: Any) -> Any:
    """PSIS-LOO over tasks: :func:`arviz.loo` on the fit's ``log_likelihood`` variable ``chosen``.

    Returns
    -------
    arviz.ELPDData
        ``elpd_loo``, ``se``, ``p_loo``, pointwise ``loo_i`` and ``pareto_k`` over
        ``obs`` (coordinates ``obs_person``, ``obs_task``), ``good_k``.
    """
    idata = result.idata
    if "log_likelihood" not in idata.groups() or "chosen" not in idata.log_likelihood:
        if "person_taste" not in idata.posterior:
            raise FitError(
                "task_loo needs the task-level log-likelihood or the person tastes; this fit stored neither "
                "(refit with sampling.store_person_draws = true)."
            )
        from ..inference.sampling import add_log_likelihood

        add_log_likelihood(result)
    return _loo(result.idata, "chosen")


@dataclass(frozen=True)
class _Population:
    """The thinned population posterior as flat arrays over draws (d = chain x draw).

    ``base`` (d, P, K): each person's latent mean (population mean plus covariate shift); ``cov_chol`` (d, R, R):
    the Cholesky factor of the random tastes' latent covariance, or None without random tastes.
    """

    base: np.ndarray
    cov_chol: np.ndarray | None


def _population(result: Any, post: Any) -> _Population:
    panel, layout = result.panel, result.layout
    if "taste_mean" not in post:
        raise FitError("person_log_marginal needs the posterior population means ('taste_mean'); this fit has none.")
    n_all = post.sizes["chain"] * post.sizes["draw"]
    names, rnames = layout.names, layout.random_names
    mean = post["taste_mean"].sel(attribute=names).transpose("chain", "draw", "attribute").values
    base = np.repeat(mean.reshape(n_all, 1, len(names)), panel.n_persons, axis=1)
    if layout.shifted and "covariate_effect" in post:
        g = post["covariate_effect"].transpose("chain", "draw", "covariate", "shifted_attribute").values
        z = panel.Z - layout.z_mean[None, :]  # (P, C)
        base[..., list(layout.shifted)] += np.einsum("pc,dck->dpk", z, g.reshape((n_all,) + g.shape[2:]))
    n_r = len(rnames)
    if not n_r:
        return _Population(base, None)
    sd = post["taste_sd"].sel(random_attribute=rnames).transpose("chain", "draw", "random_attribute").values
    chol = np.broadcast_to(np.eye(n_r), (n_all, n_r, n_r))
    if "taste_corr" in post:
        corr = post["taste_corr"].transpose("chain", "draw", "random_attribute", "random_attribute_bis").values
        chol = np.linalg.cholesky(corr.reshape(n_all, n_r, n_r) + 1e-10 * np.eye(n_r))
    return _Population(base, sd.reshape(n_all, n_r)[:, :, None] * chol)


def _cells_per_person(data: RaggedDifferences) -> int:
    """The mean number of real cells of a person (block sizes below)."""
    return max(1, data.n_cells // max(1, data.n_persons))


def _loglik(data: RaggedDifferences, layout: Any, base: np.ndarray, u: np.ndarray) -> np.ndarray:
    """Person log-likelihood with the random latent tastes set to ``u`` (..., P, R); ``base`` (..., P, K)."""
    theta = np.array(np.broadcast_to(base, u.shape[:-1] + base.shape[-1:]))
    theta[..., list(layout.random)] = u
    return person_loglik_cells(data, latent_to_coefficient(theta, layout.taste_map))


def _loglik_derivatives(data: RaggedDifferences, layout: Any, base: np.ndarray,
                        u: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Value (P,), gradient (P, R) and Hessian (P, R, R) of the person log-likelihood in ``u`` (P, R).

    Central finite differences (step ``_FD_STEP``) on one stencil of 1 + 2R^2 points, evaluated in person blocks.
    """
    n_p, n_r = u.shape
    eye = np.eye(n_r) * _FD_STEP
    pairs = [(i, j) for i in range(n_r) for j in range(i + 1, n_r)]
    offsets = [np.zeros(n_r), *eye, *(-eye)]
    offsets += [a * eye[i] + b * eye[j] for i, j in pairs for a, b in ((1, 1), (1, -1), (-1, 1), (-1, -1))]
    offs = np.array(offsets)  # (M, R)
    vals = np.empty((len(offs), n_p))
    block = max(1, _BLOCK_CELLS // max(1, len(offs) * _cells_per_person(data)))
    for p0 in range(0, n_p, block):
        sl = slice(p0, min(p0 + block, n_p))
        vals[:, sl] = _loglik(data.persons(sl), layout, base[sl], u[None, sl] + offs[:, None, :])
    f0, plus, minus = vals[0], vals[1 : 1 + n_r], vals[1 + n_r : 1 + 2 * n_r]
    grad = ((plus - minus) / (2 * _FD_STEP)).T
    hess = np.zeros((n_p, n_r, n_r))
    hess[:, np.arange(n_r), np.arange(n_r)] = ((plus - 2 * f0 + minus) / _FD_STEP**2).T
    for m, (i, j) in enumerate(pairs):
        pp, pm, mp, mm = vals[1 + 2 * n_r + 4 * m : 5 + 2 * n_r + 4 * m]
        hess[:, i, j] = hess[:, j, i] = (pp - pm - mp + mm) / (4 * _FD_STEP**2)
    return f0, grad, hess


def _psd(a: np.ndarray) -> np.ndarray:
    """Nearest positive semi-definite matrices (negative eigenvalues set to 0) of symmetric ``a`` (..., R, R)."""
    w, v = np.linalg.eigh(a)
    return np.einsum("...ij,...j,...kj->...ik", v, np.clip(w, 0.0, None), v)


def _likelihood_laplace(data: RaggedDifferences, layout: Any, pop: _Population) -> tuple[np.ndarray, np.ndarray]:
    r"""A Gaussian approximation of each person's likelihood in the random latent tastes.

    Newton's method (step halving) finds the mode :math:`u^*_n` of :math:`\ell_n(u) + \log N(u; \bar m_n,
    \bar\Sigma)` at the posterior mean of the population; the likelihood is then
    :math:`\ell_n(u) \approx \text{const} + (\Lambda_n u^* + \nabla\ell_n(u^*))^\top u - \tfrac12 u^\top\Lambda_n u`
    with :math:`\Lambda_n = -\nabla^2 \ell_n(u^*)` (made positive semi-definite). Returns the linear term
    :math:`\Lambda_n u^* + \nabla\ell_n(u^*)` (P, R) and :math:`\Lambda_n` (P, R, R).
    """
    rnd = list(layout.random)
    base = pop.base.mean(axis=0)  # (P, K)
    cov = np.einsum("dij,dkj->ik", pop.cov_chol, pop.cov_chol) / len(pop.cov_chol)
    prec = np.linalg.inv(cov)
    m = base[:, rnd]

    def objective(u: np.ndarray, ll: np.ndarray) -> np.ndarray:
        r = u - m
        return ll - 0.5 * np.einsum("pi,ij,pj->p", r, prec, r)

    u = m.copy()
    f, grad, hess = _loglik_derivatives(data, layout, base, u)
    for _ in range(_NEWTON_STEPS):
        neg_h = _psd(-hess) + prec
        step = np.linalg.solve(neg_h, (grad - (u - m) @ prec)[..., None])[..., 0]
        current = objective(u, f)
        scale = np.ones(len(u))
        for _ in range(20):  # halve the step of each person whose objective would fall
            trial = u + scale[:, None] * step
            worse = objective(trial, _loglik(data, layout, base, trial)) < current - 1e-12
            if not worse.any():
                break
            scale[worse] /= 2
        u = u + scale[:, None] * step
        f, grad, hess = _loglik_derivatives(data, layout, base, u)
        if np.max(np.abs(scale[:, None] * step)) < 1e-6:
            break
    lam = _psd(-hess)
    return np.einsum("pij,pj->pi", lam, u) + grad, lam


def person_log_marginal(result: Any, *, n_sim: int = 200, max_draws: int | None = 400, seed: int = 0,
                        progressbar: bool | None = None, label: str = "person LOO") -> xr.Dataset:
    r"""Log marginal likelihood of each person at each posterior draw of the population, by importance sampling.

    See the module docstring for the estimator

    .. math:: \log \hat L_n(\theta^{(d)}) = \log \frac1S \sum_{s=1}^S
              \frac{\prod_t P_{nt}(\beta(u^{(s)}))\, g(u^{(s)} \mid \theta^{(d)}, z_n)}{q_{nd}(u^{(s)})}
              + \frac{\hat c^2}{2S}, \qquad u^{(s)} \sim q_{nd},

    its proposal :math:`q_{nd}` (a multivariate t at the Laplace approximation of the person's posterior
    under :math:`\theta^{(d)}`), why its weights are bounded, and its Monte Carlo error.

    Parameters
    ----------
    result : ChoiceFit
    n_sim : int, default 200
        Importance draws :math:`S` per person and posterior draw (fresh for every draw).
    max_draws : int or None, default 400
        Thin the posterior to at most this many draws over all chains (evenly, the
        same draws in every chain); None keeps all.
    seed : int, default 0
    progressbar : bool or None, default None
        A progress bar over the posterior draws on standard error; None shows it in interactive use only
        (a terminal or a Jupyter kernel). ``label`` names the job on it.

    Returns
    -------
    Dataset, dims (chain, draw, person)
        ``log_marginal`` and ``mc_se`` (delta-method standard error of each value,
        :math:`\sqrt{\hat c^2/S}`; 0 without random tastes, where the value is exact).
    """
    whole_number(n_sim, "person_log_marginal(n_sim=...)", minimum=2)
    panel, layout = result.panel, result.layout
    post = thin_draws(result.idata.posterior, max_draws)
    pop = _population(result, post)
    n_c, n_d = post.sizes["chain"], post.sizes["draw"]
    n_all, n_p = pop.base.shape[:2]
    data = cell_differences(panel.cells)
    out = np.empty((n_all, n_p))
    se = np.zeros((n_all, n_p))
    bar = Progress(label, n_all, enabled=want_progress(progressbar), unit="posterior draws")
    with bar:
        if pop.cov_chol is None:  # no random taste: the likelihood itself, exact
            step = max(1, _BLOCK_CELLS // max(1, data.n_cells))
            for d0 in range(0, n_all, step):
                sl = slice(d0, min(d0 + step, n_all))
                out[sl] = _loglik(data, layout, pop.base[sl], np.zeros(pop.base[sl].shape[:2] + (0,)))
                bar.advance(sl.stop - sl.start)
        else:
            lin, lam = _likelihood_laplace(data, layout, pop)
            rng = np.random.default_rng(seed)
            step = max(1, _BLOCK_CELLS // max(1, n_sim * data.n_cells))
            for d0 in range(0, n_all, step):
                sl = slice(d0, min(d0 + step, n_all))
                lw = _importance_log_weights(data, layout, pop.base[sl], pop.cov_chol[sl], lin, lam, n_sim, rng)
                top = lw.max(axis=1, keepdims=True)
                w = np.exp(lw - top)  # (m, S, P)
                w_mean = w.mean(axis=1)
                se[sl] = np.sqrt(w.var(axis=1, ddof=1) / n_sim) / w_mean
                out[sl] = top[:, 0, :] + np.log(w_mean) + 0.5 * se[sl] ** 2  # minus the bias -c^2/(2S)
                bar.advance(sl.stop - sl.start)
    coords = {"chain": post["chain"].values, "draw": post["draw"].values, "person": list(panel.persons)}
    dims = ("chain", "draw", "person")
    return xr.Dataset(
        {"log_marginal": (dims, out.reshape(n_c, n_d, -1)), "mc_se": (dims, se.reshape(n_c, n_d, -1))},
        coords=coords, attrs={"n_sim": n_sim, "seed": seed, "method": "importance sampling, Laplace-t proposal"},
    )


def _importance_log_weights(data: RaggedDifferences, layout: Any, base: np.ndarray, cov_chol: np.ndarray,
                            lin: np.ndarray, lam: np.ndarray, n_sim: int, rng: np.random.Generator) -> np.ndarray:
    r"""Log importance weights (m, S, P) of the marginal likelihood at ``m`` posterior draws.

    At each draw the population density :math:`N(u; m_{nd}, \Sigma_d)` times the Gaussian approximation of the
    likelihood (``lin``, ``lam`` from :func:`_likelihood_laplace`) is a normal with precision
    :math:`\Lambda_n + \Sigma_d^{-1}` and mean :math:`(\Lambda_n + \Sigma_d^{-1})^{-1}(\text{lin}_n +
    \Sigma_d^{-1} m_{nd})`; the proposal is the multivariate t with ``_T_DOF`` degrees of freedom and that
    location and scale matrix. Shapes: ``base`` (m, P, K), ``cov_chol`` (m, R, R).
    """
    m, n_p = base.shape[:2]
    n_r = cov_chol.shape[-1]
    mean_pop = base[..., list(layout.random)]  # (m, P, R)
    a_inv = np.linalg.inv(cov_chol)  # (m, R, R)
    prec = np.einsum("dki,dkj->dij", a_inv, a_inv)
    post_prec = lam[None] + prec[:, None]  # (m, P, R, R)
    centre = np.linalg.solve(post_prec, (lin[None] + np.einsum("dij,dpj->dpi", prec, mean_pop))[..., None])[..., 0]
    chol = np.linalg.cholesky(post_prec)
    chol_t_inv = np.linalg.inv(np.swapaxes(chol, -1, -2))  # u - centre = chol^-T y has scale matrix post_prec^-1
    y = rng.standard_normal((m, n_sim, n_p, n_r)) * np.sqrt(_T_DOF / rng.chisquare(_T_DOF, (m, n_sim, n_p)))[..., None]
    u = centre[:, None] + np.einsum("dpij,dspj->dspi", chol_t_inv, y)
    # multivariate t log density (Kotz & Nadarajah 2004, Multivariate t Distributions, eq. 1.1)
    log_q = (math.lgamma((_T_DOF + n_r) / 2) - math.lgamma(_T_DOF / 2) - n_r / 2 * math.log(_T_DOF * math.pi)
             + np.log(np.diagonal(chol, axis1=-2, axis2=-1)).sum(axis=-1)[:, None]
             - (_T_DOF + n_r) / 2 * np.log1p(np.einsum("dspi,dspi->dsp", y, y) / _T_DOF))
    e = np.einsum("dij,dspj->dspi", a_inv, u - mean_pop[:, None])
    log_g = (-0.5 * np.einsum("dspi,dspi->dsp", e, e) - n_r / 2 * math.log(2 * math.pi)
             - np.log(np.diagonal(cov_chol, axis1=-2, axis2=-1)).sum(axis=-1)[:, None, None])
    return _loglik(data, layout, base[:, None], u) + log_g - log_q


def person_loo(result: Any, *, n_sim: int = 200, max_draws: int | None = 400, random_seed: int = 0, seed: Any = NOT_GIVEN,
               return_estimate: bool = False, progressbar: bool | None = None, label: str = "person LOO") -> Any:
    r"""PSIS-LOO over persons: :func:`arviz.loo` on :func:`person_log_marginal`.

    The relative efficiency is computed by ArviZ from the (thinned) population
    posterior. Each person's LOO term :math:`\log \sum_d a_{nd} L_n(\theta^{(d)})` (PSIS weights
    :math:`a_{nd}`) is a smooth function of the :math:`D` estimates, which carry independent errors of
    standard error :math:`\sigma_{nd}` (``mc_se``): to second order (delta method) the term then has Monte Carlo
    variance :math:`\sum_d a_{nd}^2 \sigma_{nd}^2` and is biased down by
    :math:`\tfrac12 \sum_d a_{nd}(1 - a_{nd}) \sigma_{nd}^2`. That bias is removed (each value handed to ArviZ
    is raised by :math:`\tfrac12 (1 - a_{nd}) \sigma_{nd}^2`) and the Monte Carlo standard error of the total,
    :math:`\sqrt{\sum_n \sum_d a_{nd}^2 \sigma_{nd}^2}`, is returned as ``elpd_mc_se`` in the result
    (and per person as ``loo_mc_se`` in the estimate). With ``return_estimate`` the marginal-likelihood
    Dataset is returned too, as ``(loo, estimate)``. ``progressbar`` and ``label``: see
    :func:`person_log_marginal` (None: a progress bar in interactive use only).
    """
    seed = aliased("random_seed", random_seed, "seed", seed, 0)
    import arviz as az

    est = person_log_marginal(result, n_sim=n_sim, max_draws=max_draws, seed=seed, progressbar=progressbar,
                              label=label)
    post = thin_draws(result.idata.posterior, max_draws)
    pop = post[[v for v in POPULATION_VARS if v in post]]
    value = est["log_marginal"].stack(sample=("chain", "draw")).transpose("person", "sample")
    var = est["mc_se"].stack(sample=("chain", "draw")).transpose("person", "sample").values ** 2
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        log_a, _ = az.psislw(-value.values)  # (P, D), normalised over the draws
    a = np.exp(log_a)
    adjusted = value.copy(data=value.values + 0.5 * (1 - a) * var).unstack("sample").transpose(*est["mc_se"].dims)
    idata = az.InferenceData(posterior=pop, log_likelihood=xr.Dataset({PERSON_LOGLIK: adjusted}))
    loo = _loo(idata, PERSON_LOGLIK)
    per_person = np.sqrt((a**2 * var).sum(axis=1))
    loo["elpd_mc_se"] = float(np.sqrt((per_person**2).sum()))
    est["loo_mc_se"] = ("person", per_person)
    est.attrs["elpd_mc_se"] = loo["elpd_mc_se"]
    return (loo, est) if return_estimate else loo


def _obs_labels(loo: Any) -> list[str]:
    loo_i = loo["loo_i"]
    if "obs_person" in loo_i.coords and "obs_task" in loo_i.coords:
        return [f"person {p} task {t}" for p, t in zip(loo_i["obs_person"].values, loo_i["obs_task"].values)]
    dim = loo_i.dims[0]
    return [f"{dim} {v}" for v in loo_i[dim].values]


def pareto_k_checks(loo: Any, level: str) -> list[Check]:
    """Pareto k records of a PSIS-LOO result (``level``: "task" or "person"; a label for the text).

    Verdict ``pass`` when every :math:`\\hat k` is at most ArviZ's ``good_k``
    (:math:`\\min(1 - 1/\\log_{10} S, 0.7)` for :math:`S` draws), ``warn`` when some
    exceed it, ``fail`` when some exceed 1 (that observation's LOO term is then
    unusable). These records judge the LOO estimate, not the fit's convergence.
    """
    k = np.asarray(loo["pareto_k"]).ravel()
    good = float(loo["good_k"])
    worst = float(np.max(k)) if k.size else math.nan
    bad = np.nonzero(k > good)[0]
    labels = _obs_labels(loo)
    if bad.size == 0:
        verdict, advice = "pass", ""
    else:
        verdict = "fail" if worst > PARETO_K_UNUSABLE else "warn"
        shown = first_few([labels[i] for i in bad[np.argsort(-k[bad])]])
        if level == "task":
            advice = (f"{bad.size} of {k.size} tasks have Pareto k > {good:.2f} (worst {worst:.2f}: {shown}); "
                      "their LOO terms are unreliable. Each person has their own tastes, so with few tasks per "
                      "person leaving one out moves them a lot. Prefer person-level LOO or holdout validation "
                      "for these comparisons.")
        else:
            advice = (f"{bad.size} of {k.size} persons have Pareto k > {good:.2f} (worst {worst:.2f}: {shown}): "
                      "the population posterior changes much without them. Look at their choices (outliers, "
                      "straight-lining); compare with holdout validation; more posterior draws or n_sim "
                      "can help when k is only slightly high.")
    return [Check("pareto_k", f"{level}-level LOO", worst, good, f"every Pareto k <= {good:.2f}", verdict, advice,
                  _REF_PSIS, f"{bad.size} of {k.size} over {good:.2f}")]


def compare_models(models: Mapping[str, Any], *, level: str = "task", n_sim: int = 200,
                   max_draws: int | None = 400, random_seed: int = 0, seed: Any = NOT_GIVEN, progressbar: bool | None = None) -> pd.DataFrame:
    """Compare fits of the same panel by PSIS-LOO with :func:`arviz.compare`.

    Parameters
    ----------
    models : mapping of name to ChoiceFit (or precomputed arviz.ELPDData)
    level : {"task", "person"}, default "task"
        :func:`task_loo` (a new task of a known person) or :func:`person_loo`
        (a new person).
    n_sim, max_draws, seed
        For the person level (see :func:`person_log_marginal`).
    progressbar : bool or None, default None
        At the person level, a progress bar per model on standard error; None shows it in interactive use
        only (a terminal or a Jupyter kernel).

    Returns
    -------
    DataFrame
        ArviZ's comparison table (``rank``, ``elpd_loo``, ``p_loo``, ``elpd_diff``,
        ``weight``, ``se``, ``dse``, ``warning``, ``scale``) with ``n_bad_k`` (how
        many Pareto k exceed ``good_k``), ``max_k`` and ``good_k`` added.
    """
    seed = aliased("random_seed", random_seed, "seed", seed, 0)
    import arviz as az

    if level not in ("task", "person"):
        raise SpecError(f"compare_models(level={level!r}) must be 'task' or 'person'.")
    if len(models) < 2:
        raise SpecError(f"compare_models needs at least two models, got {len(models)}: {list(models)}.")
    loos: dict[str, Any] = {}
    for name, model in models.items():
        if isinstance(model, az.ELPDData):
            loos[name] = model
        elif level == "task":
            loos[name] = task_loo(model)
        else:
            loos[name] = person_loo(model, n_sim=n_sim, max_draws=max_draws, seed=seed, progressbar=progressbar,
                                    label=f"person LOO of {name!r}")
    sizes = {name: int(loo["n_data_points"]) for name, loo in loos.items()}
    if len(set(sizes.values())) > 1:
        raise FitError(
            f"compare_models: the models were scored on different data ({level}s per model: {sizes}); "
            "compare fits of the same panel only."
        )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        table = az.compare(loos, ic="loo")
    for name, loo in loos.items():
        k = np.asarray(loo["pareto_k"]).ravel()
        table.loc[name, "n_bad_k"] = int((k > float(loo["good_k"])).sum())
        table.loc[name, "max_k"] = float(k.max())
        table.loc[name, "good_k"] = float(loo["good_k"])
    table["n_bad_k"] = table["n_bad_k"].astype(int)
    return table
