r"""Parameter recovery: bias and interval coverage of the population parameters at fixed true values.

:func:`parameter_recovery`
    At fixed true values (a :func:`hierchoice.simulate.simulate_panel`
    design), how biased are the posterior means and how often do the 50 % and
    90 % intervals cover the truth?

Also owns the fixed-truth simulation that :mod:`~hierchoice.validation.power`
builds on (``_simulate``, ``_truth_labels``, ``_check_simulation``, ``_SimItem``).

May import: :mod:`~hierchoice.validation.fitters`, :mod:`~hierchoice.validation.results`,
:mod:`~hierchoice.validation.distributed`, ``hierchoice.diagnostics`` and everything below it.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import xarray as xr

from ..data.panel import ChoicePanel
from ..diagnostics.checks import population_draws
from ..exceptions import SpecError
from ..simulate import SimAttribute, simulate_panel
from ..spec import _positive_int
from .distributed import TaskFailure, run_tasks, task_seed
from .fitters import _STREAM_DATA, _STREAM_FIT, Fitter, NutsFitter, _call_fitter
from .results import _first_success, _options_json, _per_fit_fields

__all__ = ["parameter_recovery"]


def _truth_labels(truth: Mapping[str, Any]) -> dict[str, float]:
    """The population truth of :func:`hierchoice.simulate.simulate_panel`, by parameter label."""
    out = {f"taste_mean[{k}]": float(v) for k, v in truth["taste_mean"].items()}
    out |= {f"taste_sd[{k}]": float(v) for k, v in truth["taste_sd"].items()}
    corr = truth.get("taste_corr")
    if corr is not None:
        names = list(corr.index)
        for i in range(len(names)):
            for j in range(i + 1, len(names)):
                out[f"taste_corr[{names[i]},{names[j]}]"] = float(corr.iloc[i, j])
    effect = truth.get("covariate_effect")
    if effect is not None:
        for c in effect.index:
            for a in effect.columns:
                out[f"covariate_effect[{c},{a}]"] = float(effect.loc[c, a])
    if "state_dependence" in truth:
        out["taste_mean[lagged_choice]"] = float(truth["state_dependence"])
    return out


def _simulate(attributes: Sequence[SimAttribute], options: Mapping[str, Any], seed: int) -> tuple[ChoicePanel, Any]:
    sim = simulate_panel(list(attributes), **dict(options), seed=seed)
    return ChoicePanel.from_frame(sim.data, sim.spec), sim


def _check_simulation(simulation: Mapping[str, Any] | None) -> dict[str, Any]:
    options = dict(simulation or {})
    if "seed" in options:
        raise SpecError("simulation must not set seed: each replication's seed comes from the seed argument.")
    return options


@dataclass(frozen=True)
class _SimItem:
    key: tuple[int, ...]
    seed: int
    n_persons: int | None = None


def _recovery_task(item: _SimItem, *, attributes: Sequence[SimAttribute], simulation: Mapping[str, Any],
                   fitter: Fitter, probs: Sequence[float]) -> dict[str, Any]:
    data_seed = task_seed(item.seed, item.key, _STREAM_DATA)
    panel, sim = _simulate(attributes, simulation, data_seed)
    post, timing = _call_fitter(fitter, panel, panel.spec, task_seed(item.seed, item.key, _STREAM_FIT))
    truth = _truth_labels(sim.truth)
    da = population_draws(post)
    labels = [str(p) for p in da["parameter"].values if str(p) in truth]
    draws = da.sel(parameter=labels).values.reshape(-1, len(labels))
    qs = [q for p in probs for q in ((1 - p) / 2, 1 - (1 - p) / 2)]
    quant = np.quantile(draws, qs, axis=0)  # (2 * n_probs, P)
    return {
        "labels": labels, "truth": np.array([truth[p] for p in labels]), "mean": draws.mean(axis=0),
        "sd": draws.std(axis=0, ddof=1), "lower": quant[0::2], "upper": quant[1::2],
    } | timing


def parameter_recovery(
    attributes: Sequence[SimAttribute],
    *,
    replications: int = 20,
    simulation: Mapping[str, Any] | None = None,
    fitter: Fitter | None = None,
    probs: Sequence[float] = (0.5, 0.9),
    seed: int = 0,
    client: Any = None,
    workers: int | None = None,
    retries: int = 2,
    progress: bool = True,
) -> xr.Dataset:
    r"""Bias and interval coverage of the population parameters at fixed true values.

    Each replication simulates a new panel with :func:`hierchoice.simulate.simulate_panel`
    (the true tastes of ``attributes``, the design options of ``simulation``, a
    seed of its own), fits it and compares the posterior with the truth. Over
    :math:`R` successful replications with posterior means :math:`\hat\theta_r`:

    .. math::

        \text{bias} = \frac1R\sum_r (\hat\theta_r - \theta),\qquad
        \text{coverage}_p = \frac1R\sum_r 1\{\theta \in I_{p,r}\},

    with Monte Carlo standard errors :math:`s/\sqrt R` and
    :math:`\sqrt{c(1-c)/R}`; :math:`I_{p,r}` is the central (equal-tailed)
    ``p`` interval. Coverage near ``p`` is expected on average over the prior; at one
    fixed truth a weakly identified parameter can be over- or under-covered.

    Parameters
    ----------
    attributes : sequence of SimAttribute
        The design's attributes and their true population tastes.
    replications : int, default 20
    simulation : mapping, optional
        Keyword arguments of :func:`~hierchoice.simulate.simulate_panel` other
        than ``attributes`` and ``seed`` (``n_persons``, ``n_tasks``,
        ``alternatives``, ``opt_out``, ``constants``, ``correlation``, ...).
    fitter : callable, optional
        Default :class:`NutsFitter` ``()``.
    probs : sequence of float, default (0.5, 0.9)
    seed, client, workers, retries, progress :
        As for :func:`simulation_based_calibration`.

    Returns
    -------
    xarray.Dataset
        ``truth`` (parameter); over (replication, parameter): ``posterior_mean``,
        ``posterior_sd``, and over (replication, parameter, prob) ``lower``,
        ``upper``, ``covered``; over replication ``seed``, ``divergences``,
        ``seconds``, ``failed``, ``error``; summaries over parameter ``bias``,
        ``bias_se``, ``rmse`` and over (parameter, prob) ``coverage``,
        ``coverage_se``.
    """
    _positive_int(replications, "replications")
    options = _check_simulation(simulation)
    probs = [float(p) for p in probs]
    if not probs or not all(0 < p < 1 for p in probs):
        raise SpecError(f"probs must be interval probabilities in (0, 1), got {probs!r}.")
    fitter = NutsFitter() if fitter is None else fitter
    task_seed(seed, 0)
    _simulate(attributes, options, 0)  # a bad design fails here, not in every task
    items = [_SimItem((r,), seed) for r in range(replications)]
    results = run_tasks(_recovery_task, items,
                        common={"attributes": list(attributes), "simulation": options, "fitter": fitter,
                                "probs": probs},
                        client=client, workers=workers, retries=retries, progress=progress, label="recovery fits")
    first = _first_success(results, "recovery fits")
    labels = first["labels"]
    n, p, k = replications, len(labels), len(probs)
    mean, sd = np.full((n, p), np.nan), np.full((n, p), np.nan)
    lower, upper = np.full((n, p, k), np.nan), np.full((n, p, k), np.nan)
    per_fit = _per_fit_fields(results)
    for i, res in enumerate(results):
        if isinstance(res, TaskFailure):
            continue
        mean[i], sd[i] = res["mean"], res["sd"]
        lower[i], upper[i] = res["lower"].T, res["upper"].T
    per_fit["seed"] = np.array([task_seed(seed, (r,), _STREAM_DATA) for r in range(n)], dtype=np.int64)
    truth = np.asarray(first["truth"], dtype=float)
    ok = ~per_fit["failed"]
    covered = (lower <= truth[None, :, None]) & (truth[None, :, None] <= upper)
    err = mean[ok] - truth
    n_ok = int(ok.sum())
    cov = covered[ok].mean(axis=0)
    ds = xr.Dataset(
        {
            "truth": ("parameter", truth),
            "posterior_mean": (("replication", "parameter"), mean),
            "posterior_sd": (("replication", "parameter"), sd),
            "lower": (("replication", "parameter", "prob"), lower),
            "upper": (("replication", "parameter", "prob"), upper),
            "covered": (("replication", "parameter", "prob"), covered & ok[:, None, None]),
            "bias": ("parameter", err.mean(axis=0)),
            "bias_se": ("parameter", err.std(axis=0, ddof=1) / np.sqrt(n_ok) if n_ok > 1 else np.full(p, np.nan)),
            "rmse": ("parameter", np.sqrt((err**2).mean(axis=0))),
            "coverage": (("parameter", "prob"), cov),
            "coverage_se": (("parameter", "prob"), np.sqrt(cov * (1 - cov) / n_ok)),
        }
        | {k_: ("replication", v) for k_, v in per_fit.items()},
        coords={"replication": np.arange(n), "parameter": labels, "prob": probs},
    )
    ds.attrs.update({"workload": "parameter recovery", "replications": int(n), "seed": int(seed),
                     "fitter": repr(fitter), "failed_fits": int((~ok).sum()),
                     "simulation": _options_json(options), "attributes": repr(list(attributes))})
    return ds
