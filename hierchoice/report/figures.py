"""The plots embedded in the report, each returned as an ``<img>`` tag holding a base64 PNG.

Owns the figures drawn for the report (tastes across people, forest plots, respondents' caterpillar plot,
share sensitivity) and the PNG helpers (:func:`_png` for a matplotlib figure, :func:`_png_file` for a
diagnostic plot already written to the results folder). Imports matplotlib and scipy lazily, and within
``hierchoice.report`` only :mod:`hierchoice.report.markup`.
"""

from __future__ import annotations

import base64
import io
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ..inference.results import ChoiceFit
from .markup import _e, _mpl_text

__all__ = ["_caterpillar", "_forest", "_png", "_png_file", "_sensitivity_plot", "_taste_plot"]


def _figure(width: float, height: float) -> Any:
    from matplotlib.figure import Figure

    return Figure(figsize=(width, height), dpi=100, layout="constrained")


def _png(fig: Any, alt: str) -> str:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100)
    data = base64.b64encode(buf.getvalue()).decode("ascii")
    return f"<img alt='{_e(alt)}' src='data:image/png;base64,{data}'>"


def _png_file(path: Path, alt: str) -> str:
    data = base64.b64encode(path.read_bytes()).decode("ascii")
    return f"<img class='diag' alt='{_e(alt)}' src='data:image/png;base64,{data}'>"


