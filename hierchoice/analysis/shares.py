r"""Market scenarios: predicted choice shares, sensitivity, elasticities and scenario differences.

A **market** is a small table with one row per alternative on offer and the
attribute values in the user's own columns — the same columns, units and
category labels as the choice data:

========  ======  ===============  ===================  =======
option    fare    crossing_time    departures_per_hour  deck
========  ======  ===============  ===================  =======
ferry_a   3.5     20               4                    covered
ferry_b   5.0     15               2                    lounge
none
========  ======  ===============  ===================  =======

The label column is the spec's alternative column (here ``option``) or
``alternative``. Categorical attributes are coded exactly like the fitted
panel's terms (dummy or effects against the spec's base level). With
alternative-specific constants, each row's constant is looked up by its label,
so labels must be the fitted alternatives'. The opt-out's attributes may be
left blank (the model sets them to 0). Extra columns are ignored.

The share of alternative :math:`i` given tastes :math:`\beta_n` is the logit
probability (McFadden 1974), averaged over people:

.. math::

    S_i = \frac{1}{N}\sum_{n=1}^{N} P_{ni}, \qquad
    P_{ni} = \frac{e^{x_i \cdot \beta_n}}{\sum_{j} e^{x_j \cdot \beta_n}},

computed for every posterior draw, so each share comes with a credible
interval. The people :math:`n` are, by ``persons``:

``"population"`` (the default)
    **New people drawn from the population distribution** for each posterior
    draw (:func:`hierchoice.tastes.simulate_population_tastes`; covariates
    resampled from the fitted panel). This predicts the market of the
    population the sample stands for: it integrates over the spread of tastes
    and the uncertainty of the population parameters, and needs no person draws.
``"panel"``
    **The fitted panel's own respondents**, each with the posterior draws of
    their own tastes (``person_taste``). This predicts what *these* people
    would choose ("sample enumeration"); it leans on each respondent's own
    choices and so is only as representative as the sample.

Point elasticities of the aggregate shares with respect to a numeric attribute
(Train 2009, *Discrete Choice Methods with Simulation*, 2nd ed., ch. 3 for
the logit, ch. 6 for the mixed logit) are, per draw,

.. math::

    E_{i x_j} = \frac{x_j}{S_i}\,\frac{1}{N}\sum_n \beta_n P_{ni}(\delta_{ij} - P_{nj}),

which for a single fixed taste is :math:`\beta x_i (1 - P_i)` (own) and
:math:`-\beta x_j P_j` (cross).

A stated-preference model predicts choices in the survey's setting: shares are
not a forecast guarantee, their intervals are conditional on the model, and
attribute values outside the design's range are extrapolation (flagged with a
warning record).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any, Union

import numpy as np
import pandas as pd
import xarray as xr

from .._args import NOT_GIVEN, aliased
from .._records import Check, warn_records, warning_record
from ..data.panel import _label, read_table
from ..exceptions import DataError, FitError, SpecError, first_few
from ..inference.results import ChoiceFit, FitLike, as_fit, thin_draws
from ..model.likelihood import choice_probabilities
from .tastes import (
    DEFAULT_PROB,
    _person_draws,
    check_prob,
    simulate_population_tastes,
    summarize_draws,
)

__all__ = [
    "PERSONS",
    "read_market",
    "market_design",
    "person_coefficients",
    "share_draws",
    "predict_shares",
    "sensitivity",
    "elasticities",
    "compare_shares",
]

#: What a market may be: a DataFrame, a dict of columns, a list of rows, or a CSV / Parquet file.
Market = Union[pd.DataFrame, Mapping[str, Any], Sequence[Mapping[str, Any]], str, Path]

#: The two ways to integrate over people's tastes.
PERSONS = ("population", "panel")

_NUMERIC_KINDS = ("numeric", "lag", "lead", "lagged_choice")


# --------------------------------------------------------------------------- the market table


def read_market(market: Market) -> pd.DataFrame:
    """Read a market into a DataFrame (a copy): a DataFrame, a CSV or Parquet file, a dict of columns
    (``{"option": ["a", "b"], "fare": [3.5, 5.0]}``) or a list of rows (``[{"option": "a", "fare": 3.5}, ...]``)."""
    if isinstance(market, Mapping) or (isinstance(market, (list, tuple)) and all(isinstance(r, Mapping)
                                                                                for r in market)):
        try:
            market = pd.DataFrame(market)
        except ValueError as err:  # columns of different lengths, scalars only
            raise DataError(f"The market dict could not be read as a table ({err}): give a dict of equally long "
                            "columns, e.g. {'option': ['a', 'b'], 'fare': [3.5, 5.0]}, or a list of rows.") from None
    elif not isinstance(market, (pd.DataFrame, str, Path)):
        raise DataError(f"A market is a DataFrame, a dict of columns, a list of rows or the path of a CSV or Parquet "
                        f"file; got {type(market).__name__}.")
    frame = read_table(market)
    frame.columns = [str(c) for c in frame.columns]
    if len(frame) == 0:
        raise DataError("The market table is empty: give one row per alternative on offer.")
    return frame.reset_index(drop=True)


def _label_column(result: ChoiceFit, frame: pd.DataFrame) -> str:
    for name in (result.spec.columns.alternative, "alternative"):
        if name in frame.columns:
            return name
    raise DataError(
        f"The market table needs a column naming the alternatives: {result.spec.columns.alternative!r} (the "
        f"spec's alternative column) or 'alternative'. It has: {first_few(list(frame.columns), 12)}."
    )


def _design_range(result: ChoiceFit, k: int) -> tuple[float, float] | None:
    """The range of term ``k`` over the available, non-opt-out alternatives of the fitted panel."""
    panel = result.panel
    cells = panel.cells  # the real rows: available alternatives of real tasks only
    opt_out = result.spec.data.opt_out
    values = cells.x[:, k]
    if opt_out is not None and opt_out in panel.alternatives:
        values = values[cells.alt != panel.alternatives.index(opt_out)]
    return (float(values.min()), float(values.max())) if values.size else None


def market_design(result: FitLike, market: Market) -> xr.DataArray:
    """Code a market table into the model's attribute columns.

    Returns
    -------
    xarray.DataArray
        Dims (alternative, attribute): the model's terms for each row of the
        market, coded like the fitted panel. ``attrs["warnings"]`` lists
        :class:`~hierchoice._records.Check` objects for values outside the
        design's range (extrapolation).

    Raises
    ------
    DataError
        A missing label or attribute column, a missing or non-numeric value, an
        unknown category level, a duplicated label, or (with constants) a label
        that is not a fitted alternative.
    """
    result = as_fit(result, "market_design")
    frame = read_market(market)
    spec, panel = result.spec, result.panel
    label_col = _label_column(result, frame)
    if frame[label_col].isna().any():
        rows = frame.index[frame[label_col].isna()].tolist()
        raise DataError(f"Market column {label_col!r} is empty at rows {first_few(rows)}: every row needs a label.")
    labels = [_label(v) for v in frame[label_col]]
    dup = sorted({a for a in labels if labels.count(a) > 1})
    if dup:
        raise DataError(f"Market column {label_col!r} lists {first_few(dup)} more than once: one row per alternative.")
    if len(labels) < 2:
        raise DataError(f"The market has one alternative ({labels[0]!r}); a choice needs at least two.")
    has_constants = any(t.kind == "constant" for t in panel.terms)
    if has_constants:
        unknown = [a for a in labels if a not in panel.alternatives]
        if unknown:
            raise DataError(
                f"Market alternatives {first_few(unknown)} (column {label_col!r}) are not fitted alternatives "
                f"({first_few(panel.alternatives, 10)}): the model has alternative-specific constants, so each "
                "row's constant is taken from its label. Relabel the row as the fitted alternative it resembles."
            )
    opt_out = spec.data.opt_out
    is_opt_out = np.array([a == opt_out for a in labels])
    X = np.zeros((len(labels), len(panel.terms)))
    records: list[Check] = []
    for k, term in enumerate(panel.terms):
        if term.kind == "constant":
            X[:, k] = [float(a == term.source) for a in labels]
            continue
        column = spec.attributes[term.source].source if term.kind in ("numeric", "dummy", "effects") else term.name
        if column not in frame.columns:
            what = f"attribute {term.source!r}" if term.kind in ("numeric", "dummy", "effects") else f"term {term.name!r}"
            raise DataError(
                f"The market table has no column {column!r} ({what} of the model); it has: "
                f"{first_few(list(frame.columns), 12)}. Give every alternative's value (the opt-out's may be blank)."
            )
        col = frame[column]
        missing = col.isna().to_numpy() & ~is_opt_out
        if missing.any():
            raise DataError(
                f"Market column {column!r} is empty for alternative(s) {first_few([labels[j] for j in np.flatnonzero(missing)])}; "
                "fill it (only the opt-out's attributes may be blank)."
            )
        if term.kind in ("dummy", "effects"):
            levels = {t.level for t in panel.terms if t.source == term.source}
            base = spec.attributes[term.source].base
            values = [None if m else _label(v) for v, m in zip(col, col.isna() | is_opt_out)]
            bad = [v for v in values if v is not None and v not in levels | {base}]
            if bad:
                raise DataError(
                    f"Market column {column!r} has level(s) {first_few(sorted(set(bad)))} that the model does not "
                    f"know; fitted levels: {first_few(sorted(levels | {base}), 12)}."
                )
            coded = np.array([float(v == term.level) for v in values])
            if term.kind == "effects":
                coded -= np.array([float(v == base) for v in values])
            X[:, k] = coded
            continue
        numeric = pd.to_numeric(col, errors="coerce").to_numpy(float)
        bad = np.isnan(numeric) & ~col.isna().to_numpy() & ~is_opt_out
        if bad.any():
            raise DataError(
                f"Market column {column!r} is not numeric for alternative(s) {first_few([labels[j] for j in np.flatnonzero(bad)])} "
                f"(values {first_few(col[bad].astype(str).tolist())})."
            )
        values = np.where(is_opt_out, 0.0, np.nan_to_num(numeric))
        X[:, k] = values
        span = _design_range(result, k)
        if span is not None:
            lo, hi = span
            outside = (~is_opt_out) & ((values < lo) | (values > hi))
            for j in np.flatnonzero(outside):
                records.append(warning_record(
                    "extrapolation", "warning",
                    f"{column} = {values[j]:g} for {labels[j]!r} is outside the range of the design "
                    f"({lo:g} to {hi:g}): the prediction extrapolates the fitted tastes beyond what respondents saw.",
                    where=f"{labels[j]}:{column}",
                ))
    out = xr.DataArray(X, dims=("alternative", "attribute"),
                       coords={"alternative": labels, "attribute": list(panel.attributes)}, name="x")
    out.attrs["warnings"] = records
    return out


# --------------------------------------------------------------------------- whose tastes


def person_coefficients(
    result: FitLike,
    *,
    persons: str = "population",
    n_persons: int = 1000,
    random_seed: int | None = 0,
    max_draws: int | None = 1000,
    seed: Any = NOT_GIVEN,
) -> xr.DataArray:
    """The coefficients to average shares over, dims (chain, draw, person, attribute).

    ``persons="population"`` draws ``n_persons`` new people per posterior draw;
    ``persons="panel"`` takes the fitted respondents' posterior tastes (see the
    module docstring). ``max_draws`` thins the posterior draws in both modes.
    """
    result = as_fit(result, "person_coefficients")
    seed = aliased("random_seed", random_seed, "seed", seed, 0)
    if persons not in PERSONS:
        raise SpecError(f"persons = {persons!r} is not one of: {', '.join(PERSONS)}.")
    if persons == "population":
        beta = simulate_population_tastes(result, n_persons=n_persons, random_seed=seed, max_draws=max_draws)
        return beta.rename(sim_person="person")
    try:
        draws = _person_draws(result)
    except FitError as err:
        raise FitError(f"{err} For market shares, persons = \"population\" needs no person draws.") from None
    draws = thin_draws(draws.to_dataset(name="b"), max_draws)["b"]
    return draws.transpose("chain", "draw", "person", "attribute")


def _probabilities(beta: np.ndarray, X: np.ndarray) -> np.ndarray:
    """Logit probabilities (chain, draw, person, alternative) of a market ``X`` (alternative, attribute)."""
    n_p = beta.shape[2]
    n_j, n_k = X.shape
    X4 = np.broadcast_to(X, (n_p, 1, n_j, n_k))
    avail = np.ones((n_p, 1, n_j), dtype=bool)
    return choice_probabilities(X4, avail, beta)[..., 0, :]


def _share_array(beta: xr.DataArray, X: xr.DataArray) -> xr.DataArray:
    b = beta.sel(attribute=list(X["attribute"].values)).values
    shares = _probabilities(b, X.values).mean(axis=2)
    return xr.DataArray(shares, dims=("chain", "draw", "alternative"),
                        coords={"chain": beta["chain"].values, "draw": beta["draw"].values,
                                "alternative": X["alternative"].values}, name="share")


def share_draws(
    result: FitLike,
    market: Market | xr.DataArray,
    *,
    persons: str = "population",
    n_persons: int = 1000,
    random_seed: int | None = 0,
    max_draws: int | None = 1000,
    seed: Any = NOT_GIVEN,
) -> xr.DataArray:
    """Posterior draws of the market shares, dims (chain, draw, alternative); they sum to 1 per draw."""
    result = as_fit(result, "share_draws")
    seed = aliased("random_seed", random_seed, "seed", seed, 0)
    X = market if isinstance(market, xr.DataArray) else market_design(result, market)
    beta = person_coefficients(result, persons=persons, n_persons=n_persons, random_seed=seed, max_draws=max_draws)
    out = _share_array(beta, X)
    out.attrs["warnings"] = list(X.attrs.get("warnings", []))
    out.attrs["persons"] = persons
    return out


def _finish(table: pd.DataFrame, prob: float, persons: str, records: Sequence[Check]) -> pd.DataFrame:
    table["prob"] = prob
    table.attrs.update(prob=prob, persons=persons, warnings=list(records))
    warn_records(records, stacklevel=4)  # to the caller of the public function
    return table


def predict_shares(
    result: FitLike,
    market: Market,
    *,
    persons: str = "population",
    hdi_prob: float = DEFAULT_PROB,
    n_persons: int = 1000,
    random_seed: int | None = 0,
    max_draws: int | None = 1000,
    prob: Any = NOT_GIVEN,
    seed: Any = NOT_GIVEN,
) -> pd.DataFrame:
    """Predicted shares of a market with credible intervals.

    Parameters
    ----------
    result : ChoiceFit or path
        A fit, or the path of its results folder.
    market : DataFrame, dict, list of dicts or path
        One row per alternative (see the module docstring).
    persons : {"population", "panel"}, default "population"
        Whose tastes to average over: new people from the population, or the
        fitted respondents (see the module docstring).
    prob : float, default 0.9
    n_persons : int, default 1000
        Simulated people per posterior draw (``persons="population"``).
    seed : int or None, default 0
    max_draws : int or None, default 1000
        Posterior draws used at most (thinned evenly).

    Returns
    -------
    pandas.DataFrame
        Columns ``alternative, mean, sd, median, hdi_low, hdi_high, eti_low,
        eti_high, prob``; ``attrs["warnings"]`` lists extrapolation records and
        ``attrs["persons"]`` the mode.
    """
    result = as_fit(result, "predict_shares")
    prob = check_prob(aliased("hdi_prob", hdi_prob, "prob", prob, DEFAULT_PROB))
    seed = aliased("random_seed", random_seed, "seed", seed, 0)
    draws = share_draws(result, market, persons=persons, n_persons=n_persons, random_seed=seed, max_draws=max_draws)
    return _finish(summarize_draws(draws, prob=prob), prob, persons, draws.attrs["warnings"])


def _term_for(result: ChoiceFit, attribute: str) -> tuple[str, list[int]]:
    """The market column of a spec attribute (by name or column) and its term indices."""
    spec, terms = result.spec, result.panel.terms
    for name, attr in spec.attributes.items():
        if attribute in (name, attr.source):
            return attr.source, [k for k, t in enumerate(terms) if t.source == name
                                 and t.kind in ("numeric", "dummy", "effects")]
    for k, t in enumerate(terms):
        if t.name == attribute and t.kind in _NUMERIC_KINDS:
            return t.name, [k]
    known = [a.source for a in spec.attributes.values()] + [t.name for t in terms if t.kind in _NUMERIC_KINDS[1:]]
    raise SpecError(f"{attribute!r} is not an attribute of the model; known: {first_few(known, 12)}.")


def sensitivity(
    result: FitLike,
    market: Market,
    *,
    alternative: str,
    attribute: str,
    values: Sequence[Any] | None = None,
    persons: str = "population",
    hdi_prob: float = DEFAULT_PROB,
    n_persons: int = 1000,
    random_seed: int | None = 0,
    max_draws: int | None = 1000,
    prob: Any = NOT_GIVEN,
    seed: Any = NOT_GIVEN,
) -> pd.DataFrame:
    """Shares as one alternative's attribute moves over a range, the rest of the market fixed.

    The same people and posterior draws are used at every value, so the curve is
    smooth and differences along it are not blurred by simulation noise.

    Parameters
    ----------
    alternative : str
        The market row whose attribute changes.
    attribute : str
        The attribute (spec name or its column).
    values : sequence, optional
        The values to try; by default 11 points over the design's range for a
        numeric attribute, every level for a categorical one.

    Returns
    -------
    pandas.DataFrame
        Columns ``value, alternative, mean, sd, median, hdi_low, hdi_high,
        eti_low, eti_high, prob``.
    """
    result = as_fit(result, "sensitivity")
    prob = check_prob(aliased("hdi_prob", hdi_prob, "prob", prob, DEFAULT_PROB))
    seed = aliased("random_seed", random_seed, "seed", seed, 0)
    frame = read_market(market)
    label_col = _label_column(result, frame)
    labels = [_label(v) for v in frame[label_col]]
    if str(alternative) not in labels:
        raise DataError(f"alternative {alternative!r} is not a row of the market (rows: {first_few(labels, 10)}).")
    column, ks = _term_for(result, attribute)
    if values is None:
        kind = result.panel.terms[ks[0]].kind if ks else "numeric"
        if kind in ("dummy", "effects"):
            source = result.panel.terms[ks[0]].source
            values = [result.spec.attributes[source].base] + [result.panel.terms[k].level for k in ks]
        else:
            span = _design_range(result, ks[0])
            if span is None:
                raise DataError(f"{attribute!r} has no value in the design to take a range from; give values=.")
            values = np.linspace(span[0], span[1], 11).tolist()
    beta = person_coefficients(result, persons=persons, n_persons=n_persons, random_seed=seed, max_draws=max_draws)
    row = labels.index(str(alternative))
    pieces, records = [], []
    for value in values:
        changed = frame.copy()
        changed[column] = changed[column].astype(object)
        changed.at[row, column] = value
        X = market_design(result, changed)
        records += X.attrs["warnings"]
        table = summarize_draws(_share_array(beta, X), prob=prob)
        table.insert(0, "value", value)
        pieces.append(table)
    out = pd.concat(pieces, ignore_index=True)
    unique = list({(r.kind, r.where): r for r in records}.values())
    out.attrs.update(attribute=attribute, changed=str(alternative))
    return _finish(out, prob, persons, unique)


def elasticities(
    result: FitLike,
    market: Market,
    *,
    attribute: str,
    persons: str = "population",
    hdi_prob: float = DEFAULT_PROB,
    n_persons: int = 1000,
    random_seed: int | None = 0,
    max_draws: int | None = 1000,
    prob: Any = NOT_GIVEN,
    seed: Any = NOT_GIVEN,
) -> pd.DataFrame:
    r"""Own and cross point elasticities of the shares with respect to a numeric attribute.

    .. math::

        E_{i x_j} = \frac{\partial S_i}{\partial x_j}\frac{x_j}{S_i}
                  = \frac{x_j}{S_i}\,\frac{1}{N}\sum_n \beta_n P_{ni}(\delta_{ij} - P_{nj})

    (Train 2009, ch. 3 and 6): the percentage change in the share of ``share_of``
    for a 1 % change of the attribute of ``changed``. Alternatives whose value of the
    attribute is 0 (the opt-out) are left out as ``changed``: a 1 % change of 0 is no change.

    Returns
    -------
    pandas.DataFrame
        Columns ``attribute, changed, share_of, kind ("own"/"cross"), mean, sd,
        median, hdi_low, hdi_high, eti_low, eti_high, prob``.
    """
    result = as_fit(result, "elasticities")
    prob = check_prob(aliased("hdi_prob", hdi_prob, "prob", prob, DEFAULT_PROB))
    seed = aliased("random_seed", random_seed, "seed", seed, 0)
    column, ks = _term_for(result, attribute)
    if len(ks) != 1 or result.panel.terms[ks[0]].kind not in _NUMERIC_KINDS:
        raise SpecError(f"Elasticities need a numeric attribute; {attribute!r} is categorical. Compare scenarios "
                        "(compare_shares) to see the effect of a change of level.")
    k = ks[0]
    X = market_design(result, market)
    beta = person_coefficients(result, persons=persons, n_persons=n_persons, random_seed=seed, max_draws=max_draws)
    b = beta.sel(attribute=list(X["attribute"].values)).values  # (C, D, N, K)
    P = _probabilities(b, X.values)  # (C, D, N, J)
    bk = b[..., k]
    shares = P.mean(axis=2)  # (C, D, J)
    own = np.mean(bk[..., None] * P, axis=2)  # (C, D, J): mean_n beta P_ni
    cross = np.einsum("cdn,cdni,cdnj->cdij", bk, P, P) / P.shape[2]  # mean_n beta P_ni P_nj
    n_j = P.shape[-1]
    dS = own[..., :, None] * np.eye(n_j) - cross  # dS_i/dx_j
    x = X.values[:, k]
    with np.errstate(divide="ignore", invalid="ignore"):
        E = dS * x[None, None, None, :] / shares[..., :, None]
    labels = X["alternative"].values
    # an alternative whose value is 0 (the opt-out) has elasticity 0 by definition: leave it out
    moved = x != 0
    if not moved.any():
        raise DataError(f"Every alternative of the market has {column} = 0: elasticities are all 0 there.")
    E, labels_changed = E[..., moved], labels[moved]
    draws = xr.DataArray(E, dims=("chain", "draw", "share_of", "changed"),
                         coords={"chain": beta["chain"].values, "draw": beta["draw"].values,
                                 "share_of": labels, "changed": labels_changed})
    table = summarize_draws(draws, prob=prob)
    table.insert(0, "attribute", result.panel.terms[k].name)
    table = table[["attribute", "changed", "share_of", *[c for c in table.columns
                                                        if c not in ("attribute", "changed", "share_of")]]]
    table.insert(3, "kind", np.where(table["changed"] == table["share_of"], "own", "cross"))
    order = {a: i for i, a in enumerate(labels)}
    table = table.sort_values(["changed", "kind"], key=lambda s: s.map(order) if s.name == "changed" else
                              s.map({"own": 0, "cross": 1}), kind="stable").reset_index(drop=True)
    return _finish(table, prob, persons, X.attrs["warnings"])


def compare_shares(
    result: FitLike,
    base: Market,
    scenario: Market,
    *,
    persons: str = "population",
    hdi_prob: float = DEFAULT_PROB,
    n_persons: int = 1000,
    random_seed: int | None = 0,
    max_draws: int | None = 1000,
    prob: Any = NOT_GIVEN,
    seed: Any = NOT_GIVEN,
) -> pd.DataFrame:
    """The change in shares from a base market to a scenario, with intervals.

    Both markets are evaluated on the same people and posterior draws, and the
    difference is taken draw by draw, so its interval is that of the *change*
    (much narrower than comparing two separate intervals). An alternative absent
    from one market has share 0 there (a product entering or leaving).

    Returns
    -------
    pandas.DataFrame
        Columns ``alternative, base, scenario`` (posterior median shares), then
        the summary of ``scenario - base``: ``mean, sd, median, hdi_low, hdi_high,
        eti_low, eti_high, prob``.
    """
    result = as_fit(result, "compare_shares")
    prob = check_prob(aliased("hdi_prob", hdi_prob, "prob", prob, DEFAULT_PROB))
    seed = aliased("random_seed", random_seed, "seed", seed, 0)
    Xb, Xs = market_design(result, base), market_design(result, scenario)
    beta = person_coefficients(result, persons=persons, n_persons=n_persons, random_seed=seed, max_draws=max_draws)
    sb, ss = _share_array(beta, Xb), _share_array(beta, Xs)
    labels = list(dict.fromkeys(list(sb["alternative"].values) + list(ss["alternative"].values)))
    sb = sb.reindex(alternative=labels, fill_value=0.0)
    ss = ss.reindex(alternative=labels, fill_value=0.0)
    table = summarize_draws(ss - sb, prob=prob)
    table.insert(1, "base", sb.median(("chain", "draw")).values)
    table.insert(2, "scenario", ss.median(("chain", "draw")).values)
    return _finish(table, prob, persons, Xb.attrs["warnings"] + Xs.attrs["warnings"])
