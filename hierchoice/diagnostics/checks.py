r"""Convergence diagnostics as data: one record per check, with its value, threshold, verdict and advice.

The numbers come from ArviZ (rank-normalised split :math:`\hat R`, bulk and tail
effective sample sizes, E-BFMI); this module only grades them and says what to
do. Nothing here raises on a bad fit or logs: a convergence problem is a
:class:`Check` record with verdict ``"warn"`` or ``"fail"`` that the caller
reports (the ``hierchoice check`` command, a notebook, a test).

The checks and their grades (pass / warn / fail):

``rhat``
    Worst rank-normalised split R-hat of each population variable: pass below
    1.01, warn below 1.05, fail at 1.05 or more (Vehtari, Gelman, Simpson,
    Carpenter & Bürkner 2021; the 1.05 line is common practice).
``ess_bulk``, ``ess_tail``
    Smallest bulk / tail ESS, total over chains: pass at 400 or more, warn at 100
    or more, fail below 100 (Vehtari et al. 2021; 100 is common practice: the
    Monte Carlo error of a mean is then 10 % of its posterior SD).
``divergences``
    Post-warm-up divergent transitions: pass at 0, fail otherwise (Betancourt
    2017, section 6.2).
``ebfmi``
    Lowest E-BFMI over chains: pass at 0.3 or more, fail below (Betancourt 2017,
    section 6.1).
``tree_depth``
    Share of draws that stopped at the maximum tree depth, worst chain: pass at
    0, warn otherwise; an efficiency problem, never a fail (Hoffman & Gelman 2014;
    common practice).
``person_rhat``, ``person_ess_bulk``
    The same over every person taste (worst R-hat, smallest ESS, with the share
    over the threshold); the ESS record is at most a warning.
``lognormal_sd``
    Posterior median of the SD of a lognormal log-taste: warn below 0.05
    (collapsed) or above 2 (implausibly wide); common practice.

References
----------
Vehtari, A., Gelman, A., Simpson, D., Carpenter, B. & Bürkner, P.-C. (2021).
Rank-normalization, folding, and localization: an improved :math:`\hat R` for
assessing convergence of MCMC. *Bayesian Analysis* 16(2), 667–718.

Betancourt, M. (2017). A conceptual introduction to Hamiltonian Monte Carlo.
arXiv:1701.02434.

Hoffman, M. D. & Gelman, A. (2014). The No-U-Turn sampler. *Journal of Machine
Learning Research* 15, 1593–1623.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from .._records import VERDICTS, Check, checks_frame, overall_verdict
from ..model.build import POPULATION_VARS, ModelLayout

__all__ = [
    "RHAT_MAX",
    "RHAT_FAIL",
    "ESS_MIN",
    "ESS_FAIL",
    "EBFMI_MIN",
    "BLOCK_ACCEPT_MIN",
    "blocked_sampler_checks",
    "MAX_TREE_DEPTH",
    "LOG_SD_COLLAPSED",
    "LOG_SD_LARGE",
    "VERDICTS",
    "Check",
    "population_draws",
    "parameter_diagnostics",
    "population_checks",
    "sampler_checks",
    "person_checks",
    "lognormal_sd_checks",
    "convergence_checks",
    "checks_frame",
    "overall_verdict",
    "format_check_value",
    "count_share",
]

#: R-hat (rank-normalised split) below this passes (Vehtari, Gelman, Simpson, Carpenter & Bürkner 2021).
RHAT_MAX = 1.01
#: R-hat at or above this fails; in between is a warning (common practice: the older 1.05 rule).
RHAT_FAIL = 1.05
#: Bulk and tail ESS (total over chains) at or above this pass (Vehtari et al. 2021: 100 per chain, 4 chains).
ESS_MIN = 400
#: Below this the ESS fails: the Monte Carlo error of a mean exceeds 10 % of its posterior SD (common practice).
ESS_FAIL = 100
#: E-BFMI below this in any chain fails (Betancourt 2017, arXiv:1701.02434).
EBFMI_MIN = 0.3
#: The default maximum tree depth of nutpie, PyMC and numpyro NUTS (used when no saturation flag is stored).
MAX_TREE_DEPTH = 10
#: A lognormal taste whose SD of log-taste has posterior median below this has collapsed (common practice).
LOG_SD_COLLAPSED = 0.05
#: ... and above this is implausibly wide: e^(2*2) ≈ 55-fold spread between the 16th and 84th percentile person.
LOG_SD_LARGE = 2.0

#: Person-level LOO settings of :func:`check_folder` (lighter than the defaults of
#: :func:`hierchoice.diagnostics.loo.person_loo`; the report gives the Monte Carlo error they leave).
FOLDER_N_SIM = 100
FOLDER_MAX_DRAWS = 200


_REF_RHAT = "Vehtari, Gelman, Simpson, Carpenter & Bürkner (2021), Bayesian Analysis 16(2)"
_REF_EBFMI = "Betancourt (2017), arXiv:1701.02434, section 6.1"
_REF_DIV = "Betancourt (2017), arXiv:1701.02434, section 6.2"
_REF_DEPTH = "Hoffman & Gelman (2014), JMLR 15; common practice"
_REF_COMMON = "common practice"


# --------------------------------------------------------------------------- grading kernels


def _grade_upper(value: float, ok: float, bad: float) -> str:
    """Smaller is better: pass below ``ok``, warn below ``bad``, fail otherwise (NaN warns)."""
    if not np.isfinite(value):
        return "warn"
    return "pass" if value < ok else "warn" if value < bad else "fail"


def _grade_lower(value: float, ok: float, bad: float) -> str:
    """Larger is better: pass at or above ``ok``, warn at or above ``bad``, fail otherwise (NaN warns)."""
    if not np.isfinite(value):
        return "warn"
    return "pass" if value >= ok else "warn" if value >= bad else "fail"


# --------------------------------------------------------------------------- numbers as text

#: Decimals a check's value is first shown with (R-hat to three: 1.012 must not read as 1.01).
_DECIMALS = {"rhat": 3, "person_rhat": 3, "ebfmi": 2, "lognormal_sd": 3}
_WHOLE = ("ess_bulk", "ess_tail", "person_ess_bulk", "divergences")
#: The warn/fail line of the checks that have one (a shown value must not cross it either).
_FAIL_LINE = {"rhat": RHAT_FAIL, "person_rhat": RHAT_FAIL, "ess_bulk": ESS_FAIL, "ess_tail": ESS_FAIL,
              "person_ess_bulk": ESS_FAIL}


def format_check_value(check: str, value: Any, threshold: Any = None) -> str:
    """A check's value as text that never reads as being on the other side of its threshold.

    R-hat gets three decimals, ESS and divergence counts none, others about four significant digits; when
    rounding would put the shown number on the threshold or across it (1.0099 shown as "1.010" next to the
    rule "< 1.01"), or onto or across the fail line (ESS 99.6 shown as "100" next to "fail below 100"),
    decimals are added until it does not. ``"n/a"`` for a missing value.
    """
    try:
        v = float(value)
    except (TypeError, ValueError):
        return "n/a"
    if not math.isfinite(v):
        return "n/a"
    try:
        t = float(threshold)
    except (TypeError, ValueError):
        t = math.nan
    if check in _WHOLE:
        first = 0
    elif check in _DECIMALS:
        first = _DECIMALS[check]
    else:
        first = max(0, 3 - int(math.floor(math.log10(abs(v))))) if v != 0 else 0
    lines = [x for x in (t, _FAIL_LINE.get(check, math.nan)) if math.isfinite(x)]  # the pass and the fail line
    text = ""
    for decimals in range(first, first + 8):
        text = f"{v:,.{decimals}f}"
        shown = float(text.replace(",", ""))
        if all(np.sign(shown - x) == np.sign(v - x) for x in lines):
            break
    return text


def count_share(count: int, total: int) -> str:
    """``"3 of 2,100 (0.14 %)"``: a count with its share, where a non-zero share is never shown as 0 %."""
    if total <= 0:
        return f"{count:,} of {total:,}"
    pct = 100.0 * count / total
    shown = "0" if count == 0 else f"{pct:.2g}" if pct < 1 else f"{pct:.1f}"
    return f"{count:,} of {total:,} ({shown} %)"


# --------------------------------------------------------------------------- population parameters


def _label(name: str, *parts: Any) -> str:
    return f"{name}[{','.join(str(p) for p in parts)}]"


def population_draws(posterior: xr.Dataset, var_names: Sequence[str] = POPULATION_VARS) -> xr.DataArray:
    """Every scalar population parameter as one DataArray with dims (chain, draw, parameter).

    ``parameter`` labels read ``taste_mean[fare]``, ``taste_corr[fare,time]`` (upper
    triangle only: the diagonal is 1 and the lower triangle repeats it) and
    ``covariate_effect[age,fare]``; the coordinate ``variable`` names the variable.
    """
    columns: list[np.ndarray] = []
    labels: list[str] = []
    variables: list[str] = []
    for name in var_names:
        if name not in posterior:
            continue
        da = posterior[name]
        other = [d for d in da.dims if d not in ("chain", "draw")]
        da = da.transpose("chain", "draw", *other)
        values = da.values
        if name == "taste_corr":
            names = [str(v) for v in da[other[0]].values]
            for i in range(len(names)):
                for j in range(i + 1, len(names)):
                    columns.append(values[:, :, i, j])
                    labels.append(_label(name, names[i], names[j]))
                    variables.append(name)
            continue
        if not other:
            columns.append(values)
            labels.append(name)
            variables.append(name)
            continue
        grids = [[str(v) for v in da[d].values] for d in other]
        for index in np.ndindex(*values.shape[2:]):
            columns.append(values[(slice(None), slice(None)) + index])
            labels.append(_label(name, *(grids[a][i] for a, i in enumerate(index))))
            variables.append(name)
    n_c, n_d = posterior.sizes["chain"], posterior.sizes["draw"]
    data = np.stack(columns, axis=-1) if columns else np.zeros((n_c, n_d, 0))
    return xr.DataArray(
        data, dims=("chain", "draw", "parameter"),
        coords={"chain": posterior["chain"].values, "draw": posterior["draw"].values, "parameter": labels,
                "variable": ("parameter", variables)},
        name="population",
    )


def _diagnose(da: xr.DataArray) -> pd.DataFrame:
    """ArviZ R-hat (rank), bulk and tail ESS of each element of ``da`` along ``dim``."""
    import arviz as az

    ds = xr.Dataset({"x": da})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # constant elements give NaN, reported as such
        rhat = az.rhat(ds, method="rank")["x"]
        bulk = az.ess(ds, method="bulk")["x"]
        tail = az.ess(ds, method="tail")["x"]
    flat = da.stack(__s=("chain", "draw"))
    return pd.DataFrame({
        "rhat": rhat.values.ravel(), "ess_bulk": bulk.values.ravel(), "ess_tail": tail.values.ravel(),
        "mean": flat.mean("__s").values.ravel(), "sd": flat.std("__s").values.ravel(),
    })


def parameter_diagnostics(idata: Any, var_names: Sequence[str] = POPULATION_VARS) -> pd.DataFrame:
    """R-hat, bulk and tail ESS (ArviZ), mean and SD of every population parameter.

    Rows are indexed by the labels of :func:`population_draws`; parameters that are
    constant over all draws (nothing to diagnose) get NaN.
    """
    da = population_draws(idata.posterior, var_names)
    if da.sizes["parameter"] == 0:
        return pd.DataFrame(columns=["variable", "rhat", "ess_bulk", "ess_tail", "mean", "sd"])
    frame = _diagnose(da)
    frame.index = pd.Index(da["parameter"].values, name="parameter")
    frame.insert(0, "variable", da["variable"].values)
    constant = frame["sd"].to_numpy() == 0
    frame.loc[constant, ["rhat", "ess_bulk", "ess_tail"]] = np.nan
    return frame


def _advice_rhat(variable: str, label: str, value: float) -> str:
    base = (f"The chains disagree about {label} (R-hat {format_check_value('rhat', value, RHAT_MAX)}). Run longer "
            "(double tune and draws) and "
            "look at the rank and trace plots: one chain stuck away from the others, or two separate modes, "
            "is a model problem rather than a matter of length.")
    if variable == "taste_sd":
        return base + (" For a taste SD, a chain that sits near zero while others do not points to weak "
                       "identification of the heterogeneity: consider a fixed taste for that attribute.")
    if variable == "taste_corr":
        return base + " Correlations need many persons; with few, set model.correlated = false."
    return base + " Check that no attribute is (nearly) collinear with a constant or another attribute."


def _advice_ess(kind: str, variable: str, label: str, value: float) -> str:
    what = "the centre" if kind == "ess_bulk" else "the tails (interval ends)"
    if variable == "taste_sd":
        return (f"Too few effective draws for {what} of {label} (ESS {value:.0f}): taste SDs mix slowest. "
                "Raise draws (ESS grows about in proportion); with many tasks per person also try "
                "model.parameterization = \"centred\".")
    return (f"Too few effective draws for {what} of {label} (ESS {value:.0f}): raise draws (ESS grows about "
            "in proportion to them) and, if it stays low, look for strong posterior correlations in the pair plot.")


def population_checks(idata: Any, var_names: Sequence[str] = POPULATION_VARS,
                      table: pd.DataFrame | None = None) -> list[Check]:
    """R-hat, bulk ESS and tail ESS of each population variable, graded at its worst element.

    Parameters
    ----------
    idata : arviz.InferenceData
    var_names : sequence of str, default :data:`hierchoice.model.POPULATION_VARS`
    table : DataFrame, optional
        A :func:`parameter_diagnostics` table already computed.
    """
    table = parameter_diagnostics(idata, var_names) if table is None else table
    out: list[Check] = []
    for variable in var_names:
        rows = table[table["variable"] == variable]
        if rows.empty:
            continue
        r = rows["rhat"]
        if r.notna().any():
            label = str(r.idxmax())
            v = float(r.max())
            verdict = _grade_upper(v, RHAT_MAX, RHAT_FAIL)
            n_over = int((r >= RHAT_MAX).sum())
            out.append(Check("rhat", variable, v, RHAT_MAX, f"value < {RHAT_MAX}", verdict,
                             "" if verdict == "pass" else _advice_rhat(variable, label, v), _REF_RHAT,
                             f"worst {label}; {count_share(n_over, int(r.notna().sum()))} at or over {RHAT_MAX}"))
        for kind in ("ess_bulk", "ess_tail"):
            e = rows[kind]
            if not e.notna().any():
                continue
            label = str(e.idxmin())
            v = float(e.min())
            verdict = _grade_lower(v, ESS_MIN, ESS_FAIL)
            out.append(Check(kind, variable, v, ESS_MIN, f"value >= {ESS_MIN}", verdict,
                             "" if verdict == "pass" else _advice_ess(kind, variable, label, v), _REF_RHAT,
                             f"smallest {label}; {count_share(int((e < ESS_MIN).sum()), int(e.notna().sum()))} "
                             f"below {ESS_MIN}"))
    return out


# --------------------------------------------------------------------------- the sampler


def _post_warmup(stat: xr.DataArray, stats: xr.Dataset) -> np.ndarray:
    """The (chain, draw) values of a sampler statistic, without any warm-up draws that were stored."""
    values = stat.transpose("chain", "draw").values
    if "tuning" in stats:
        tuning = stats["tuning"].transpose("chain", "draw").values.astype(bool)
        if tuning.any():
            return np.where(tuning, np.nan, values.astype(float))
    return values.astype(float)


def sampler_checks(idata: Any) -> list[Check]:
    """Divergences, E-BFMI and tree-depth saturation from ``idata.sample_stats``.

    Works with the statistic names of nutpie (``diverging``, ``depth``,
    ``maxdepth_reached``, ``energy``) and of PyMC (``diverging``, ``tree_depth``,
    ``reached_max_treedepth``, ``energy``); a statistic that is absent gives a
    warning record saying so.
    """
    import arviz as az

    if "sample_stats" not in idata.groups():
        return [Check("sampler_stats", "sampler", math.nan, math.nan, "sample_stats present", "warn",
                      "The fit stores no sampler statistics: divergences, E-BFMI and tree depth cannot be checked. "
                      "Refit with an MCMC backend that records them.", "")]
    stats = idata.sample_stats
    if "person_accept" in stats:  # the blocked sampler: no trajectories, so no NUTS statistics to grade
        return blocked_sampler_checks(stats)
    out: list[Check] = []

    if "diverging" in stats:
        div = _post_warmup(stats["diverging"], stats)
        n_div = int(np.nansum(div))
        n_all = int(np.isfinite(div).sum())
        per_chain = ", ".join(str(int(np.nansum(row))) for row in div)
        verdict = "pass" if n_div == 0 else "fail"
        out.append(Check(
            "divergences", "sampler", float(n_div), 0.0, "value == 0", verdict,
            "" if verdict == "pass" else
            (f"{n_div} of {n_all} draws ended in a divergence: the sampler met curvature it cannot follow and the "
             "posterior may be biased. Raise sampling.target_accept (e.g. 0.95, then 0.99); if they persist, "
             "switch model.parameterization (noncentred <-> centred; centred suits persons with many tasks), "
             "or tighten model.prior_scale. The pair plot marks where they happen."),
            _REF_DIV, f"per chain: {per_chain}"))
    else:
        out.append(Check("divergences", "sampler", math.nan, 0.0, "value == 0", "warn",
                         "No 'diverging' statistic stored: divergences cannot be checked.", _REF_DIV))

    if "energy" in stats:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            e = _post_warmup(stats["energy"], stats)
            e = np.where(np.isfinite(e), e, np.nanmean(e, axis=1, keepdims=True))
            bfmi = np.asarray(az.bfmi(e), dtype=float)
        v = float(np.nanmin(bfmi)) if bfmi.size else math.nan
        verdict = "warn" if not np.isfinite(v) else "pass" if v >= EBFMI_MIN else "fail"
        out.append(Check(
            "ebfmi", "sampler", v, EBFMI_MIN, f"value >= {EBFMI_MIN} in every chain", verdict,
            "" if verdict == "pass" else
            (f"E-BFMI {v:.2f} (lowest chain): the momentum resampling barely moves the energy, so the sampler "
             "explores the tails slowly (heavy tails or a funnel). Reparameterize (model.parameterization), "
             "tighten model.prior_scale, or check for a lognormal taste with a very large SD."),
            _REF_EBFMI, "per chain: " + ", ".join(f"{b:.2f}" for b in bfmi)))
    else:
        out.append(Check("ebfmi", "sampler", math.nan, EBFMI_MIN, f"value >= {EBFMI_MIN} in every chain", "warn",
                         "No 'energy' statistic stored: E-BFMI cannot be checked.", _REF_EBFMI))

    flag = next((n for n in ("maxdepth_reached", "reached_max_treedepth") if n in stats), None)
    depth_name = next((n for n in ("depth", "tree_depth") if n in stats), None)
    if flag is not None:
        sat = _post_warmup(stats[flag], stats)
        how = f"'{flag}' flag"
    elif depth_name is not None:
        sat = (_post_warmup(stats[depth_name], stats) >= MAX_TREE_DEPTH).astype(float)
        how = f"'{depth_name}' >= {MAX_TREE_DEPTH}"
    else:
        sat = None
    if sat is not None:
        share = np.nanmean(sat, axis=1)
        v = float(np.nanmax(share)) if share.size else math.nan
        verdict = "pass" if v == 0 else "warn"
        out.append(Check(
            "tree_depth", "sampler", v, 0.0, "share of draws at the maximum tree depth == 0 in every chain", verdict,
            "" if verdict == "pass" else
            (f"In the worst chain {v:.1%} of draws stopped at the maximum tree depth: the trajectories were cut "
             "short, so sampling is slow and ESS low (an efficiency problem, not a bias). Look for strongly "
             "correlated parameters (pair plot), attributes on extreme scales, or a weakly identified constant; "
             "a longer tune lets the mass matrix adapt."),
            _REF_DEPTH, f"from the {how}; per chain: " + ", ".join(f"{s:.1%}" for s in share)))
    else:
        out.append(Check("tree_depth", "sampler", math.nan, 0.0, "share at maximum depth == 0", "warn",
                         "No tree-depth statistic stored: saturation cannot be checked.", _REF_DEPTH))
    return out


# --------------------------------------------------------------------------- person tastes


#: Lowest mean acceptance of a Metropolis block of the blocked sampler before it counts as stuck (common practice).
BLOCK_ACCEPT_MIN = 0.1


def blocked_sampler_checks(stats: Any) -> list[Check]:
    """Acceptance of each Metropolis block of the blocked sampler (``*_accept`` in ``sample_stats``).

    The blocked sampler integrates no trajectory, so divergences, E-BFMI and tree depth do not apply; a block
    whose proposals are almost never accepted leaves its parameters still, which R-hat and ESS then show as well.
    """
    out: list[Check] = []
    for name in sorted(n for n in stats.data_vars if str(n).endswith("_accept")):
        rates = np.nanmean(_post_warmup(stats[name], stats), axis=1)
        v = float(np.nanmin(rates)) if rates.size else math.nan
        verdict = "warn" if not np.isfinite(v) or v < BLOCK_ACCEPT_MIN else "pass"
        out.append(Check(
            "block_acceptance", str(name).removesuffix("_accept"), v, BLOCK_ACCEPT_MIN,
            f"mean acceptance >= {BLOCK_ACCEPT_MIN} in every chain", verdict,
            "" if verdict == "pass" else
            (f"The {name.removesuffix('_accept')} block of the blocked sampler accepted {v:.1%} of its proposals "
             "(lowest chain): its parameters barely move. Run longer warm-up (--tune) or use NUTS "
             "(sampling.method = \"nuts\") on a panel it can handle."),
            _REF_COMMON, "per chain: " + ", ".join(f"{r:.2f}" for r in rates)))
    return out


def person_checks(idata: Any) -> list[Check]:
    """Worst R-hat and smallest bulk ESS over every person taste, with the share over the threshold.

    The ESS record is at most a warning: person tastes feed predictions, which are
    averages over persons and need fewer effective draws than population parameters.
    """
    post = idata.posterior
    if "person_taste" not in post:
        return []
    da = post["person_taste"].transpose("chain", "draw", "person", "attribute")
    table = _diagnose(da)
    n_p, n_k = da.sizes["person"], da.sizes["attribute"]
    persons = np.repeat(np.asarray(da["person"].values, dtype=object), n_k)
    attrs = np.tile(np.asarray(da["attribute"].values, dtype=object), n_p)
    table["label"] = [f"person_taste[{p},{a}]" for p, a in zip(persons, attrs)]
    table.loc[table["sd"].to_numpy() == 0, ["rhat", "ess_bulk", "ess_tail"]] = np.nan
    out: list[Check] = []
    r = table["rhat"]
    if r.notna().any():
        i = int(r.idxmax())
        v = float(r.max())
        over = count_share(int((r >= RHAT_MAX).sum()), int(r.notna().sum()))
        verdict = _grade_upper(v, RHAT_MAX, RHAT_FAIL)
        out.append(Check(
            "person_rhat", "person_taste", v, RHAT_MAX, f"worst value < {RHAT_MAX}", verdict,
            "" if verdict == "pass" else
            (f"The chains disagree about some persons' tastes (worst {table.at[i, 'label']}, R-hat "
             f"{format_check_value('rhat', v, RHAT_MAX)}; {over} person tastes at or over {RHAT_MAX}). Run "
             "longer; if the population parameters also fail, fix those first — person tastes follow them."),
            _REF_RHAT, f"worst {table.at[i, 'label']}; at or over {RHAT_MAX}: {over}"))
    e = table["ess_bulk"]
    if e.notna().any():
        i = int(e.idxmin())
        v = float(e.min())
        below = count_share(int((e < ESS_MIN).sum()), int(e.notna().sum()))
        verdict = _grade_lower(v, ESS_MIN, ESS_FAIL)
        verdict = "warn" if verdict == "fail" else verdict
        out.append(Check(
            "person_ess_bulk", "person_taste", v, ESS_MIN, f"smallest value >= {ESS_MIN}", verdict,
            "" if verdict == "pass" else
            (f"Some person tastes have few effective draws (smallest {table.at[i, 'label']}, ESS {v:.0f}; "
             f"{below} below {ESS_MIN}). Person-level summaries (individual WTP, hit rates) are noisier; "
             "raise draws if you report persons one by one."),
            _REF_RHAT, f"smallest {table.at[i, 'label']}; below {ESS_MIN}: {below}"))
    return out


# --------------------------------------------------------------------------- model-specific


def lognormal_sd_checks(idata: Any, layout: ModelLayout) -> list[Check]:
    """Posterior median of the SD of each lognormal log-taste: collapsed (< 0.05) or too wide (> 2) warns."""
    post = idata.posterior
    if "taste_sd" not in post:
        return []
    out: list[Check] = []
    for k in layout.random:
        if not layout.is_lognormal(k):
            continue
        name = layout.names[k]
        v = float(post["taste_sd"].sel(random_attribute=name).median())
        if v < LOG_SD_COLLAPSED:
            verdict, advice = "warn", (
                f"The SD of log-taste of {name!r} collapsed to about {v:.3f}: the model finds almost no spread "
                "of this taste. With a lognormal taste that often means the attribute is badly scaled or coded "
                "(check its units, that its levels vary within tasks, and the sign), or that a constant "
                "absorbs it. If the data truly show no spread, make the taste fixed; a collapsing SD also "
                "invites divergences.")
        elif v > LOG_SD_LARGE:
            verdict, advice = "warn", (
                f"The SD of log-taste of {name!r} is about {v:.2f}: the implied tastes span orders of magnitude "
                "and the implied mean is dominated by a few persons. Check the attribute's scaling and sign "
                "(a wrong sign makes the log-taste run to -inf for many persons), and outliers in its values.")
        else:
            verdict, advice = "pass", ""
        out.append(Check("lognormal_sd", f"taste_sd[{name}]", v, LOG_SD_COLLAPSED,
                         f"{LOG_SD_COLLAPSED} <= posterior median <= {LOG_SD_LARGE}", verdict, advice, _REF_COMMON))
    return out


def convergence_checks(result: Any, *, layout: ModelLayout | None = None,
                       table: pd.DataFrame | None = None) -> list[Check]:
    """Every convergence record of a fit: population parameters, sampler, person tastes, lognormal SDs.

    Parameters
    ----------
    result : ChoiceFit or arviz.InferenceData
    layout : ModelLayout, optional
        Needed for the lognormal checks when ``result`` is a bare InferenceData.
    table : DataFrame, optional
        A :func:`parameter_diagnostics` table already computed.

    Returns
    -------
    list of Check

    Examples
    --------
    >>> import hierchoice as hc                                    # doctest: +SKIP
    >>> checks = convergence_checks(hc.load_fit("results"))        # doctest: +SKIP
    >>> overall_verdict(checks)                                    # doctest: +SKIP
    'pass'
    """
    idata = getattr(result, "idata", result)
    layout = layout if layout is not None else getattr(result, "layout", None)
    out = []
    if getattr(result, "approximate", False):
        from ..inference.results import APPROXIMATE_CAUTION

        out.append(Check("exact_method", "fit", math.nan, math.nan, "an exact method (NUTS or blocked)", "fail",
                         APPROXIMATE_CAUTION, "docs/performance.md (B1)"))
    out += population_checks(idata, table=table) + sampler_checks(idata) + person_checks(idata)
    if layout is not None:
        out += lognormal_sd_checks(idata, layout)
    return out


# --------------------------------------------------------------------------- the results folder