def _taste_plot(result: ChoiceFit, persons: pd.DataFrame | None, units: dict[str, str],
                max_draws: int = 200) -> str | None:
    """Small multiples: the implied distribution across people of each random taste, with person means.

    ``units`` names each term's unit (the x axis). In WTP space the population curve of a term other than price
    is of willingness to pay, so the respondents' means shown with it are their WTP (``person_wtp``), not their
    utility coefficients.
    """
    from scipy import stats

    layout = result.layout
    random = list(layout.random)
    if not random:
        return None
    post = result.posterior
    step = max(1, (post.sizes["chain"] * post.sizes["draw"]) // max_draws)
    mu_all = post["taste_mean"].sel(attribute=layout.names).stack(s=("chain", "draw")).values[:, ::step]  # (K, S)
    sd_all = post["taste_sd"].sel(random_attribute=layout.random_names).stack(
        s=("chain", "draw")).values[:, ::step]  # (R, S)
    n = len(random)
    cols = min(3, n)
    rows = int(np.ceil(n / cols))
    fig = _figure(3.6 * cols, 2.7 * rows)
    axes = fig.subplots(rows, cols, squeeze=False)
    for i, k in enumerate(random):
        ax = axes[i // cols][i % cols]
        name = layout.names[k]
        mu, sd = mu_all[k], sd_all[layout.random.index(k)]
        sign = layout.sign(k)
        med_mu, med_sd = float(np.median(mu)), float(np.median(sd))
        if layout.is_lognormal(k):
            lo, hi = np.exp(med_mu + med_sd * np.array([-2.8, 2.8]))
            lo, hi = sorted((sign * lo, sign * hi))
        else:
            lo, hi = med_mu - 3 * med_sd, med_mu + 3 * med_sd
        pm = None
        if layout.wtp_space and k != layout.price and "person_wtp" in post:
            pm = post["person_wtp"].sel(wtp_attribute=name).mean(("chain", "draw")).values
        elif persons is not None:
            pm = persons.loc[persons["attribute"] == name, "mean"].to_numpy()
        if pm is not None:
            if pm.size:
                lo, hi = min(lo, float(pm.min())), max(hi, float(pm.max()))
        pad = 0.05 * (hi - lo if hi > lo else 1.0)
        x = np.linspace(lo - pad, hi + pad, 240)
        if layout.is_lognormal(k):
            y = np.zeros((mu.size, x.size))
            inside = sign * x > 0
            xs = np.abs(x[inside])
            y[:, inside] = stats.norm.pdf((np.log(xs)[None, :] - mu[:, None]) / sd[:, None]) / (sd[:, None] * xs)
        else:
            y = stats.norm.pdf(x[None, :], mu[:, None], np.maximum(sd[:, None], 1e-12))
        band = np.quantile(y, [0.05, 0.5, 0.95], axis=0)
        ax.fill_between(x, band[0], band[2], color="#23577a", alpha=0.22, lw=0, label="population (90 % band)")
        ax.plot(x, band[1], color="#23577a", lw=1.8, label="population (median)")
        top = float(band[1].max())
        if pm is not None and pm.size:
            counts, _, _ = ax.hist(pm, bins=min(30, max(8, pm.size // 6)), density=True, color="#d08c2f",
                                   alpha=0.55, label="respondents' posterior means")
            top = max(top, float(np.max(counts)))
        # draws with a tiny SD make needle-sharp densities; they would flatten everything else
        ax.set_ylim(0, 1.15 * top if top > 0 else 1.0)
        if x[0] < 0 < x[-1]:
            ax.axvline(0, color="#888", lw=0.8, ls="--")
        ax.set_title(_mpl_text(name), fontsize=10)
        ax.set_yticks([])
        ax.tick_params(labelsize=8)
        ax.set_xlabel(_mpl_text(units[name]), fontsize=8)
    for j in range(n, rows * cols):
        axes[j // cols][j % cols].set_visible(False)
    handles, labels = axes[0][0].get_legend_handles_labels()
    fig.legend(handles, labels, loc="outside lower center", ncols=3, fontsize=8, frameon=False)
    return _png(fig, "Distribution of each random taste across people")


def _forest(labels: Sequence[str], mid: np.ndarray, lo: np.ndarray, hi: np.ndarray, *, xlabel: str,
            spread: tuple[np.ndarray, np.ndarray] | None = None, spread_label: str = "",
            interval_label: str = "", as_percent: bool = False) -> Any:
    n = len(labels)
    fig = _figure(7.6, 0.5 + 0.42 * n + 0.6)
    ax = fig.subplots()
    y = np.arange(n)[::-1]
    if spread is not None:
        ax.hlines(y, spread[0], spread[1], color="#d08c2f", lw=7, alpha=0.45, label=spread_label)
    ax.hlines(y, lo, hi, color="#23577a", lw=2.2, label=interval_label)
    ax.plot(mid, y, "o", color="#23577a", ms=5)
    ax.set_yticks(y)
    ax.set_yticklabels([_mpl_text(v) for v in labels], fontsize=9)
    left, right = ax.get_xlim()
    if left < 0 < right:
        ax.axvline(0, color="#888", lw=0.8, ls="--")
    if as_percent:
        ax.xaxis.set_major_formatter(lambda v, _pos: f"{100 * v:.0f} %")
    ax.set_xlabel(_mpl_text(xlabel), fontsize=9)
    ax.tick_params(axis="x", labelsize=8)
    ax.grid(axis="x", color="#e4e8ec", lw=0.6)
    if spread is not None or interval_label:
        fig.legend(loc="outside lower center", ncols=2, fontsize=8, frameon=False)
    return fig


def _caterpillar(result: ChoiceFit, persons: pd.DataFrame, units: dict[str, str],
                 max_panels: int = 4) -> str | None:
    """Each respondent's posterior coefficient with its interval, sorted; ``units`` labels each panel's y axis."""
    names = [result.layout.names[k] for k in result.layout.random][:max_panels]
    if not names:
        return None
    cols = min(2, len(names))
    rows = int(np.ceil(len(names) / cols))
    fig = _figure(5.2 * cols, 2.8 * rows)
    axes = fig.subplots(rows, cols, squeeze=False)
    for i, name in enumerate(names):
        ax = axes[i // cols][i % cols]
        t = persons[persons["attribute"] == name].sort_values("mean")
        x = np.arange(len(t))
        ax.vlines(x, t["eti_low"], t["eti_high"], color="#23577a", alpha=0.35, lw=1)
        ax.plot(x, t["mean"], ".", color="#23577a", ms=3)
        ax.set_title(_mpl_text(name), fontsize=10)
        ax.set_xticks([])
        ax.set_xlabel("respondents, sorted by posterior mean", fontsize=8)
        ax.set_ylabel(_mpl_text(units[name]), fontsize=7)
        ax.tick_params(labelsize=8)
        if t["eti_low"].min() < 0 < t["eti_high"].max():
            ax.axhline(0, color="#888", lw=0.8, ls="--")
    for j in range(len(names), rows * cols):
        axes[j // cols][j % cols].set_visible(False)
    return _png(fig, "Each respondent's posterior taste with its interval")


def _sensitivity_plot(curve: pd.DataFrame, attribute: str, changed: str) -> str:
    fig = _figure(7.6, 3.6)
    ax = fig.subplots()
    colours = ["#23577a", "#d08c2f", "#5b8c3a", "#8e4585", "#777777", "#b5482b"]
    for i, (alt, part) in enumerate(curve.groupby("alternative", sort=False)):
        c = colours[i % len(colours)]
        x = part["value"].astype(float).to_numpy()
        ax.fill_between(x, part["hdi_low"], part["hdi_high"], color=c, alpha=0.18, lw=0)
        ax.plot(x, part["median"], color=c, lw=1.8, label=_mpl_text(alt))
    ax.yaxis.set_major_formatter(lambda v, _pos: f"{100 * v:.0f} %")
    ax.set_xlabel(_mpl_text(f"{attribute} of {changed} (over the design's range)"), fontsize=9)
    ax.set_ylabel("predicted share", fontsize=9)
    ax.tick_params(labelsize=8)
    ax.grid(color="#e4e8ec", lw=0.6)
    ax.legend(fontsize=8, frameon=False)
    return (_png(fig, f"Shares as {attribute} of {changed} changes")
            + f"<p class='caption'>Shares as the {_e(attribute)} of {_e(changed)} moves over the range of the design, "
              "the rest of the market fixed (median and 90 % band; new people from the population).</p>")
