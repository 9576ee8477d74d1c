r"""Population and individual tastes: what the posterior says about people's preferences.

Three views of a fitted :class:`~hierchoice.fit.ChoiceFit`, each a tidy, labelled
table (or an xarray object to compose further):

* :func:`population_tastes` — per attribute, the posterior of the population
  mean and SD of the taste, the **implied distribution of the coefficient
  across people** (its mean, median, SD, quantiles and the share of people with
  a positive coefficient), the correlations between random tastes and the
  covariate effects, each with a highest-density interval (HDI, ``az.hdi``) and
  an equal-tailed interval (ETI).
* :func:`person_tastes` — each respondent's posterior mean and intervals of
  their own coefficients (one row per person and attribute; ``.to_csv`` it).
* :func:`taste_shrinkage` — how far each person's estimate is pulled towards
  the population: the spread of the person means against the population SD.

For an attribute with taste :math:`\beta_{nk}` across people :math:`n`:

.. math::

    \text{normal:}\quad \beta_{nk} \sim N(\mu_k, \sigma_k), \qquad
    \text{lognormal:}\quad \beta_{nk} = s_k e^{\eta_{nk}},\ \eta_{nk} \sim N(\mu_k, \sigma_k),

so the implied mean across people is :math:`\mu_k` (normal) or
:math:`s_k e^{\mu_k + \sigma_k^2/2}` (lognormal), the median :math:`\mu_k` or
:math:`s_k e^{\mu_k}`, the :math:`q`-quantile :math:`\mu_k + \sigma_k z_q` or
:math:`s_k e^{\mu_k + \sigma_k z_{q'}}` (:math:`q' = q` for :math:`s_k > 0`, else
:math:`1-q`), and the share with a positive coefficient
:math:`\Phi(\mu_k/\sigma_k)` (normal) or 0/1 by sign (lognormal). Every one of
these is computed draw by draw, so its posterior interval carries the
uncertainty of :math:`\mu_k` and :math:`\sigma_k` together (Train 2009,
*Discrete Choice Methods with Simulation*, 2nd ed., ch. 6 and 12).

With person covariates, ``taste_mean`` is the population mean at the
sample-average covariates, so the implied distribution here is that of a person
with average covariates. :func:`simulate_population_tastes` draws new people
from the whole population instead (covariates resampled from the panel); the
willingness-to-pay and market-share modules build on it.

In willingness-to-pay space the population distribution of every attribute but
price describes the willingness to pay itself; the ``scale`` column says which.
"""

from __future__ import annotations

import logging
from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from .._args import NOT_GIVEN, aliased, whole_number
from ..exceptions import FitError, SpecError
from ..inference.results import ChoiceFit, FitLike, as_fit, lend, thin_draws
from ..model.transforms import latent_to_coefficient

__all__ = [
    "DEFAULT_PROB",
    "check_prob",
    "summarize_draws",
    "population_taste_draws",
    "population_tastes",
    "person_tastes",
    "person_latent_draws",
    "taste_shrinkage",
    "simulate_population_tastes",
]

log = logging.getLogger("hierchoice")

#: Default probability mass of every credible interval.
DEFAULT_PROB = 0.9

SAMPLE_DIMS = ("chain", "draw")

#: The summary columns every table in tastes / wtp / shares carries, in order.
SUMMARY_COLUMNS = ("mean", "sd", "median", "hdi_low", "hdi_high", "eti_low", "eti_high")


# --------------------------------------------------------------------------- summaries


def check_prob(prob: float) -> float:
    """Check an interval probability: a number strictly between 0 and 1."""
    if isinstance(prob, bool) or not isinstance(prob, (int, float)) or not 0 < prob < 1:
        raise SpecError(f"prob must be a number in (0, 1), e.g. 0.9 for 90 % intervals; got {prob!r}.")
    return float(prob)


