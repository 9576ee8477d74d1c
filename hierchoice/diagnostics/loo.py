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

estimated by simulation (Train 2009, *Discrete Choice Methods with Simulation*,
2nd ed., ch. 10; Merkle, Furr & Rabe-Hesketh 2019, *Psychometrika* 84(3), on
using marginal rather than conditional likelihoods to compare latent-variable
models):

.. math::

    \log \hat L_n(\theta) = \log \frac1S \sum_{s=1}^S \prod_t P_{nt}(\beta^{(s)}),
    \qquad \beta^{(s)} \sim g(\beta \mid \theta, z_n)\ \text{i.i.d.}

:math:`\hat L_n` is unbiased for :math:`L_n`; its logarithm is biased downwards by
about :math:`c^2/(2S)` and has variance about :math:`c^2/S` (delta method), where
:math:`c^2 = \operatorname{Var}_g[\prod_t P_{nt}(\beta)] / L_n^2` is the squared
coefficient of variation of the simulated likelihoods, estimated from the same
:math:`S` values. :func:`person_log_marginal` returns that Monte Carlo standard
error with the estimate; raise ``n_sim`` until it is small against the LOO
standard error. This answers "how well does the model predict *a new person*
from the same population" — what a market simulation does.

:func:`compare_models` puts several fits into :func:`arviz.compare` at either
level, with the Pareto :math:`\hat k` diagnostics (Vehtari, Simpson, Gelman, Yao &
Gabry 2024, *JMLR* 25(72)) counted in the table and :func:`pareto_k_checks`
turning them into :class:`hierchoice.checks.Check` records.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Mapping
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from .._args import whole_number
from .._records import Check
from ..exceptions import FitError, SpecError, first_few
from ..inference.results import thin_draws
from ..model.build import POPULATION_VARS
from ..model.likelihood import difference_data, task_loglik_numpy
from ..model.transforms import latent_to_coefficient

__all__ = ["PERSON_LOGLIK", "PARETO_K_UNUSABLE", "task_loo", "person_log_marginal", "person_loo", "pareto_k_checks",
           "compare_models"]

_REF_PSIS = "Vehtari, Simpson, Gelman, Yao & Gabry (2024), JMLR 25(72)"
#: Pareto k above this: the importance ratios have no finite mean and the LOO term is unusable.
PARETO_K_UNUSABLE = 1.0
_BLOCK_CELLS = 4_000_000
#: Name of the person-level log-likelihood variable handed to ArviZ.
PERSON_LOGLIK = "person_marginal"


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


def _population_tastes(layout: Any, mean: np.ndarray, sd: np.ndarray | None, chol: np.ndarray | None,
                       shift: np.ndarray | None, e: np.ndarray) -> np.ndarray:
    """Tastes in the user's units from population parameters and standard-normal draws.

    Shapes: ``mean`` (d, K); ``sd`` (d, R); ``chol`` (d, R, R) or None; ``shift``
    (d, P, K) or None; ``e`` (d, S, P, R). Returns (d, S, P, K).
    """
    d, s, p, _ = e.shape
    n_k = mean.shape[1]
    theta = np.broadcast_to(mean[:, None, None, :], (d, s, p, n_k)).copy()
    if shift is not None:
        theta += shift[:, None, :, :]
    rnd = list(layout.random)
    if rnd:
        dev = np.einsum("dspr,dqr->dspq", e, chol) if chol is not None else e
        theta[..., rnd] += dev * sd[:, None, None, :]
    return latent_to_coefficient(theta, layout.taste_map)


