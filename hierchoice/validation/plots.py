"""Plots of the many-fits workloads: calibration ranks, their ECDF difference, and power curves.

Each function takes a workload's result Dataset and returns a
:class:`matplotlib.figure.Figure` (save it with
:func:`hierchoice.diagnostics.plots.save_figure`).

May import: :mod:`~hierchoice.validation.sbc` (the rank bins) and the modules below
``hierchoice.validation``; matplotlib and scipy only inside functions.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import xarray as xr

from ..exceptions import FitError
from .sbc import _binned, _rank_bins

__all__ = ["plot_rank_histograms", "plot_ecdf_difference", "plot_power_curve"]


def _grid(n: int, width: float = 3.2, height: float = 2.6) -> tuple[Any, list[Any]]:
    from matplotlib.figure import Figure

    cols = min(4, max(1, n))
    rows = math.ceil(n / cols)
    fig = Figure(figsize=(width * cols, height * rows))
    axes = np.atleast_1d(fig.subplots(rows, cols, squeeze=False)).ravel().tolist()
    for ax in axes[n:]:
        ax.set_visible(False)
    return fig, axes[:n]


def _sbc_ranks(result: xr.Dataset) -> tuple[np.ndarray, int]:
    if "rank" not in result or "thin_to" not in result.attrs:
        raise FitError("Expected the result of simulation_based_calibration (variables rank, attrs thin_to).")
    ranks = result["rank"].transpose("fit", "parameter").values
    return ranks[(ranks >= 0).all(axis=1)], int(result.attrs["thin_to"])


def _title(ax: Any, result: xr.Dataset, p: int, label: str) -> None:
    flagged = bool(result["flagged"].values[p]) if "flagged" in result else False
    pval = float(result["chi2_pvalue"].values[p]) if "chi2_pvalue" in result else float("nan")
    ax.set_title(f"{label}\nchi-square p = {pval:.3g}" + ("  FLAGGED" if flagged else ""), fontsize="small",
                 color="tab:red" if flagged else "black")


def plot_rank_histograms(result: xr.Dataset) -> Any:
    """Histograms of the calibration ranks, one panel per parameter (as in Talts et al. 2018).

    Bars are the chi-square bins; the grey band is the central ``1 - alpha`` range of
    each bin's count under uniform ranks (pointwise, binomial). A smile says the
    posteriors are too narrow, a frown too wide, ranks piled at one end that they are
    biased to one side.
    Returns a :class:`matplotlib.figure.Figure` (save it with
    :func:`hierchoice.diagnostics.plots.save_figure`).
    """
    from scipy import stats

    ranks, thin_to = _sbc_ranks(result)
    n = ranks.shape[0]
    alpha = float(result.attrs.get("alpha", 0.01))
    groups = _rank_bins(thin_to, n, int(result.attrs.get("chi2_bins", 0)) or None)
    labels = [str(p) for p in result["parameter"].values]
    fig, axes = _grid(len(labels))
    edges = np.array([g[0] for g in groups] + [thin_to + 1]) - 0.5
    widths = np.diff(edges)
    for p, ax in enumerate(axes):
        observed, expected = _binned(ranks[:, p], groups, thin_to)
        share = expected / n
        lo, hi = stats.binom.ppf(alpha / 2, n, share), stats.binom.ppf(1 - alpha / 2, n, share)
        ax.bar(edges[:-1], observed / widths, width=widths, align="edge", color="tab:blue", alpha=0.7,
               edgecolor="white")
        ax.fill_between(edges, np.append(lo / widths, lo[-1] / widths[-1]),
                        np.append(hi / widths, hi[-1] / widths[-1]), step="post", color="grey", alpha=0.3, lw=0)
        ax.stairs(expected / widths, edges, color="black", lw=1)
        ax.set(xlim=(-0.5, thin_to + 0.5), xlabel=f"rank (0..{thin_to})", ylabel="fits per rank value")
        _title(ax, result, p, labels[p])
    fig.suptitle(f"Calibration ranks of {n} fits (grey: {100 * (1 - alpha):g} % range per bin if uniform)",
                 fontsize="medium")
    fig.tight_layout()
    return fig


def plot_ecdf_difference(result: xr.Dataset) -> Any:
    """ECDF of the ranks minus the uniform CDF, with the simultaneous band (Säilynoja et al. 2022).

    A curve that leaves the grey band anywhere is flagged; the band holds at every
    point at once with probability ``1 - alpha`` under uniform ranks.
    """
    ranks, thin_to = _sbc_ranks(result)
    n = ranks.shape[0]
    z = result["z"].values
    lower, upper = result["ecdf_lower"].values, result["ecdf_upper"].values
    labels = [str(p) for p in result["parameter"].values]
    fig, axes = _grid(len(labels))
    for p, ax in enumerate(axes):
        ecdf = np.cumsum(np.bincount(ranks[:, p], minlength=thin_to + 1))[:-1] / n
        ax.fill_between(z, lower - z, upper - z, step="mid", color="grey", alpha=0.3, lw=0)
        ax.step(z, ecdf - z, where="mid", color="tab:blue")
        ax.axhline(0, color="black", lw=0.8)
        ax.set(xlim=(0, 1), xlabel="fractional rank", ylabel="ECDF - uniform")
        _title(ax, result, p, labels[p])
    alpha = float(result.attrs.get("alpha", 0.01))
    fig.suptitle(f"ECDF difference of {n} fits (grey: simultaneous {100 * (1 - alpha):g} % band)",
                 fontsize="medium")
    fig.tight_layout()
    return fig


def plot_power_curve(result: xr.Dataset) -> Any:
    """The target of :func:`power_analysis` against the number of respondents, ±2 Monte Carlo SE."""
    from matplotlib.figure import Figure

    if "estimate" not in result or "persons" not in result.dims:
        raise FitError("Expected the result of power_analysis (variables estimate, mc_se over persons).")
    fig = Figure(figsize=(5.5, 4))
    ax = fig.subplots()
    x = result["persons"].values
    ax.errorbar(x, result["estimate"].values, yerr=2 * result["mc_se"].values, fmt="o-", capsize=3)
    kind = result.attrs.get("target_kind", "")
    ax.set(xlabel="respondents", ylabel="mean interval width" if kind == "width" else "probability",
           title=str(result.attrs.get("target", "power analysis")))
    ax.title.set_fontsize("small")
    if kind == "probability":
        ax.set_ylim(-0.05, 1.05)
    fig.tight_layout()
    return fig
