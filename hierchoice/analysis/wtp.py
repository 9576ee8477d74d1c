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
  WTP across those people (median, quantiles, share positive and, where it
  exists, the mean), so each statistic's interval carries the parameter
  uncertainty.

**A ratio with a denominator near zero.** If the price coefficient can be near
zero — a *normal* price taste always puts density at zero; a fixed or
lognormal one can put posterior mass near it — the ratio has very heavy tails,
and with density at zero it has **no finite mean or variance**: sample means do
not settle however many draws are taken (Daly, Hess & Train 2012,
*Transportation* 39(1)). hierchoice then returns warning records, leaves the
``mean`` and ``sd`` columns empty and reports robust summaries (median,
quantiles, intervals). "Near zero" is a hierchoice rule of thumb: a price
coefficient above :data:`NEAR_ZERO` times the median magnitude (or of the wrong
sign), flagged when more than :data:`MAX_NEAR_ZERO_MASS` of the draws fall there.

In **WTP space** (``model.wtp_space = true``; Train & Weeks 2005) the model's
person draws ``person_wtp`` and population ``taste_mean`` already are WTP; they
are read directly, and the price coefficient is lognormal by construction.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd
import xarray as xr

from .._records import Check, log_records, warning_record
from ..exceptions import SpecError, first_few
from ..inference.results import ChoiceFit
from .tastes import (
    DEFAULT_PROB,
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
    "person_wtp_draws",
    "population_wtp_draws",
    "person_wtp",
    "population_wtp",
]

#: A price coefficient above ``-NEAR_ZERO * median |price coefficient|`` counts as near zero (rule of thumb).
NEAR_ZERO = 0.1
#: Share of draws near zero above which WTP means are withheld (rule of thumb).
MAX_NEAR_ZERO_MASS = 0.01


def price_attribute(result: ChoiceFit) -> str:
    """The name of the price attribute (``model.price`` in the spec)."""
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


def wtp_units(result: ChoiceFit) -> dict[str, str]:
    """What each WTP value means, in words: ``{attribute: "fare per unit of crossing_time", ...}``."""
    price = price_attribute(result)
    spec = result.spec
    ref = spec.constants.reference if spec.constants is not None else None
    out = {}
    for term in result.panel.terms:
        if term.name == price:
            continue
        if term.kind == "dummy":
            base = spec.attributes[term.source].base if term.source in spec.attributes else None
            out[term.name] = f"{price} for {term.source} = {term.level} instead of {base}"
        elif term.kind == "effects":
            out[term.name] = f"{price} for {term.source} = {term.level} against the average level"
        elif term.kind == "constant":
            out[term.name] = f"{price} for {term.source} instead of {ref} (other attributes equal)"
        elif term.kind == "lagged_choice":
            out[term.name] = f"{price} for the alternative chosen in the previous task"
        else:
            out[term.name] = f"{price} per unit of {term.name}"
    return out


def _near_zero(price_coef: np.ndarray, axis: int | tuple[int, ...] | None = None) -> np.ndarray:
    """Share of price-coefficient values near zero or of the wrong sign (the price coefficient should be < 0)."""
    magnitude = float(np.median(np.abs(price_coef)))
    return np.mean(price_coef > -NEAR_ZERO * magnitude, axis=axis)


def _price_taste(result: ChoiceFit) -> str:
    layout = result.layout
    return layout.terms[layout.names.index(price_attribute(result))].taste


def person_wtp_draws(result: ChoiceFit) -> xr.DataArray:
    """Each person's WTP per posterior draw, dims (chain, draw, person, attribute).

    Preference space: :math:`-\\beta_{nk}/\\beta_{n,\\text{price}}` from ``person_taste``;
    WTP space: the model's ``person_wtp``.
    """
    names = _wtp_names(result)
    post = result.posterior
    if result.layout.wtp_space and "person_wtp" in post:
        w = post["person_wtp"].rename(wtp_attribute="attribute").sel(attribute=names)
        return w.transpose("chain", "draw", "person", "attribute").rename("wtp")
    beta = _person_draws(result)
    price = beta.sel(attribute=price_attribute(result))
    return (-beta.sel(attribute=names) / price).transpose("chain", "draw", "person", "attribute").rename("wtp")