def person_log_marginal(result: Any, *, n_sim: int = 200, max_draws: int | None = 400, seed: int = 0) -> xr.Dataset:
    r"""Simulated log marginal likelihood of each person at each posterior draw of the population.

    See the module docstring for the estimator

    .. math:: \log \hat L_n(\theta^{(d)}) = \log \frac1S \sum_{s=1}^S \prod_t P_{nt}(\beta^{(s)})

    and its Monte Carlo error.

    Parameters
    ----------
    result : ChoiceFit
    n_sim : int, default 200
        Simulated tastes :math:`S` per person and draw (fresh for every draw).
    max_draws : int or None, default 400
        Thin the posterior to at most this many draws over all chains (evenly, the
        same draws in every chain); None keeps all.
    seed : int, default 0

    Returns
    -------
    Dataset, dims (chain, draw, person)
        ``log_marginal`` and ``mc_se`` (delta-method standard error of each value,
        :math:`\sqrt{\hat c^2/S}`).
    """
    whole_number(n_sim, "person_log_marginal(n_sim=...)", minimum=2)
    panel, layout = result.panel, result.layout
    post = thin_draws(result.idata.posterior, max_draws)
    if "taste_mean" not in post:
        raise FitError("person_log_marginal needs the posterior population means ('taste_mean'); this fit has none.")
    n_c, n_d = post.sizes["chain"], post.sizes["draw"]
    names, rnames = layout.names, layout.random_names
    mean = post["taste_mean"].sel(attribute=names).transpose("chain", "draw", "attribute").values
    mean = mean.reshape(n_c * n_d, len(names))
    n_r = len(rnames)
    sd = chol = shift = None
    if n_r:
        sd = post["taste_sd"].sel(random_attribute=rnames).transpose("chain", "draw", "random_attribute").values
        sd = sd.reshape(n_c * n_d, n_r)
        if "taste_corr" in post:
            corr = post["taste_corr"].transpose("chain", "draw", "random_attribute", "random_attribute_bis").values
            corr = corr.reshape(n_c * n_d, n_r, n_r)
            chol = np.linalg.cholesky(corr + 1e-10 * np.eye(n_r))
    if layout.shifted and "covariate_effect" in post:
        g = post["covariate_effect"].transpose("chain", "draw", "covariate", "shifted_attribute").values
        g = g.reshape((n_c * n_d,) + g.shape[2:])
        z = panel.Z - layout.z_mean[None, :]  # (P, C)
        shift = np.zeros((n_c * n_d, panel.n_persons, len(names)))
        shift[..., list(layout.shifted)] = np.einsum("pc,dck->dpk", z, g)
    data = difference_data(panel.X, panel.available, panel.task_mask, panel.chosen)
    rng = np.random.default_rng(seed)
    n_all = n_c * n_d
    out = np.empty((n_all, panel.n_persons))
    se = np.empty((n_all, panel.n_persons))
    per_draw = n_sim * data.D.shape[1] * data.D.shape[2]
    step = max(1, _BLOCK_CELLS // max(1, per_draw))
    for d0 in range(0, n_all, step):
        sl = slice(d0, min(d0 + step, n_all))
        m = sl.stop - sl.start
        e = rng.standard_normal((m, n_sim, panel.n_persons, n_r))
        beta = _population_tastes(layout, mean[sl], None if sd is None else sd[sl],
                                  None if chol is None else chol[sl], None if shift is None else shift[sl], e)
        ll = task_loglik_numpy(data, beta).sum(axis=-1)  # (m, S, P)
        top = ll.max(axis=1, keepdims=True)
        w = np.exp(ll - top)
        w_mean = w.mean(axis=1)
        out[sl] = top[:, 0, :] + np.log(w_mean)
        se[sl] = np.sqrt(w.var(axis=1, ddof=1) / n_sim) / w_mean
    coords = {"chain": post["chain"].values, "draw": post["draw"].values, "person": list(panel.persons)}
    dims = ("chain", "draw", "person")
    return xr.Dataset(
        {"log_marginal": (dims, out.reshape(n_c, n_d, -1)), "mc_se": (dims, se.reshape(n_c, n_d, -1))},
        coords=coords, attrs={"n_sim": n_sim, "seed": seed},
    )


def person_loo(result: Any, *, n_sim: int = 200, max_draws: int | None = 400, seed: int = 0,
               return_estimate: bool = False) -> Any:
    """PSIS-LOO over persons: :func:`arviz.loo` on :func:`person_log_marginal`.

    The relative efficiency is computed by ArviZ from the (thinned) population
    posterior. With ``return_estimate`` the marginal-likelihood Dataset (with its
    Monte Carlo errors) is returned too, as ``(loo, estimate)``.
    """
    import arviz as az

    est = person_log_marginal(result, n_sim=n_sim, max_draws=max_draws, seed=seed)
    post = thin_draws(result.idata.posterior, max_draws)
    pop = post[[v for v in POPULATION_VARS if v in post]]
    idata = az.InferenceData(posterior=pop, log_likelihood=xr.Dataset({PERSON_LOGLIK: est["log_marginal"]}))
    loo = _loo(idata, PERSON_LOGLIK)
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
                   max_draws: int | None = 400, seed: int = 0) -> pd.DataFrame:
    """Compare fits of the same panel by PSIS-LOO with :func:`arviz.compare`.

    Parameters
    ----------
    models : mapping of name to ChoiceFit (or precomputed arviz.ELPDData)
    level : {"task", "person"}, default "task"
        :func:`task_loo` (a new task of a known person) or :func:`person_loo`
        (a new person).
    n_sim, max_draws, seed
        For the person level (see :func:`person_log_marginal`).

    Returns
    -------
    DataFrame
        ArviZ's comparison table (``rank``, ``elpd_loo``, ``p_loo``, ``elpd_diff``,
        ``weight``, ``se``, ``dse``, ``warning``, ``scale``) with ``n_bad_k`` (how
        many Pareto k exceed ``good_k``), ``max_k`` and ``good_k`` added.
    """
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
            loos[name] = person_loo(model, n_sim=n_sim, max_draws=max_draws, seed=seed)
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
