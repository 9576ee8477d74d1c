r"""Willingness to pay: what people would pay for one more unit of an attribute.

In **preference space** the willingness to pay (WTP) for attribute :math:`k` of a
person with coefficients :math:`\beta_n` is the marginal rate of substitution
between the attribute and price,

.. math::

    \mathrm{WTP}_{nk} = -\frac{\beta_{nk}}{\beta_{n,\text{price}}},

in price units per unit of the attribute (for a 0/1-coded level: for that level
instead of the base; for a constant: for that alternative instead of the
reference). It is computed **draw by draw** (Train 2009, *Discrete Choice
Methods with Simulation*, 2nd ed., ch. 6):

* at the **person** level from each posterior draw of the person's own tastes;
* at the **population** level by drawing new people from the population
  distribution for each posterior draw
  (:func:`hierchoice.tastes.simulate_population_tastes`) and summarising the
  WTP across those people (median, quantiles, share positive), so each
  statistic's interval carries the parameter uncertainty. The **mean across
  people** is not simulated: where it exists it is computed in closed form for
  each posterior draw (:func:`mean_wtp_across_people`), because a Monte Carlo
  mean of a ratio with a long tail settles slowly.

**A ratio with a denominator near zero.** The WTP ratio has a mean only if
:math:`1/\beta_{n,\text{price}}` has one. A *normal* price taste always puts
density at zero, so the ratio has **no finite mean or variance**: sample means
do not settle however many draws are taken (Daly, Hess & Train 2012,
*Transportation* 39(1)). A *fixed* price coefficient whose posterior reaches
zero gives a posterior with the same defect. hierchoice then returns warning
records, leaves the ``mean`` and ``sd`` columns empty and reports robust
summaries (median, quantiles, intervals). "Near zero" is a hierchoice rule of
thumb: a price coefficient above :data:`NEAR_ZERO` times the median magnitude
(or of the wrong sign), flagged when more than :data:`MAX_NEAR_ZERO_MASS` of the
draws fall there.

A *lognormal* price coefficient :math:`\beta_{n,\text{price}} = -e^{\eta_{np}}`
is different: :math:`1/\lambda_n = e^{-\eta_{np}}` is lognormal too, with every
moment finite, so the WTP has a mean whenever the numerator has one (normal,
fixed and lognormal tastes all do), however large the log-SD. Its mean is
reported (with an ``info`` record when the tail is long, i.e. when the
near-zero share above is exceeded: the mean then lies far from the median,
which describes the typical person better). A person's posterior of
:math:`\eta_{np}` is a normal prior times a bounded likelihood, so it has
normal tails and the person's WTP mean exists too.

In **WTP space** (``model.wtp_space = true``; Train & Weeks 2005) the model's
person draws ``person_wtp`` and population ``taste_mean`` already are WTP; they
are read directly, and the price coefficient is lognormal by construction.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from .._args import NOT_GIVEN, aliased
from .._records import Check, warn_records, warning_record
from ..exceptions import SpecError, first_few
from ..inference.results import ChoiceFit, FitLike, as_fit, thin_draws
from .tastes import (
    DEFAULT_PROB,
    _covariate_shift,
    _parameters,
    _person_draws,
    _quantile_name,
    check_prob,
    simulate_population_tastes,
    summarize_draws,
)

__all__ = [
    "NEAR_ZERO",
    "MAX_NEAR_ZERO_MASS",
    "price_attribute",
    "wtp_units",
    "coefficient_units",
    "taste_units",
    "mean_wtp_across_people",
    "person_wtp_draws",
    "population_wtp_draws",
    "person_wtp",
    "population_wtp",
]

#: A price coefficient above ``-NEAR_ZERO * median |price coefficient|`` counts as near zero (rule of thumb).
NEAR_ZERO = 0.1
#: Share of draws near zero above which WTP means are withheld (rule of thumb).
MAX_NEAR_ZERO_MASS = 0.01


def price_attribute(result: FitLike) -> str:
    """The name of the price attribute (``model.price`` in the spec)."""
    result = as_fit(result, "price_attribute")
    price = result.spec.model.price
    if price is None:
        raise SpecError(
            "Willingness to pay needs a price attribute: set price = \"<attribute>\" in the spec's [model] "
            f"table (model attributes: {first_few(result.layout.names, 10)})."
        )
    if price not in result.layout.names:
        raise SpecError(f"model.price = {price!r} is not a model attribute ({first_few(result.layout.names, 10)}).")
    return price


def _wtp_names(result: ChoiceFit) -> list[str]:
    price = price_attribute(result)
    return [n for n in result.layout.names if n != price]


def _term_phrases(result: ChoiceFit) -> dict[str, str]:
    """What one unit of each model term is: ``{"crossing_time": "per unit of crossing_time", ...}``."""
    spec = result.spec
    ref = spec.constants.reference if spec.constants is not None else None
    out = {}
    for term in result.panel.terms:
        if term.kind == "dummy":
            base = spec.attributes[term.source].base if term.source in spec.attributes else None
            out[term.name] = f"for {term.source} = {term.level} instead of {base}"
        elif term.kind == "effects":
            out[term.name] = f"for {term.source} = {term.level} against the average level"
        elif term.kind == "constant":
            out[term.name] = f"for {term.source} instead of {ref} (other attributes equal)"
        elif term.kind == "lagged_choice":
            out[term.name] = "for the alternative chosen in the previous task"
        else:
            out[term.name] = f"per unit of {term.name}"
    return out


def wtp_units(result: ChoiceFit) -> dict[str, str]:
    """What each WTP value means, in words: ``{attribute: "fare per unit of crossing_time", ...}``."""
    price = price_attribute(result)
    return {name: f"{price} {phrase}" for name, phrase in _term_phrases(result).items() if name != price}


def coefficient_units(result: ChoiceFit) -> dict[str, str]:
    """The unit of each utility coefficient: ``{attribute: "utility per unit of crossing_time", ...}``.

    Utility is on the logit scale (the error's scale fixed by the Gumbel distribution); every term, price
    included, in either space: the person coefficients (``person_taste``) are always utility per unit.
    """
    return {name: f"utility {phrase}" for name, phrase in _term_phrases(result).items()}


def taste_units(result: ChoiceFit, *, latent: bool = False) -> dict[str, str]:
    """The unit of what the population distribution of each term describes.

    In preference space every term's distribution is of its utility coefficient
    (:func:`coefficient_units`); in WTP space every term but price describes the
    willingness to pay (:func:`wtp_units`) and price its coefficient. With
    ``latent=True``, a lognormal term's unit is that of its log: ``"log(−x), x in
    utility per unit of fare"``, the scale of ``population_mean`` /
    ``population_sd`` and of the covariate effects.
    """
    layout = result.layout
    units = coefficient_units(result)
    if layout.wtp_space:
        units |= wtp_units(result)
    if latent:
        for k, name in enumerate(layout.names):
            if layout.is_lognormal(k):
                units[name] = f"log({'−' if layout.sign(k) < 0 else ''}x), x in {units[name]}"
    return {name: units[name] for name in layout.names}


def _near_zero(price_coef: np.ndarray, axis: int | tuple[int, ...] | None = None) -> np.ndarray:
    """Share of price-coefficient values near zero or of the wrong sign (the price coefficient should be < 0)."""
    magnitude = float(np.median(np.abs(price_coef)))
    return np.mean(price_coef > -NEAR_ZERO * magnitude, axis=axis)


def _price_taste(result: ChoiceFit) -> str:
    layout = result.layout
    return layout.terms[layout.names.index(price_attribute(result))].taste


def person_wtp_draws(result: FitLike) -> xr.DataArray:
    """Each person's WTP per posterior draw, dims (chain, draw, person, attribute).

    Preference space: :math:`-\\beta_{nk}/\\beta_{n,\\text{price}}` from ``person_taste``;
    WTP space: the model's ``person_wtp``.
    """
    result = as_fit(result, "person_wtp_draws")
    names = _wtp_names(result)
    post = result.posterior
    if result.layout.wtp_space and "person_wtp" in post:
        w = post["person_wtp"].rename(wtp_attribute="attribute").sel(attribute=names)
        return w.transpose("chain", "draw", "person", "attribute").rename("wtp")
    beta = _person_draws(result)
    price = beta.sel(attribute=price_attribute(result))
    return (-beta.sel(attribute=names) / price).transpose("chain", "draw", "person", "attribute").rename("wtp")


def mean_wtp_across_people(result: FitLike, *, max_draws: int | None = 1000) -> xr.DataArray:
    r"""The mean WTP across the population, in closed form, for each posterior draw.

    For a person with latent tastes :math:`\eta_n \sim N(m_n, \Sigma)` (:math:`m_n = \mu + \Gamma^\top(z_n -
    \bar z)`, :math:`\Sigma` the covariance of the random tastes, zero for fixed ones) and price coefficient
    :math:`\beta_{np} = s_p e^{\eta_{np}}` (lognormal), :math:`\mathrm{WTP}_{nk} = -s_p\,\beta_{nk}
    e^{-\eta_{np}}`. For jointly normal :math:`(x, z)`, :math:`E[x e^{tz}] = (E x + t\,\mathrm{cov}(x, z))
    e^{t E z + t^2 \mathrm{var}(z)/2}` (differentiate the bivariate normal moment generating function
    :math:`E[e^{ux + tz}]` in :math:`u` at 0; Stein's lemma gives the same), so with :math:`t = -1`

    .. math::

        E[\mathrm{WTP}_{nk}] = -s_p\,(m_{nk} - \Sigma_{kp})\, e^{-m_{np} + \Sigma_{pp}/2}
        \quad\text{(normal or fixed } \beta_k\text{)},

        E[\mathrm{WTP}_{nk}] = -s_p s_k\, e^{m_{nk} - m_{np} + (\Sigma_{kk} + \Sigma_{pp} - 2\Sigma_{kp})/2}
        \quad\text{(lognormal } \beta_k = s_k e^{\eta_{nk}}\text{)},

    the second being the mean of the lognormal :math:`e^{\eta_{nk} - \eta_{np}}`. Uncorrelated tastes have
    :math:`\Sigma_{kp} = 0`, i.e. :math:`E[\beta_k]\,E[1/\lambda]` with :math:`E[1/\lambda] =
    e^{-\mu_p + \sigma_p^2/2}` (lognormal moments; Train 2009, *Discrete Choice Methods with Simulation*,
    2nd ed., sec. 6.2). A fixed price gives :math:`-E[\beta_{nk}] / \beta_p`; in WTP space the mean is that of
    the WTP taste itself (:math:`m_{nk}` or :math:`s_k e^{m_{nk} + \Sigma_{kk}/2}`). With covariates the mean
    is averaged over the fitted panel's persons (the covariate distribution that
    :func:`hierchoice.tastes.simulate_population_tastes` resamples). A normal price taste has no mean: NaN.

    Returns
    -------
    xarray.DataArray
        Dims (chain, draw, attribute) over the non-price terms, on the draws that
        :func:`population_wtp_draws` uses (the same ``max_draws`` thinning).
    """
    result = as_fit(result, "mean_wtp_across_people")
    layout = result.layout
    names = _wtp_names(result)
    kp = layout.names.index(price_attribute(result))
    ks = [layout.names.index(n) for n in names]
    post = thin_draws(result.posterior, max_draws)
    p = _parameters(result, post)
    mu, sd = p["mu"], p["sd"]  # (C, D, K)
    shift = _covariate_shift(result, p["gamma"], result.panel.Z) if p["gamma"] is not None else 0.0
    m = mu[:, :, None, :] + shift  # (C, D, N or 1, K): each person's latent mean
    var = sd**2
    cov_p = np.zeros_like(mu)  # cov(eta_k, eta_price), (C, D, K)
    cov_p[..., kp] = var[..., kp]
    if p["corr"] is not None and kp in layout.random:
        rnd = list(layout.random)
        cov_p[..., rnd] = p["corr"][..., rnd.index(kp)] * sd[..., rnd] * sd[..., kp, None]
    out = np.full(mu.shape[:2] + (len(ks),), np.nan)
    price_taste = layout.terms[kp].taste
    for j, k in enumerate(ks):
        m_k = m[..., k]
        ln_k = layout.is_lognormal(k)
        if layout.wtp_space:
            value = layout.sign(k) * np.exp(m_k + var[..., k, None] / 2) if ln_k else m_k
        elif price_taste == "lognormal":
            s_p = layout.sign(kp)
            m_p, v_p, c = m[..., kp], var[..., kp, None], cov_p[..., k, None]
            if ln_k:
                value = -s_p * layout.sign(k) * np.exp(m_k - m_p + (var[..., k, None] + v_p - 2 * c) / 2)
            else:
                value = -s_p * (m_k - c) * np.exp(-m_p + v_p / 2)
        elif price_taste == "fixed":
            mean_k = layout.sign(k) * np.exp(m_k + var[..., k, None] / 2) if ln_k else m_k
            with np.errstate(divide="ignore", invalid="ignore"):
                value = -mean_k / m[..., kp]
        else:  # a normal price: density at zero, no mean
            continue
        out[..., j] = np.broadcast_to(value, m.shape[:3]).mean(axis=2)
    return xr.DataArray(out, dims=("chain", "draw", "attribute"),
                        coords={"chain": p["chain"], "draw": p["draw"], "attribute": names},
                        name="mean_across_people")


def population_wtp_draws(
    result: FitLike,
    *,
    quantiles: Sequence[float] = (0.1, 0.9),
    n_persons: int = 1000,
    random_seed: int | None = 0,
    max_draws: int | None = 1000,
    seed: Any = NOT_GIVEN,
) -> xr.Dataset:
    """WTP across people drawn from the population, summarised within each posterior draw.

    Returns
    -------
    xarray.Dataset
        Variables over (chain, draw, attribute): ``median_across_people``,
        ``mean_across_people`` (closed form, :func:`mean_wtp_across_people`; NaN
        where the mean does not exist), one ``p<q>_across_people`` per quantile, and
        ``share_positive`` (share of people with a positive WTP); plus
        ``price_near_zero`` over (chain, draw): the share of simulated people whose
        price coefficient is near zero. ``attrs["near_zero_mass"]`` pools it.
    """
    result = as_fit(result, "population_wtp_draws")
    seed = aliased("random_seed", random_seed, "seed", seed, 0)
    names = _wtp_names(result)
    beta = simulate_population_tastes(result, n_persons=n_persons, random_seed=seed, max_draws=max_draws)
    price = beta.sel(attribute=price_attribute(result)).values  # (C, D, N)
    b = beta.sel(attribute=names).values  # (C, D, N, K)
    with np.errstate(divide="ignore", invalid="ignore"):
        w = -b / price[..., None]
    stats: dict[str, np.ndarray] = {
        "median_across_people": np.median(w, axis=2),
        "mean_across_people": mean_wtp_across_people(result, max_draws=max_draws).values,
    }
    for q in quantiles:
        stats[_quantile_name(float(q))] = np.quantile(w, float(q), axis=2)
    stats["share_positive"] = np.mean(w > 0, axis=2)
    dims = ("chain", "draw", "attribute")
    coords = {"chain": beta["chain"].values, "draw": beta["draw"].values, "attribute": names}
    ds = xr.Dataset({k: (dims, v) for k, v in stats.items()}, coords=coords)
    ds["price_near_zero"] = (("chain", "draw"), _near_zero(price, axis=2))
    ds.attrs["near_zero_mass"] = float(_near_zero(price))
    return ds


def _population_records(result: ChoiceFit, mass: float) -> tuple[list[Check], bool]:
    """Warning records for the population WTP, and whether to withhold means."""
    if result.layout.wtp_space:
        return [], False
    price = price_attribute(result)
    taste = _price_taste(result)
    records = []
    if taste == "normal":
        records.append(warning_record(
            "no_finite_moments", "warning",
            f"The price coefficient {price!r} has a normal taste, so across people it has density at zero and "
            f"WTP = -beta / beta_{price} is a ratio with no finite mean or variance (here {100 * mass:.1f} % of "
            "the simulated people have a price coefficient near zero or of the wrong sign). Means are not "
            "reported; read the medians and quantiles. A lognormal price taste (sign = \"negative\") or a WTP-"
            "space model (model.wtp_space = true) gives a WTP distribution with finite moments.",
            where=price,
        ))
        return records, True
    if mass <= MAX_NEAR_ZERO_MASS:
        return records, False
    if taste == "lognormal":
        records.append(warning_record(
            "long_tail", "info",
            f"{100 * mass:.1f} % of the price coefficients of {price!r} drawn from the population lie near zero "
            f"(above -{NEAR_ZERO:g} x the median magnitude) or have the wrong sign, so WTP has a long tail across "
            "people. With a lognormal price the mean still exists (1 / price is lognormal too) and is reported, "
            "computed in closed form; it lies far from the median, which describes the typical person better.",
            where=price,
        ))
        return records, False
    records.append(warning_record(
        "price_near_zero", "warning",
        f"{100 * mass:.1f} % of the posterior draws of the fixed price coefficient {price!r} lie near zero "
        f"(above -{NEAR_ZERO:g} x the median magnitude) or have the wrong sign: the posterior of the WTP "
        "ratio then has no finite mean. Means are not reported; read the medians and quantiles.",
        where=price,
    ))
    return records, True


def population_wtp(
    result: FitLike,
    *,
    hdi_prob: float = DEFAULT_PROB,
    quantiles: Sequence[float] = (0.1, 0.9),
    n_persons: int = 1000,
    random_seed: int | None = 0,
    max_draws: int | None = 1000,
    prob: Any = NOT_GIVEN,
    seed: Any = NOT_GIVEN,
) -> pd.DataFrame:
    """Population WTP: statistics of WTP across people, with posterior intervals.

    Parameters
    ----------
    result : ChoiceFit or path
        A fit, or the path of its results folder.
    prob : float, default 0.9
    quantiles : sequence of float, default (0.1, 0.9)
        Quantiles of WTP across people to report (besides the median).
    n_persons, seed, max_draws :
        Simulated people per posterior draw, their seed and the draw budget (see
        :func:`hierchoice.tastes.simulate_population_tastes`).

    Returns
    -------
    pandas.DataFrame
        Columns ``quantity, attribute, unit, mean, sd, median, hdi_low, hdi_high,
        eti_low, eti_high, prob``; ``quantity`` is ``median_across_people``,
        ``mean_across_people`` (omitted when it does not exist),
        ``p10_across_people``, ... or ``share_positive``. ``mean_across_people``
        is the closed form of :func:`mean_wtp_across_people` draw by draw. The
        posterior ``mean``/``sd`` columns are empty when no mean exists: a normal
        price taste, or a fixed price coefficient with posterior mass near zero (a
        lognormal price always has one). ``attrs["warnings"]`` holds the
        :class:`~hierchoice._records.Check` list and ``attrs["robust"]`` whether
        means were withheld.
    """
    result = as_fit(result, "population_wtp")
    prob = check_prob(aliased("hdi_prob", hdi_prob, "prob", prob, DEFAULT_PROB))
    seed = aliased("random_seed", random_seed, "seed", seed, 0)
    ds = population_wtp_draws(result, quantiles=quantiles, n_persons=n_persons, random_seed=seed, max_draws=max_draws)
    records, robust = _population_records(result, ds.attrs["near_zero_mass"])
    units = wtp_units(result)
    pieces = []
    for name in ds.data_vars:
        if name == "price_near_zero" or (robust and name == "mean_across_people"):
            continue
        table = summarize_draws(ds[name], prob=prob, robust=robust and name != "share_positive")
        table.insert(0, "quantity", str(name))
        table.insert(2, "unit", ["share of people" if name == "share_positive" else units[a]
                                 for a in table["attribute"]])
        pieces.append(table)
    out = pd.concat(pieces, ignore_index=True)
    out["prob"] = prob
    out.attrs.update(prob=prob, warnings=records, robust=robust, near_zero_mass=ds.attrs["near_zero_mass"])
    warn_records(records)  # to the caller of the public function
    return out


def person_wtp(result: FitLike, *, hdi_prob: float = DEFAULT_PROB, prob: Any = NOT_GIVEN) -> pd.DataFrame:
    """Each person's posterior WTP: one row per person and attribute.

    Returns
    -------
    pandas.DataFrame
        Columns ``person, attribute, unit, mean, sd, median, hdi_low, hdi_high,
        eti_low, eti_high, price_near_zero, prob``. ``price_near_zero`` is the
        share of the person's posterior draws with a price coefficient near zero.
        Where the price taste is normal, or fixed with more than
        :data:`MAX_NEAR_ZERO_MASS` of its draws near zero, ``mean`` and ``sd`` are
        empty (no finite mean) and only the median and intervals are given; a
        lognormal price keeps its means (with an ``info`` record for long tails).
        ``attrs["warnings"]`` holds the records.
    """
    result = as_fit(result, "person_wtp")
    prob = check_prob(aliased("hdi_prob", hdi_prob, "prob", prob, DEFAULT_PROB))
    w = person_wtp_draws(result)
    records: list[Check] = []
    n_p = w.sizes["person"]
    if result.layout.wtp_space:
        mass = np.zeros(n_p)
        robust = np.zeros(n_p, dtype=bool)
    else:
        price_name = price_attribute(result)
        price = _person_draws(result).sel(attribute=price_name).transpose("chain", "draw", "person").values
        mass = _near_zero(price.reshape(-1, n_p), axis=0)
        taste = _price_taste(result)
        near = mass > MAX_NEAR_ZERO_MASS
        # a lognormal price: each person's posterior of log(-price) is a normal prior times a bounded likelihood,
        # with normal tails, so 1 / price has every moment and the mean WTP exists however much mass is near 0
        robust = np.full(n_p, True) if taste == "normal" else near if taste == "fixed" else np.zeros(n_p, bool)
        flagged = near if taste == "lognormal" else robust
        if flagged.any():
            persons = [p for p, r in zip(w["person"].values.tolist(), flagged) if r]
            why = {
                "normal": f"the price coefficient {price_name!r} has a normal taste, so each person's posterior of "
                          "it has density at zero and their WTP ratio has no finite mean",
                "fixed": f"more than {100 * MAX_NEAR_ZERO_MASS:g} % of the posterior draws of the fixed price "
                         f"coefficient {price_name!r} lie near zero, so the WTP ratio's posterior has no finite mean",
            }.get(taste, f"more than {100 * MAX_NEAR_ZERO_MASS:g} % of their posterior draws of the lognormal price "
                         f"coefficient {price_name!r} lie near zero, so their WTP posterior has a long tail")
            what = ("Their WTP means exist (their posterior of log(-price) has normal tails) and are reported; "
                    "the medians are the steadier summary." if taste == "lognormal" else
                    "Their WTP means are not reported; read the medians and intervals.")
            records.append(warning_record("long_tail" if taste == "lognormal" else "price_near_zero",
                                          "info" if taste == "lognormal" else "warning",
                                          f"{len(persons)} of {n_p} persons ({first_few(persons)}): {why}. {what}",
                                          where=price_name))
    table = summarize_draws(w, prob=prob, robust=robust[:, None])
    units = wtp_units(result)
    table.insert(2, "unit", [units[a] for a in table["attribute"]])
    by_person = dict(zip(w["person"].values.tolist(), mass))
    table["price_near_zero"] = [float(by_person[p]) for p in table["person"]]
    table["prob"] = prob
    table.attrs.update(prob=prob, warnings=records)
    warn_records(records)  # to the caller of the public function
    return table
