"""Diagnostic figures: rank, trace, energy and pair plots (ArviZ), reliability and share plots.

Every function returns a :class:`matplotlib.figure.Figure` that pyplot does not hold (a notebook shows a
returned figure once, not again when the cell ends); :func:`save_figure`
writes one as PNG atomically and closes it, and :func:`write_diagnostic_plots`
writes the whole set into a folder. Population parameters are plotted as the
scalar labels of :func:`hierchoice.checks.population_draws` (``taste_sd[fare]``,
upper-triangle correlations only).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from .._io import write_with
from ..exceptions import FitError
from .checks import parameter_diagnostics, population_draws

__all__ = [
    "plot_rank",
    "plot_trace",
    "plot_energy",
    "plot_mean_sd_pair",
    "plot_reliability",
    "plot_ppc_shares",
    "save_figure",
    "write_diagnostic_plots",
]


def _figure_of(axes: Any) -> Any:
    """The figure ArviZ drew ``axes`` on, closed from pyplot: returned, it is shown once in a notebook, not twice."""
    import matplotlib.pyplot as plt

    fig = np.asarray(axes, dtype=object).ravel()[0].figure
    plt.close(fig)
    return fig


def _population_dataset(idata: Any, max_parameters: int, table: pd.DataFrame | None = None) -> xr.Dataset:
    """One variable per non-constant scalar population parameter, at most ``max_parameters``.

    With a :func:`~hierchoice.checks.parameter_diagnostics` ``table`` the parameters
    with the highest R-hat come first (the ones worth looking at); otherwise model order.
    """
    da = population_draws(idata.posterior)
    keep = [str(p) for p in da["parameter"].values if float(da.sel(parameter=p).std()) > 0]
    if not keep:
        raise FitError("The posterior has no varying population parameter to plot.")
    if table is not None:
        rhat = table["rhat"].reindex(keep).fillna(-np.inf)
        keep = list(rhat.sort_values(ascending=False, kind="stable").index)
    ds = xr.Dataset({p: da.sel(parameter=p, drop=True).drop_vars("variable", errors="ignore")
                     for p in keep[:max_parameters]})
    ds.attrs["n_parameters"] = len(keep)
    return ds


def _shown_note(fig: Any, ds: xr.Dataset, order: str) -> None:
    """Title the figure "first K of N parameters shown" when some parameters did not fit in it."""
    n_all, n = int(ds.attrs.get("n_parameters", len(ds.data_vars))), len(ds.data_vars)
    if n < n_all:
        fig.suptitle(f"first {n} of {n_all} population parameters shown ({order}); "
                     "diagnostics.json grades all of them", fontsize=10)


def plot_rank(idata: Any, *, max_parameters: int = 24) -> Any:
    """Rank plots of the population parameters, one panel per parameter (:func:`arviz.plot_rank`).

    Well-mixed chains give flat, overlapping rank histograms; a chain whose ranks
    pile up at one end sits in a different place from the others.
    """
    import arviz as az

    ds = _population_dataset(idata, max_parameters)
    fig = _figure_of(az.plot_rank(ds, kind="bars", show=False))
    _shown_note(fig, ds, "model order")
    fig.tight_layout()
    return fig


def plot_trace(idata: Any, *, max_parameters: int = 12, table: pd.DataFrame | None = None) -> Any:
    """Trace and marginal density of the population parameters (:func:`arviz.plot_trace`).

    With a :func:`~hierchoice.checks.parameter_diagnostics` ``table``, the
    ``max_parameters`` with the highest R-hat are shown; when parameters are left out the figure's title says
    "first K of N population parameters shown".
    """
    import arviz as az

    ds = _population_dataset(idata, max_parameters, table)
    n = len(ds.data_vars)
    fig = _figure_of(az.plot_trace(ds, compact=False, show=False, figsize=(12, 1.0 + 2.2 * n)))
    _shown_note(fig, ds, "highest R-hat first" if table is not None else "model order")
    fig.tight_layout()
    return fig


def plot_energy(idata: Any) -> Any:
    """Marginal energy against energy transitions (:func:`arviz.plot_energy`); E-BFMI in the legend."""
    import arviz as az

    if "sample_stats" not in idata.groups() or "energy" not in idata.sample_stats:
        raise FitError("plot_energy needs the 'energy' sampler statistic, which this fit did not store.")
    return _figure_of(az.plot_energy(idata, show=False))


def plot_mean_sd_pair(idata: Any, attribute: str | None = None) -> Any:
    """Pair plot of one attribute's population mean against its population SD, divergences marked.

    ``attribute`` defaults to the random attribute whose SD has the smallest bulk ESS.
    A funnel (the mean spreading as the SD shrinks) with divergences at its neck is
    the classic sign that the parameterization does not suit the data.
    """
    import arviz as az

    post = idata.posterior
    if "taste_sd" not in post:
        raise FitError("plot_mean_sd_pair needs random tastes ('taste_sd'); every taste of this fit is fixed.")
    names = [str(v) for v in post["random_attribute"].values]
    if attribute is None:
        table = parameter_diagnostics(idata, ("taste_sd",))
        ess = table["ess_bulk"].to_numpy()
        attribute = names[int(np.nanargmin(ess))] if np.isfinite(ess).any() else names[0]
    if attribute not in names:
        raise FitError(f"plot_mean_sd_pair: {attribute!r} has no random taste; random attributes: {names}.")
    ds = xr.Dataset({
        f"taste_mean[{attribute}]": post["taste_mean"].sel(attribute=attribute, drop=True),
        f"taste_sd[{attribute}]": post["taste_sd"].sel(random_attribute=attribute, drop=True),
    })
    groups: dict[str, Any] = {"posterior": ds}
    has_div = "sample_stats" in idata.groups() and "diverging" in idata.sample_stats
    if has_div:
        groups["sample_stats"] = idata.sample_stats[["diverging"]]
    axes = az.plot_pair(az.InferenceData(**groups), kind="scatter", divergences=has_div, show=False,
                        scatter_kwargs={"alpha": 0.4})
    return _figure_of(axes)


def plot_reliability(table: pd.DataFrame, *, in_sample: bool = True) -> Any:
    """Reliability diagram from :func:`hierchoice.predictive.reliability`: observed against predicted.

    Points on the diagonal are calibrated. The grey bars are the bands of
    :func:`hierchoice.diagnostics.calibration.calibration_bands` (Bonferroni over the bins: a calibrated model
    puts any point outside them in at most 1 % of tables); points outside them are drawn in red. With
    ``in_sample`` (the fit's own tasks) the figure says that the points are expected to lie off the diagonal
    (steeper than it) even for a correct model, and nothing is marked: only held-out tasks are a fair test.
    """
    from matplotlib.figure import Figure

    from .calibration import calibration_bands

    bands = calibration_bands(table)
    fig = Figure(figsize=(5, 5.6 if in_sample else 5))
    ax = fig.subplots()
    ax.plot([0, 1], [0, 1], color="grey", lw=1, ls="--", label="calibrated")
    p = bands["mean_predicted"]
    half = f"±{bands.attrs['z_band']:.2f} SE"
    ax.errorbar(p, p, yerr=[p - bands["band_low"], bands["band_high"] - p], fmt="none", ecolor="lightgrey",
                elinewidth=6, label=f"{half} (a test only on held-out tasks)" if in_sample else
                f"{half} if calibrated (1 % false alarms)")
    sizes = 20 + 200 * bands["n"] / max(float(bands["n"].max()), 1.0)
    colours = np.where(bands["outside"] & (not in_sample), "tab:red", "tab:blue")
    ax.scatter(p, bands["observed"], s=sizes, c=colours, zorder=3, label="observed share")
    what = "in-sample (the fit's own tasks)" if in_sample else "held-out tasks"
    ax.set(xlim=(0, 1), ylim=(0, 1), xlabel="posterior-mean predicted probability",
           ylabel="observed choice frequency", title=f"Reliability: {what}")
    ax.legend(loc="upper left", fontsize="small")
    if in_sample:
        fig.text(0.02, 0.01, "Not a test of calibration: each person's tastes were fitted to these choices, so\n"
                 "points lie off the diagonal (steeper) even for a correct model. Use hierchoice holdout.",
                 fontsize=7.5, color="#444")
        fig.subplots_adjust(bottom=0.18)
    return fig


def plot_ppc_shares(table: pd.DataFrame) -> Any:
    """Observed choice shares against their replicated intervals (:func:`hierchoice.predictive.ppc_shares`)."""
    from matplotlib.figure import Figure

    labels = [lvl if stat == "alternative" else f"{attr}={lvl}"
              for stat, attr, lvl in zip(table["statistic"], table["attribute"], table["level"])]
    y = np.arange(len(labels))[::-1]
    fig = Figure(figsize=(6, 0.8 + 0.35 * len(labels)))
    ax = fig.subplots()
    ax.hlines(y, table["eti_low"], table["eti_high"], color="tab:blue", lw=4, alpha=0.5, label="replicated interval")
    ax.plot(table["replicated_mean"], y, "|", color="tab:blue", ms=12)
    colours = np.where(table["outside"], "tab:red", "black")
    ax.scatter(table["observed"], y, color=colours, zorder=3, label="observed")
    ax.set_yticks(y, labels)
    ax.set(xlabel="share of tasks", title="Posterior-predictive choice shares")
    ax.legend(loc="best", fontsize="small")
    fig.tight_layout()
    return fig


def save_figure(fig: Any, path: str | Path, *, dpi: int = 110) -> Path:
    """Write ``fig`` as PNG to ``path`` atomically, then close it."""
    import matplotlib.pyplot as plt

    try:
        return write_with(Path(path), lambda tmp: fig.savefig(tmp, format="png", dpi=dpi, bbox_inches="tight"))
    finally:
        plt.close(fig)


def write_diagnostic_plots(result: Any, folder: str | Path, *, reliability_table: pd.DataFrame | None = None,
                           shares_table: pd.DataFrame | None = None,
                           table: pd.DataFrame | None = None) -> dict[str, Path]:
    """Write the diagnostic figures of ``result`` as PNG files into ``folder``.

    Files: ``rank.png``, ``trace.png``, ``energy.png`` (with sampler statistics),
    ``pair_mean_sd.png`` (with random tastes), ``reliability.png`` and
    ``ppc_shares.png`` (when their tables are given). Returns name -> path.
    """
    folder = Path(folder)
    idata = result.idata
    out: dict[str, Path] = {}
    out["rank"] = save_figure(plot_rank(idata), folder / "rank.png")
    out["trace"] = save_figure(plot_trace(idata, table=table), folder / "trace.png")
    if "sample_stats" in idata.groups() and "energy" in idata.sample_stats:
        out["energy"] = save_figure(plot_energy(idata), folder / "energy.png")
    if "taste_sd" in idata.posterior:
        attribute = None
        if table is not None:
            sd_rows = table[table["variable"] == "taste_sd"]
            if sd_rows["ess_bulk"].notna().any():
                attribute = str(sd_rows["ess_bulk"].idxmin())[len("taste_sd["):-1]
        out["pair_mean_sd"] = save_figure(plot_mean_sd_pair(idata, attribute), folder / "pair_mean_sd.png")
    if reliability_table is not None and len(reliability_table):
        out["reliability"] = save_figure(plot_reliability(reliability_table), folder / "reliability.png")
    if shares_table is not None and len(shares_table):
        out["ppc_shares"] = save_figure(plot_ppc_shares(shares_table), folder / "ppc_shares.png")
    return out