def summarize_draws(
    draws: xr.DataArray,
    *,
    prob: float = DEFAULT_PROB,
    sample_dims: Sequence[str] = SAMPLE_DIMS,
    robust: bool | np.ndarray = False,
) -> pd.DataFrame:
    """Summarise posterior draws: mean, SD, median, HDI and equal-tailed interval.

    Parameters
    ----------
    draws : xarray.DataArray
        Draws over ``sample_dims`` and any other (labelled) dims.
    prob : float, default 0.9
        Probability mass of both intervals.
    sample_dims : sequence of str, default ("chain", "draw")
        The dims that index draws; every other dim becomes a column of the result.
    robust : bool or boolean array over the other dims, default False
        Where true, ``mean`` and ``sd`` are left empty (NaN): for quantities with no
        finite moments (a ratio with a denominator near zero) only the median and
        the intervals are meaningful.

    Returns
    -------
    pandas.DataFrame
        One row per combination of the other dims (their labels as columns), then
        ``mean, sd, median, hdi_low, hdi_high, eti_low, eti_high``. The HDI is the
        narrowest interval holding ``prob`` of the draws (``arviz.hdi``); the ETI
        runs from the ``(1 - prob)/2`` to the ``(1 + prob)/2`` quantile.
    """
    import arviz as az

    prob = check_prob(prob)
    sample_dims = tuple(sample_dims)
    missing = [d for d in sample_dims if d not in draws.dims]
    if missing:
        raise SpecError(f"summarize_draws: draws have dims {tuple(draws.dims)}, not the sample dims {missing}.")
    rest = [d for d in draws.dims if d not in sample_dims]
    arr = draws.transpose(*sample_dims, *rest).values.astype(float)
    n_samples = int(np.prod(arr.shape[: len(sample_dims)]))
    flat = arr.reshape((n_samples,) + arr.shape[len(sample_dims):])
    coords = {d: draws[d].values for d in rest if d in draws.coords}
    lo_q, hi_q = (1 - prob) / 2, (1 + prob) / 2
    stats = {
        "mean": flat.mean(axis=0),
        "sd": flat.std(axis=0, ddof=1) if n_samples > 1 else np.zeros(flat.shape[1:]),
        "median": np.median(flat, axis=0),
        "eti_low": np.quantile(flat, lo_q, axis=0),
        "eti_high": np.quantile(flat, hi_q, axis=0),
    }
    hdi_input = xr.DataArray(flat[None], dims=("chain", "draw", *rest), name="x")
    hdi = az.hdi(hdi_input, hdi_prob=prob)["x"]
    stats["hdi_low"] = hdi.sel(hdi="lower").values
    stats["hdi_high"] = hdi.sel(hdi="higher").values
    mask = np.broadcast_to(np.asarray(robust, dtype=bool), flat.shape[1:])
    for key in ("mean", "sd"):
        stats[key] = np.where(mask, np.nan, stats[key])
    if rest:
        index = pd.MultiIndex.from_product(
            [coords.get(d, np.arange(draws.sizes[d])) for d in rest], names=rest
        )
        frame = pd.DataFrame({k: np.asarray(stats[k]).reshape(-1) for k in SUMMARY_COLUMNS}, index=index)
        return frame.reset_index()
    return pd.DataFrame({k: [float(stats[k])] for k in SUMMARY_COLUMNS})


# --------------------------------------------------------------------------- population parameters


def _parameters(result: ChoiceFit, posterior: xr.Dataset | None = None) -> dict[str, Any]:
    """Population parameters as arrays over (chain, draw, attribute) in model order.

    ``sd`` is 0 for fixed tastes; ``corr`` is (chain, draw, random, random) or None;
    ``gamma`` is (chain, draw, covariate, attribute) with zeros for unshifted ones.
    """
    post = result.posterior if posterior is None else posterior
    layout = result.layout
    names = layout.names
    if "taste_mean" not in post:
        raise FitError("The posterior has no taste_mean: this is not a hierchoice fit result.")
    mu = post["taste_mean"].sel(attribute=names).transpose("chain", "draw", "attribute").values
    sd = np.zeros_like(mu)
    if layout.random:
        tsd = post["taste_sd"].sel(random_attribute=layout.random_names)
        sd[..., list(layout.random)] = tsd.transpose("chain", "draw", "random_attribute").values
    corr = None
    if layout.correlated and "taste_corr" in post:
        corr = post["taste_corr"].sel(random_attribute=layout.random_names,
                                      random_attribute_bis=layout.random_names)
        corr = corr.transpose("chain", "draw", "random_attribute", "random_attribute_bis").values
    gamma = None
    if layout.shifted and "covariate_effect" in post:
        ce = post["covariate_effect"].sel(covariate=list(layout.covariates), shifted_attribute=layout.shifted_names)
        gamma = np.zeros(mu.shape[:2] + (len(layout.covariates), len(names)))
        gamma[..., list(layout.shifted)] = ce.transpose("chain", "draw", "covariate", "shifted_attribute").values
    lognormal = np.array([layout.is_lognormal(k) for k in range(len(names))])
    sign = np.array([layout.sign(k) for k in range(len(names))])
    return {"mu": mu, "sd": sd, "corr": corr, "gamma": gamma, "lognormal": lognormal, "sign": sign,
            "chain": post["chain"].values, "draw": post["draw"].values}