def population_wtp_draws(
    result: ChoiceFit,
    *,
    quantiles: Sequence[float] = (0.1, 0.9),
    n_persons: int = 1000,
    seed: int | None = 0,
    max_draws: int | None = 1000,
) -> xr.Dataset:
    """WTP across people drawn from the population, summarised within each posterior draw.

    Returns
    -------
    xarray.Dataset
        Variables over (chain, draw, attribute): ``median_across_people``,
        ``mean_across_people``, one ``p<q>_across_people`` per quantile, and
        ``share_positive`` (share of people with a positive WTP); plus
        ``price_near_zero`` over (chain, draw): the share of simulated people whose
        price coefficient is near zero. ``attrs["near_zero_mass"]`` pools it.
    """
    names = _wtp_names(result)
    beta = simulate_population_tastes(result, n_persons=n_persons, seed=seed, max_draws=max_draws)
    price = beta.sel(attribute=price_attribute(result)).values  # (C, D, N)
    b = beta.sel(attribute=names).values  # (C, D, N, K)
    with np.errstate(divide="ignore", invalid="ignore"):
        w = -b / price[..., None]
    stats: dict[str, np.ndarray] = {
        "median_across_people": np.median(w, axis=2),
        "mean_across_people": np.mean(w, axis=2),
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
    if mass > MAX_NEAR_ZERO_MASS:
        records.append(warning_record(
            "price_near_zero", "warning",
            f"{100 * mass:.1f} % of the price coefficients of {price!r} drawn from the population (over the "
            f"posterior draws) lie near zero (above -{NEAR_ZERO:g} x the median magnitude) or have the wrong "
            "sign. WTP ratios then have very heavy tails and, where the posterior reaches zero, no finite mean: "
            "means are not reported; read the medians and quantiles.",
            where=price,
        ))
        return records, True
    return records, False


def population_wtp(
    result: ChoiceFit,
    *,
    prob: float = DEFAULT_PROB,
    quantiles: Sequence[float] = (0.1, 0.9),
    n_persons: int = 1000,
    seed: int | None = 0,
    max_draws: int | None = 1000,
) -> pd.DataFrame:
    """Population WTP: statistics of WTP across people, with posterior intervals.

    Parameters
    ----------
    result : ChoiceFit
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
        ``p10_across_people``, ... or ``share_positive``. The posterior
        ``mean``/``sd`` columns are empty when the price coefficient has mass near
        zero. ``attrs["warnings"]`` holds the :class:`~hierchoice._records.Check`
        list and ``attrs["robust"]`` whether means were withheld.
    """
    prob = check_prob(prob)
    ds = population_wtp_draws(result, quantiles=quantiles, n_persons=n_persons, seed=seed, max_draws=max_draws)
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
    log_records(records)
    return out


def person_wtp(result: ChoiceFit, *, prob: float = DEFAULT_PROB) -> pd.DataFrame:
    """Each person's posterior WTP: one row per person and attribute.

    Returns
    -------
    pandas.DataFrame
        Columns ``person, attribute, unit, mean, sd, median, hdi_low, hdi_high,
        eti_low, eti_high, price_near_zero, prob``. ``price_near_zero`` is the
        share of the person's posterior draws with a price coefficient near zero;
        where it is above :data:`MAX_NEAR_ZERO_MASS` (or the price taste is
        normal) ``mean`` and ``sd`` are empty and only the median and intervals
        are given. ``attrs["warnings"]`` holds the warning records.
    """
    prob = check_prob(prob)
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
        normal = _price_taste(result) == "normal"
        robust = np.full(n_p, True) if normal else mass > MAX_NEAR_ZERO_MASS
        if robust.any():
            persons = [p for p, r in zip(w["person"].values.tolist(), robust) if r]
            why = (f"the price coefficient {price_name!r} has a normal taste, so each person's posterior of it has "
                   "density at zero and their WTP ratio has no finite mean" if normal else
                   f"their posterior of the price coefficient {price_name!r} has more than "
                   f"{100 * MAX_NEAR_ZERO_MASS:g} % of its draws near zero")
            records.append(warning_record(
                "price_near_zero", "warning",
                f"{len(persons)} of {n_p} persons ({first_few(persons)}): {why}. Their WTP means are not "
                "reported; read the medians and intervals.",
                where=price_name,
            ))
    table = summarize_draws(w, prob=prob, robust=robust[:, None])
    units = wtp_units(result)
    table.insert(2, "unit", [units[a] for a in table["attribute"]])
    by_person = dict(zip(w["person"].values.tolist(), mass))
    table["price_near_zero"] = [float(by_person[p]) for p in table["person"]]
    table["prob"] = prob
    table.attrs.update(prob=prob, warnings=records)
    log_records(records)
    return table
