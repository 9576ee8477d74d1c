r"""Prior and likelihood sensitivity by power-scaling, without refitting.

Kallioinen, Paananen, Bürkner & Vehtari (2024), "Detecting and diagnosing prior and likelihood sensitivity with
power-scaling", *Statistics and Computing* 34:57. The prior (or the likelihood) is raised to a power
:math:`\alpha` near 1,

.. math:: p_\alpha(\theta \mid y) \propto p(\theta)^{\alpha}\, p(y \mid \theta),

and the posterior draws are importance-weighted by :math:`p(\theta)^{\alpha - 1}` (Pareto-smoothed; Vehtari,
Simpson, Gelman, Yao & Gabry 2024, JMLR 25:72) instead of refitting. For each population parameter the
cumulative Jensen–Shannon distance (Nguyen & Vreeken 2015) between the base and the weighted posterior is
computed at :math:`\alpha = 1/(1+\delta)` and :math:`\alpha = 1+\delta`, and the sensitivity is the paper's
finite-difference derivative with respect to :math:`\log_2\alpha`:

.. math:: \frac{\mathrm{CJS}(\alpha = 1/(1+\delta)) + \mathrm{CJS}(\alpha = 1+\delta)}{2\log_2(1+\delta)}.

Only the population priors are scaled (means, SDs, the correlation matrix's LKJ, covariate effects), as the paper
recommends for hierarchical models; the persons' tastes keep their population distribution. The log prior of each
draw is computed here from the reported draws and the spec (:func:`population_log_prior`), not read from the
sampler, so NUTS and blocked fits are treated alike. The likelihood is the task-level log-likelihood summed over
tasks (``log_likelihood`` group of the fit).

Diagnosis (the paper's Section 4, threshold 0.05): prior sensitivity :math:`\ge 0.05` with likelihood sensitivity
:math:`< 0.05` is a *prior-dominated* parameter (strong prior or weak likelihood); both :math:`\ge 0.05` is a
*prior-data conflict*.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from .._records import Check
from ..model.build import ModelLayout, prior_scales

__all__ = ["SENSITIVITY_THRESHOLD", "DELTA", "cjs_distance", "power_scale_log_weights", "power_scaling_sensitivity",
           "population_log_prior", "population_draws", "sensitivity_table", "sensitivity_checks"]

#: The paper's threshold on the power-scaling sensitivity (Kallioinen et al. 2024, Section 4; their software's
#: default). A parameter whose posterior moves by a cumulative Jensen-Shannon distance of 0.05 per doubling of the
#: prior's power is called sensitive.
SENSITIVITY_THRESHOLD = 0.05
#: Power-scaling step: alpha = 1/(1 + DELTA) and 1 + DELTA (the paper's default).
DELTA = 0.01
_REF = ("Kallioinen, Paananen, Bürkner & Vehtari 2024, Statistics and Computing 34:57 (power-scaling sensitivity, "
        "threshold 0.05)")


def cjs_distance(draws: np.ndarray, weights: np.ndarray) -> float:
    r"""Cumulative Jensen–Shannon distance between the equal-weight and the ``weights``-weighted ECDF of ``draws``.

    With :math:`P` the ECDF of the draws and :math:`Q` the weighted one, both integrated over the range of the
    draws (Nguyen & Vreeken 2015; Kallioinen et al. 2024, eq. 7):

    .. math:: \mathrm{CJS}(P\Vert Q) = \int P\log_2\frac{2P}{P+Q}\,dx + \frac{1}{2\ln 2}\int (Q - P)\,dx,
              \qquad D = \sqrt{\frac{\mathrm{CJS}(P\Vert Q) + \mathrm{CJS}(Q\Vert P)}{\int P\,dx + \int Q\,dx}}.

    The distance is computed on the draws and on their negatives (the survival functions) and the larger is
    returned, as the paper does, so that a shift in either tail counts.
    """
    x = np.asarray(draws, dtype=float)
    w = np.asarray(weights, dtype=float)
    return max(_cjs(x, w), _cjs(-x, w))


def _cjs(x: np.ndarray, w: np.ndarray) -> float:
    order = np.argsort(x, kind="stable")
    x, w = x[order], w[order]
    width = np.diff(x)  # (S - 1,)
    n = x.size
    p = np.arange(1, n) / n  # the base ECDF at the right of each draw but the last
    q = np.cumsum(w / w.sum())[:-1]
    m = 0.5 * (p + q)

    def plogp(a: np.ndarray) -> np.ndarray:
        return np.where(a > 0, a * np.log2(np.where(a > 0, a, 1.0)), 0.0)

    int_p, int_q = float(width @ p), float(width @ q)
    # P log2(P / M) written with the convention 0 log 0 = 0
    pq = float(width @ (plogp(p) - p * np.log2(np.where(m > 0, m, 1.0)))) + (int_q - int_p) / (2 * np.log(2))
    qp = float(width @ (plogp(q) - q * np.log2(np.where(m > 0, m, 1.0)))) + (int_p - int_q) / (2 * np.log(2))
    bound = int_p + int_q
    if bound <= 0:
        return 0.0
    return float(np.sqrt((max(pq, 0.0) + max(qp, 0.0)) / bound))


def power_scale_log_weights(log_component: np.ndarray, alpha: float) -> tuple[np.ndarray, float]:
    """Pareto-smoothed, normalised log weights of power-scaling a component by ``alpha``, and their Pareto k.

    The raw log weights are :math:`(\\alpha - 1) \\log p(\\cdot)` of each draw (``log_component``: the log prior or
    the log-likelihood, shape (draw,)); they are smoothed with PSIS (arviz ``psislw``).
    """
    import arviz as az

    lw, k = az.psislw((alpha - 1.0) * np.asarray(log_component, dtype=float))
    return np.asarray(lw), float(k)


def power_scaling_sensitivity(draws: np.ndarray, log_component: np.ndarray,
                              delta: float = DELTA) -> tuple[np.ndarray, float]:
    r"""The power-scaling sensitivity of every column of ``draws`` to the component ``log_component``.

    Parameters
    ----------
    draws : (draw, parameter) array
        Posterior draws (chains stacked).
    log_component : (draw,) array
        The log prior or the log-likelihood of each draw.
    delta : float, default 0.01

    Returns
    -------
    sensitivity : (parameter,) array
        :math:`(D_{1/(1+\delta)} + D_{1+\delta}) / (2 \log_2(1+\delta))` with :math:`D` the
        :func:`cjs_distance` of each parameter's draws under the scaled weights.
    pareto_k : float
        The larger Pareto k of the two sets of weights (reliable below
        :math:`\min(1 - 1/\log_{10} S, 0.7)`; Vehtari et al. 2024).
    """
    x = np.asarray(draws, dtype=float)
    x = x[:, None] if x.ndim == 1 else x
    total = np.zeros(x.shape[1])
    ks = []
    for alpha in (1.0 / (1.0 + delta), 1.0 + delta):
        lw, k = power_scale_log_weights(log_component, alpha)
        w = np.exp(lw - lw.max())
        ks.append(k)
        total += np.array([cjs_distance(x[:, j], w) for j in range(x.shape[1])])
    return total / (2 * np.log2(1.0 + delta)), max(ks)


def population_draws(result: Any) -> pd.DataFrame:
    """The population parameters' draws (chains stacked) as a (draw, parameter) table in the reported units.

    Columns ``taste_mean[a]``, ``taste_sd[a]``, ``taste_corr[a,b]`` (upper triangle) and
    ``covariate_effect[z,a]``, the names the convergence checks use.
    """
    post = result.posterior
    cols: dict[str, np.ndarray] = {}
    if "taste_mean" in post:
        tm = post["taste_mean"].stack(sample=("chain", "draw")).transpose("attribute", "sample")
        for a, v in zip(tm["attribute"].values, tm.values):
            cols[f"taste_mean[{a}]"] = v
    if "taste_sd" in post:
        ts = post["taste_sd"].stack(sample=("chain", "draw")).transpose("random_attribute", "sample")
        for a, v in zip(ts["random_attribute"].values, ts.values):
            cols[f"taste_sd[{a}]"] = v
    if "taste_corr" in post:
        tc = post["taste_corr"].stack(sample=("chain", "draw")).transpose(..., "sample")
        names = list(tc[tc.dims[0]].values)
        for i in range(len(names)):
            for j in range(i + 1, len(names)):
                cols[f"taste_corr[{names[i]},{names[j]}]"] = tc.values[i, j]
    if "covariate_effect" in post:
        ce = post["covariate_effect"].stack(sample=("chain", "draw")).transpose("covariate", "shifted_attribute",
                                                                               "sample")
        for i, z in enumerate(ce["covariate"].values):
            for j, a in enumerate(ce["shifted_attribute"].values):
                cols[f"covariate_effect[{z},{a}]"] = ce.values[i, j]
    return pd.DataFrame(cols)


def population_log_prior(result: Any) -> np.ndarray:
    r"""The log prior density of the population parameters at each draw (chains stacked), up to a constant.

    The model's priors (:func:`hierchoice.model.build.prior_scales`) written on the internal scale, the draws
    mapped back to it from the reported ones with the same unit factors :func:`hierchoice.model.build_model`
    uses:

    .. math:: \sum_k \log N(\tilde\mu_k; 0, m_k) + \sum_r \log \mathrm{HalfNormal}(\tilde\sigma_r; s_r)
              + (\eta - 1)\log\det\Omega + \sum \log N(\tilde\gamma; 0, g),

    with :math:`\Omega` the correlation matrix (LKJ(:math:`\eta`) density, Lewandowski, Kurowicka & Joe 2009).
    The density is that of :math:`(\mu, \sigma, \Omega, \gamma)` as the docs state the prior; the constant
    Jacobians of the unit change cancel in the normalised weights.
    """
    layout: ModelLayout = result.layout
    priors = prior_scales(layout, result.spec.model.prior_scale)
    post = result.posterior
    n_k = len(layout.terms)
    lognormal = np.array([layout.is_lognormal(k) for k in range(n_k)])
    unit = np.array([layout.unit_factor(k) for k in range(n_k)])
    shift = np.array([layout.log_shift(k) for k in range(n_k)])

    def stacked(name: str) -> np.ndarray:
        da = post[name].stack(sample=("chain", "draw"))
        return np.moveaxis(da.transpose(..., "sample").values, -1, 0)  # (sample, ...)

    tm = stacked("taste_mean").reshape(-1, n_k)
    mu = np.where(lognormal, tm - shift, tm / unit)
    out = -0.5 * np.sum((mu / priors.mean_sd) ** 2, axis=1)
    rnd = list(layout.random)
    if rnd and "taste_sd" in post:
        r_unit = np.where(lognormal[rnd], 1.0, unit[rnd])
        sd = stacked("taste_sd").reshape(-1, len(rnd)) / r_unit
        out += np.where(np.all(sd > 0, axis=1), -0.5 * np.sum((sd / priors.sd_sd) ** 2, axis=1), -np.inf)
        if layout.correlated and "taste_corr" in post:
            _, logdet = np.linalg.slogdet(stacked("taste_corr"))
            out += (priors.lkj_eta - 1.0) * logdet
    if layout.shifted and "covariate_effect" in post:
        s_idx = list(layout.shifted)
        g_unit = np.where(lognormal[s_idx], 1.0, unit[s_idx])[None, :] / layout.z_scale[:, None]
        gamma = stacked("covariate_effect") / g_unit[None]
        out += -0.5 * np.sum((gamma / priors.covariate_sd) ** 2, axis=(1, 2))
    return out


def _log_likelihood(result: Any) -> np.ndarray | None:
    """The panel log-likelihood of each draw (chains stacked), or None when the fit has no person draws."""
    idata = result.idata
    if "log_likelihood" in idata.groups() and "chosen" in idata.log_likelihood:
        ll = idata.log_likelihood["chosen"]
    elif result.has_person_draws:
        from ..inference.sampling import task_log_likelihood

        ll = task_log_likelihood(result)
    else:
        return None
    total = ll.sum([d for d in ll.dims if d not in ("chain", "draw")])
    return np.asarray(total.stack(sample=("chain", "draw")).values, dtype=float)


def sensitivity_table(result: Any, *, delta: float = DELTA) -> pd.DataFrame:
    """Prior and likelihood power-scaling sensitivity of every population parameter of a fit.

    Returns
    -------
    pandas.DataFrame
        Indexed by ``parameter`` (``taste_sd[asc:b]``...), with ``prior`` and ``likelihood`` (the sensitivities;
        ``likelihood`` is NaN when the fit stores no person draws), ``diagnosis`` (``"prior-dominated"``,
        ``"prior-data conflict"``, ``"prior-sensitive"`` when there is no likelihood, or ``""``),
        ``pareto_k_prior``, ``pareto_k_likelihood``;
        ``attrs`` hold ``threshold``, ``delta`` and ``k_threshold``.
    """
    draws = population_draws(result)
    lp = population_log_prior(result)
    prior, k_prior = power_scaling_sensitivity(draws.values, lp, delta)
    ll = _log_likelihood(result)
    if ll is not None:
        lik, k_lik = power_scaling_sensitivity(draws.values, ll, delta)
    else:
        lik, k_lik = np.full(draws.shape[1], np.nan), np.nan
    out = pd.DataFrame({"prior": prior, "likelihood": lik}, index=pd.Index(draws.columns, name="parameter"))
    t = SENSITIVITY_THRESHOLD
    lik_says = np.where(out["likelihood"].isna(), "prior-sensitive",  # no likelihood: cannot tell which
                        np.where(out["likelihood"] >= t, "prior-data conflict", "prior-dominated"))
    out["diagnosis"] = np.where(out["prior"] >= t, lik_says, "")
    out["pareto_k_prior"] = k_prior
    out["pareto_k_likelihood"] = k_lik
    n = draws.shape[0]
    out.attrs.update(threshold=t, delta=delta, k_threshold=min(1 - 1 / np.log10(n), 0.7) if n > 10 else 0.7)
    return out


_ADVICE = {
    "prior-sensitive": ("prior-sensitive: the prior moves this number (prior sensitivity {p:.3f} >= {t}); the fit "
                        "stores no person draws, so the likelihood's share is unknown. Widen the prior "
                        "(model.prior_scale) or collect more persons."),
    "prior-dominated": ("prior-dominated: the prior, not the data, sets this number (prior sensitivity {p:.3f} >= "
                        "{t}, likelihood sensitivity {lk:.3f} < {t}). Widen the prior (model.prior_scale) or collect "
                        "more persons; read the number as the prior's."),
    "prior-data conflict": ("prior-data conflict: both the prior ({p:.3f}) and the data ({lk:.3f}) move this number "
                            "(>= {t}); the data pull against the prior, which still moves the reported number. "
                            "Check the prior in your units (the report's prior table); widen the prior "
                            "(model.prior_scale) or collect more persons."),
}


def sensitivity_checks(table: pd.DataFrame) -> list[Check]:
    """One graded record per population parameter from :func:`sensitivity_table` (warn when sensitive)."""
    t = float(table.attrs.get("threshold", SENSITIVITY_THRESHOLD))
    k_max = float(table.attrs.get("k_threshold", 0.7))
    out = []
    for name, row in table.iterrows():
        diag = str(row["diagnosis"])
        lk = float(row["likelihood"])
        detail = (f"likelihood sensitivity {lk:.3f}; Pareto k {row['pareto_k_prior']:.2f} (prior), "
                  f"{row['pareto_k_likelihood']:.2f} (likelihood)")
        if max(row["pareto_k_prior"], np.nan_to_num(row["pareto_k_likelihood"])) > k_max:
            detail += f"; a Pareto k over {k_max:.2f}: the importance weights are unreliable, treat as a rough guide"
        out.append(Check(
            check="prior_sensitivity", subject=str(name), value=float(row["prior"]), threshold=t,
            rule=f"value < {t:g} (prior sensitivity)", verdict="warn" if diag else "pass",
            advice=_ADVICE[diag].format(p=float(row["prior"]), lk=lk, t=t) if diag else "",
            reference=_REF, detail=detail,
        ))
    return out