def _latent_scale(result: ChoiceFit, k: int) -> str:
    """The quantity the population distribution of attribute ``k`` describes."""
    layout = result.layout
    what = "wtp" if layout.wtp_space and k != layout.price else "coefficient"
    if layout.is_lognormal(k):
        return f"log(-{what})" if layout.sign(k) < 0 else f"log({what})"
    return what


def _value_scale(result: ChoiceFit, k: int) -> str:
    layout = result.layout
    return "wtp" if layout.wtp_space and k != layout.price else "coefficient"


def _quantile_name(q: float) -> str:
    return f"p{100 * q:g}_across_people"


def population_taste_draws(
    result: FitLike, *, quantiles: Sequence[float] = (0.1, 0.9)
) -> xr.Dataset:
    """The implied distribution of each taste across people, draw by draw.

    Returns
    -------
    xarray.Dataset
        Variables over (chain, draw, attribute): ``mean_across_people``,
        ``median_across_people``, ``sd_across_people``, one ``p<q>_across_people``
        per quantile and ``share_positive`` (the share of people whose coefficient,
        or in WTP space willingness to pay, is positive). See the module docstring
        for the formulas.
    """
    result = as_fit(result, "population_taste_draws")
    from scipy import special  # loaded on first use: importing hierchoice stays light

    qs = [float(q) for q in quantiles]
    for q in qs:
        if not 0 < q < 1:
            raise SpecError(f"quantiles must lie in (0, 1); got {q!r}.")
    p = _parameters(result)
    mu, sd, lognormal, sign = p["mu"], p["sd"], p["lognormal"], p["sign"]
    out: dict[str, np.ndarray] = {}
    ln_mean = sign * np.exp(mu + sd**2 / 2)
    out["mean_across_people"] = np.where(lognormal, ln_mean, mu)
    out["median_across_people"] = np.where(lognormal, sign * np.exp(mu), mu)
    out["sd_across_people"] = np.where(lognormal, np.exp(mu + sd**2 / 2) * np.sqrt(np.expm1(sd**2)), sd)
    for q in qs:
        z_up = special.ndtri(q)
        # for a negative sign the q-quantile of s*exp(eta) is -exp(the (1-q)-quantile of eta)
        z_ln = np.where(sign > 0, z_up, -z_up)
        out[_quantile_name(q)] = np.where(lognormal, sign * np.exp(mu + sd * z_ln), mu + sd * z_up)
    with np.errstate(divide="ignore", invalid="ignore"):
        normal_share = np.where(sd > 0, special.ndtr(mu / np.where(sd > 0, sd, 1.0)), (mu > 0).astype(float))
    out["share_positive"] = np.where(lognormal, (sign > 0).astype(float) * np.ones_like(mu), normal_share)
    coords = {"chain": p["chain"], "draw": p["draw"], "attribute": result.layout.names}
    return xr.Dataset({k: (("chain", "draw", "attribute"), v) for k, v in out.items()}, coords=coords)


def population_tastes(
    result: FitLike, *, hdi_prob: float = DEFAULT_PROB, quantiles: Sequence[float] = (0.1, 0.9),
    prob: Any = NOT_GIVEN,
) -> pd.DataFrame:
    """Population tastes with HDI and equal-tailed intervals: one tidy table.

    Parameters
    ----------
    result : ChoiceFit or path
        A fit, or the path of its results folder.
    prob : float, default 0.9
        Probability mass of the intervals.
    quantiles : sequence of float, default (0.1, 0.9)
        Quantiles of the distribution across people to report (besides the median).

    Returns
    -------
    pandas.DataFrame
        Columns ``quantity, attribute, other, scale, mean, sd, median, hdi_low,
        hdi_high, eti_low, eti_high, prob``. ``quantity`` is one of

        ``population_mean`` / ``population_sd``
            The posterior of the taste distribution's parameters :math:`\\mu_k,
            \\sigma_k` (``scale`` says whether of the coefficient or of its log). For a
            lognormal taste they describe the log-taste: :math:`s_k e^{\\mu_k}` is the
            *median* coefficient across people; its mean is ``mean_across_people``.
        ``mean_across_people``, ``median_across_people``, ``sd_across_people``, ``p10_across_people``, ..., ``share_positive``
            The implied distribution of the coefficient across people.
        ``correlation``
            Between the random tastes ``attribute`` and ``other``.
        ``covariate_effect``
            The shift of ``attribute``'s population mean per unit of the
            covariate ``other``.

    Examples
    --------
    >>> table = population_tastes(result)                       # doctest: +SKIP
    >>> table.query("quantity == 'share_positive'")             # doctest: +SKIP
    """
    result = as_fit(result, "population_tastes")
    prob = check_prob(aliased("hdi_prob", hdi_prob, "prob", prob, DEFAULT_PROB))
    layout = result.layout
    post = result.posterior
    pieces: list[pd.DataFrame] = []

    def add(draws: xr.DataArray, quantity: str, rename: dict[str, str], scale: Any) -> None:
        table = summarize_draws(draws, prob=prob).rename(columns=rename)
        table.insert(0, "quantity", quantity)
        if "other" not in table:
            table.insert(2, "other", "")
        table.insert(3, "scale", [scale(a) for a in table["attribute"]] if callable(scale) else scale)
        pieces.append(table)

    index = {name: k for k, name in enumerate(layout.names)}
    add(post["taste_mean"], "population_mean", {}, lambda a: _latent_scale(result, index[a]))
    if "taste_sd" in post:
        add(post["taste_sd"], "population_sd", {"random_attribute": "attribute"},
            lambda a: _latent_scale(result, index[a]))
    implied = population_taste_draws(result, quantiles=quantiles)
    # a fixed taste is one number for everyone: its spread and quantiles would only repeat the mean
    degenerate = [layout.names[k] for k in layout.fixed]
    for name in implied.data_vars:
        scale = "share of people" if name == "share_positive" else (lambda a: _value_scale(result, index[a]))
        draws = implied[name]
        if name not in ("mean_across_people", "share_positive") and degenerate:
            draws = draws.drop_sel(attribute=degenerate)
            if not draws.sizes["attribute"]:
                continue
        add(draws, str(name), {}, scale)
    if "taste_corr" in post:
        corr = post["taste_corr"]
        table = summarize_draws(corr, prob=prob).rename(
            columns={"random_attribute": "attribute", "random_attribute_bis": "other"})
        order = {name: i for i, name in enumerate(corr["random_attribute"].values)}
        table = table[[order[x] < order[y] for x, y in zip(table["attribute"], table["other"])]]
        table.insert(0, "quantity", "correlation")
        table.insert(3, "scale", "correlation of the underlying normals")
        pieces.append(table)
    if "covariate_effect" in post:
        table = summarize_draws(post["covariate_effect"], prob=prob).rename(
            columns={"covariate": "other", "shifted_attribute": "attribute"})
        table = table[["attribute", "other", *SUMMARY_COLUMNS]]
        table.insert(0, "quantity", "covariate_effect")
        table.insert(3, "scale", [f"shift of the mean of {_latent_scale(result, index[a])} per unit"
                                  for a in table["attribute"]])
        pieces.append(table)
    out = pd.concat(pieces, ignore_index=True)
    out = out[["quantity", "attribute", "other", "scale", *SUMMARY_COLUMNS]]
    out["prob"] = prob
    out.attrs["prob"] = prob
    return out


# --------------------------------------------------------------------------- individual tastes


def _person_draws(result: ChoiceFit) -> xr.DataArray:
    return result.person_draws("Individual tastes")


def person_tastes(result: FitLike, *, hdi_prob: float = DEFAULT_PROB, prob: Any = NOT_GIVEN) -> pd.DataFrame:
    """Each person's posterior coefficients: one row per person and attribute.

    The coefficients are in the user's units (in WTP space too: the person's
    :math:`\\lambda_n w_{nk}`). Write it out with ``.to_csv(path, index=False)``;
    ``.pivot(index="person", columns="attribute", values="mean")`` gives the
    wide person-by-attribute table of posterior means.

    Returns
    -------
    pandas.DataFrame
        Columns ``person, attribute, mean, sd, median, hdi_low, hdi_high,
        eti_low, eti_high, prob``.
    """
    result = as_fit(result, "person_tastes")
    prob = check_prob(aliased("hdi_prob", hdi_prob, "prob", prob, DEFAULT_PROB))
    table = summarize_draws(_person_draws(result), prob=prob)
    table["prob"] = prob
    table.attrs["prob"] = prob
    return table


def person_latent_draws(result: FitLike) -> xr.DataArray:
    """Each person's tastes on the scale of the population's normal distribution.

    ``log(sign * beta)`` for a lognormal taste, the coefficient for a normal or
    fixed one; in WTP space the willingness to pay (or its log) for every attribute
    but price. Dims (chain, draw, person, attribute).
    """
    result = as_fit(result, "person_latent_draws")
    layout = result.layout
    beta = _person_draws(result).transpose("chain", "draw", "person", "attribute")
    values = beta.sel(attribute=layout.names).values.copy()
    if layout.wtp_space and "person_wtp" in result.posterior:
        w = result.posterior["person_wtp"].transpose("chain", "draw", "person", "wtp_attribute")
        for name in w["wtp_attribute"].values:
            values[..., layout.names.index(str(name))] = w.sel(wtp_attribute=name).values
    for k in range(len(layout.names)):
        if layout.is_lognormal(k):
            with np.errstate(divide="ignore", invalid="ignore"):
                values[..., k] = np.log(layout.sign(k) * values[..., k])
    return xr.DataArray(values, dims=beta.dims, coords={d: beta[d].values for d in beta.dims})


def _covariate_shift(result: ChoiceFit, gamma: np.ndarray | None, z: np.ndarray) -> np.ndarray | float:
    """(chain, draw, n, attribute) shift of the latent means for covariate rows ``z`` (n, covariate)."""
    if gamma is None:
        return 0.0
    zc = z - result.layout.z_mean[None, :]
    return np.einsum("nq,cdqk->cdnk", zc, gamma)


def taste_shrinkage(result: FitLike) -> pd.DataFrame:
    """How much each random taste's person estimates are pulled towards the population.

    Works on the scale of the population's normal distribution (the log of the
    coefficient's magnitude for a lognormal taste). With covariates, each person's
    covariate shift is removed first so the comparison is with the conditional SD.

    Returns
    -------
    pandas.DataFrame
        One row per random attribute: ``scale``, ``population_sd`` (posterior mean
        of :math:`\\sigma_k`), ``sd_of_person_means`` (the SD across people of
        their posterior means), ``spread_ratio`` (their ratio), ``person_sd`` (the
        average posterior SD of a person's taste) and ``information``,
        :math:`1 - \\overline{\\operatorname{Var}(\\eta_{nk}\\mid y)} /
        \\overline{\\sigma_k^2}`: near 0 a person's own choices say little about
        their taste and the estimate sits at the population mean (strong
        shrinkage); near 1 their own choices pin it down.
    """
    result = as_fit(result, "taste_shrinkage")
    layout = result.layout
    if not layout.random:
        return pd.DataFrame(columns=["attribute", "scale", "population_sd", "sd_of_person_means",
                                     "spread_ratio", "person_sd", "information"])
    latent = person_latent_draws(result).values  # (C, D, P, K)
    p = _parameters(result)
    shift = _covariate_shift(result, p["gamma"], result.panel.Z) if p["gamma"] is not None else 0.0
    resid = latent - shift
    rows = []
    for k in layout.random:
        x = resid[..., k]
        person_mean = x.mean(axis=(0, 1))
        person_var = x.reshape(-1, x.shape[-1]).var(axis=0, ddof=1)
        pop_sd = p["sd"][..., k]
        pop_var = float(np.mean(pop_sd**2))
        sd_means = float(np.std(person_mean, ddof=1)) if person_mean.size > 1 else 0.0
        rows.append({
            "attribute": layout.names[k],
            "scale": _latent_scale(result, k),
            "population_sd": float(pop_sd.mean()),
            "sd_of_person_means": sd_means,
            "spread_ratio": sd_means / float(pop_sd.mean()) if pop_sd.mean() > 0 else np.nan,
            "person_sd": float(np.sqrt(person_var).mean()),
            "information": 1.0 - float(person_var.mean()) / pop_var if pop_var > 0 else np.nan,
        })
    return pd.DataFrame(rows)


# --------------------------------------------------------------------------- new people


def simulate_population_tastes(
    result: FitLike,
    *,
    n_persons: int = 1000,
    random_seed: int | None = 0,
    max_draws: int | None = 1000,
    seed: Any = NOT_GIVEN,
) -> xr.DataArray:
    r"""Draw new people from the population distribution, once per posterior draw.

    For each posterior draw of the population parameters, ``n_persons`` people
    get latent tastes :math:`\eta_n = \mu + \Gamma^\top(z_n - \bar z) + L e_n`,
    :math:`e_n \sim N(0, I)`, with :math:`L L^\top` the covariance of the random
    tastes (SDs and, if fitted, correlations) and covariates :math:`z_n`
    resampled from the fitted panel's persons; lognormal tastes become
    :math:`s_k e^{\eta_{nk}}`. In WTP space the coefficients are
    :math:`\beta_{nk} = \lambda_n w_{nk}` with price coefficient :math:`-\lambda_n`.
    Averaging anything over these people integrates over the population
    distribution *and* (across draws) over the posterior uncertainty of its
    parameters.

    Parameters
    ----------
    result : ChoiceFit or path
        A fit, or the path of its results folder.
    n_persons : int, default 1000
        Simulated people per posterior draw.
    seed : int or None, default 0
        Seed of the simulation (the same seed gives the same people).
    max_draws : int or None, default 1000
        Use at most this many posterior draws in all (thinned evenly within
        chains) to bound memory; ``None`` uses every draw.

    Returns
    -------
    xarray.DataArray
        Coefficients in the user's units, dims (chain, draw, sim_person, attribute).
    """
    result = as_fit(result, "simulate_population_tastes")
    seed = aliased("random_seed", random_seed, "seed", seed, 0)
    n_persons = whole_number(n_persons, "n_persons")
    layout = result.layout
    post = thin_draws(result.posterior, max_draws)
    p = _parameters(result, post)
    rng = np.random.default_rng(seed)
    mu, sd = p["mu"], p["sd"]
    n_c, n_d, n_k = mu.shape
    eta = np.broadcast_to(mu[:, :, None, :], (n_c, n_d, n_persons, n_k)).copy()
    if p["gamma"] is not None and result.panel.Z.shape[1]:
        rows = rng.integers(0, result.panel.Z.shape[0], size=n_persons)
        eta += _covariate_shift(result, p["gamma"], result.panel.Z[rows])
    rnd = list(layout.random)
    if rnd:
        e = rng.standard_normal((n_c, n_d, n_persons, len(rnd)))
        sd_r = sd[..., rnd]  # (C, D, R)
        if p["corr"] is not None:
            chol = _safe_cholesky(p["corr"])  # (C, D, R, R)
            e = np.einsum("cdij,cdnj->cdni", chol, e)
        eta[..., rnd] += e * sd_r[:, :, None, :]
    values = latent_to_coefficient(eta, layout.taste_map)
    return xr.DataArray(
        values, dims=("chain", "draw", "sim_person", "attribute"),
        coords={"chain": p["chain"], "draw": p["draw"], "sim_person": np.arange(n_persons),
                "attribute": layout.names},
        name="person_taste",
    )


def _safe_cholesky(corr: np.ndarray) -> np.ndarray:
    """Batched Cholesky factor of correlation matrices, with a small jitter if one is borderline."""
    try:
        return np.linalg.cholesky(corr)
    except np.linalg.LinAlgError:
        eye = np.eye(corr.shape[-1])
        return np.linalg.cholesky((corr + 1e-8 * eye) / (1 + 1e-8))


# ChoiceFit.population() (a lower floor) is this table: one implementation of the population table
lend("population", population_tastes)
