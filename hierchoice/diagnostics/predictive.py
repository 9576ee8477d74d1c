r"""Predictive checks: does the fitted model reproduce the choices it was fitted to, and new ones?

Four questions, four tools (``docs/diagnostics.md`` says which to use when):

* :func:`hit_rate` — how often the alternative with the highest posterior-mean
  probability is the one chosen, against the chance rate (the mean over tasks of
  one over the number of available alternatives). In-sample, so optimistic.
* :func:`reliability` — are the predicted probabilities calibrated? Every
  (task, available alternative) pair is binned by its posterior-mean probability
  and the bin's mean prediction is set against the observed choice frequency.
* :func:`ppc_shares` — posterior-predictive check of choice shares per alternative
  and per level of each categorical attribute: replicated choices (one set per
  posterior draw) give an interval the observed share should fall in (Gelman,
  Meng & Stern 1996, Statistica Sinica 6).
* :func:`holdout_validation` — fit on part of each person's tasks, predict the
  rest from each person's posterior tastes: hit rate and mean log predictive
  density, for the mixed model and for a fixed-taste (conditional logit) model.

:func:`prior_predictive` asks the question before fitting: do the priors imply
plausible choice behaviour (Gabry, Simpson, Vehtari, Betancourt & Gelman 2019,
JRSS A 182(2))?

Probabilities are logit probabilities given each posterior draw of a person's
tastes, averaged over draws; they are computed on the panel's real rows only
(:mod:`hierchoice.diagnostics.predictive_rows`: memory linear in the available
alternatives of the real tasks, draws taken in blocks):

.. math::

    \bar P_{ntj} = \frac1S \sum_{s=1}^S P_{ntj}(\beta_n^{(s)}).
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Mapping
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from .._args import NOT_GIVEN, aliased, whole_number
from .._backend import load_backend, quiet_pymc_logs
from .._display import Progress, html_table, status, want_progress
from ..data.panel import ChoicePanel
from ..exceptions import DataError, SpecError, first_few
from ..inference.results import thin_draws
from ..model.likelihood import cell_differences, task_loglik_cells
from ..spec import Spec, load_spec
from .predictive_rows import (
    Rows,
    counts,
    draw_block,
    level_codes,
    mean_probabilities,
    replicate_choices,
    row_probabilities,
    share_statistics,
    task_hits,
    task_mask,
)

__all__ = [
    "taste_draws",
    "posterior_choice_probabilities",
    "hit_rate",
    "reliability",
    "ppc_shares",
    "prior_predictive",
    "holdout_split",
    "fixed_taste_spec",
    "score_tasks",
    "HoldoutResult",
    "holdout_validation",
]

# --------------------------------------------------------------------------- helpers


def taste_draws(result: Any, panel: ChoicePanel | None = None, *, max_draws: int | None = None) -> np.ndarray:
    """Posterior draws of each person's tastes, shape (n_draws, n_persons, n_attributes).

    Persons and attributes are those of ``panel`` (default: the fit's own panel),
    selected by label; chains are pooled. With ``max_draws``, evenly spaced draws
    are kept.
    """
    panel = result.panel if panel is None else panel
    da = result.person_draws("taste_draws")
    known = set(da["person"].values.tolist())
    missing = [p for p in panel.persons if p not in known]
    if missing:
        raise DataError(
            f"Persons {first_few(missing)} of the panel have no posterior tastes in this fit (it was fitted on "
            "other persons); predict only persons the fit has seen."
        )
    da = da.sel(person=list(panel.persons), attribute=list(panel.attributes))
    da = thin_draws(da, max_draws)
    values = da.transpose("chain", "draw", "person", "attribute").values
    return values.reshape((-1,) + values.shape[2:])


def _prob_array(panel: ChoicePanel, rows: Rows, row_prob: np.ndarray) -> xr.DataArray:
    """The (person, task, alternative) output of row probabilities: 0 where unavailable, NaN on padded tasks."""
    cells = panel.cells
    n_t = max(int(cells.position.max(initial=-1)) + 1, 1)
    prob = np.zeros((panel.n_persons, n_t, len(panel.alternatives)))
    prob[~task_mask(panel, n_t)] = np.nan
    prob[rows.owner, cells.position[rows.task], cells.alt] = row_prob
    return xr.DataArray(
        prob, dims=("person", "task", "alternative"),
        coords={"person": list(panel.persons), "task": np.arange(n_t), "alternative": list(panel.alternatives)},
        name="probability",
    )


def posterior_choice_probabilities(result: Any, *, panel: ChoicePanel | None = None,
                                   max_draws: int | None = None) -> xr.DataArray:
    r"""Posterior-mean choice probability of every alternative in every task.

    Parameters
    ----------
    result : ChoiceFit
    panel : ChoicePanel, optional
        Tasks to predict (default: the fit's own). Its persons must be in the fit.
    max_draws : int, optional
        Use this many evenly spaced posterior draws (default: all).

    Returns
    -------
    DataArray, dims (person, task, alternative)
        :math:`\bar P_{ntj}`; 0 for unavailable alternatives, NaN for padded tasks.
    """
    panel = result.panel if panel is None else panel
    rows = Rows.of(panel)
    return _prob_array(panel, rows, mean_probabilities(panel, rows, taste_draws(result, panel, max_draws=max_draws)))


def _row_prob(result: Any, panel: ChoicePanel, rows: Rows, probabilities: xr.DataArray | None) -> np.ndarray:
    """Posterior-mean row probabilities: computed, or read from a given (person, task, alternative) array."""
    if probabilities is None:
        return mean_probabilities(panel, rows, taste_draws(result, panel))
    cells = panel.cells
    return np.nan_to_num(np.asarray(probabilities.values)[rows.owner, cells.position[rows.task], cells.alt], nan=0.0)


def hit_rate(result: Any, *, panel: ChoicePanel | None = None,
             probabilities: xr.DataArray | None = None) -> pd.Series:
    """Share of tasks whose most probable alternative (posterior-mean probability) was chosen.

    Parameters
    ----------
    result : ChoiceFit
    panel : ChoicePanel, optional
        Tasks to score (default: the fit's own, an in-sample figure).
    probabilities : DataArray, optional
        :func:`posterior_choice_probabilities` already computed for ``panel``.

    Returns
    -------
    Series
        ``hit_rate``; ``chance_rate`` (:attr:`ChoicePanel.chance_rate`, the mean over
        tasks of 1 / available alternatives); ``lift`` (their ratio); ``n_tasks``.
    """
    panel = result.panel if panel is None else panel
    rows = Rows.of(panel)
    rate = float(np.mean(task_hits(_row_prob(result, panel, rows, probabilities), rows)))
    chance = panel.chance_rate
    return pd.Series({"hit_rate": rate, "chance_rate": chance, "lift": rate / chance, "n_tasks": panel.n_tasks},
                     name="hit_rate")


def reliability(result: Any, *, bins: int = 10, panel: ChoicePanel | None = None,
                probabilities: xr.DataArray | None = None) -> pd.DataFrame:
    """Reliability table: predicted probability against observed choice frequency, by bin.

    Every available alternative of every real task is one prediction (its
    posterior-mean probability) and one outcome (chosen or not). Predictions are
    put into ``bins`` equal-width bins on [0, 1].

    Returns
    -------
    DataFrame, one row per non-empty bin
        ``bin_lower``, ``bin_upper``, ``n``, ``mean_predicted``, ``observed`` (share
        chosen) and ``se`` (standard error of the observed share if the predictions
        were right and the outcomes independent, :math:`\\sqrt{\\sum_i p_i(1-p_i)}/n`).
        In-sample (the fit's own tasks) the table is not a fair test: see
        :mod:`hierchoice.diagnostics.calibration` for why, and for the graded bands.
    """
    whole_number(bins, "reliability(bins=...)")
    panel = result.panel if panel is None else panel
    rows = Rows.of(panel)
    p = _row_prob(result, panel, rows, probabilities)
    y = np.zeros(p.size)
    y[rows.chosen_row] = 1.0
    idx = np.minimum((p * bins).astype(int), bins - 1)
    rows = []
    for b in range(bins):
        sel = idx == b
        n = int(sel.sum())
        if n == 0:
            continue
        mp = float(p[sel].mean())
        var = float(np.sum(p[sel] * (1 - p[sel])))  # variance of the number chosen, outcomes independent
        rows.append({"bin_lower": b / bins, "bin_upper": (b + 1) / bins, "n": n, "mean_predicted": mp,
                     "observed": float(y[sel].mean()), "se": math.sqrt(max(var, 0.0)) / n})
    return pd.DataFrame(rows, columns=["bin_lower", "bin_upper", "n", "mean_predicted", "observed", "se"])


# --------------------------------------------------------------------------- posterior-predictive shares


def ppc_shares(result: Any, *, draws: int = 200, hdi_prob: float = 0.9, prob: Any = NOT_GIVEN, random_seed: int = 0, seed: Any = NOT_GIVEN,
               panel: ChoicePanel | None = None) -> pd.DataFrame:
    """Posterior-predictive check of choice shares per alternative and per categorical level.

    For each of ``draws`` posterior draws (evenly spaced over the chains) one choice
    is replicated in every task from the logit probabilities given that draw's person
    tastes; each replicated data set gives the shares. The observed share should lie
    inside the replicated ``prob`` interval.

    Returns
    -------
    DataFrame, one row per statistic
        ``statistic`` (``"alternative"`` or ``"level"``), ``attribute`` (empty for
        alternatives), ``level`` (alternative label or level), ``observed``,
        ``replicated_mean``, ``eti_low``, ``eti_high`` (equal-tailed ``prob`` interval),
        ``p_value`` (share of replications at or above the observed share; Gelman,
        Meng & Stern 1996) and ``outside`` (observed outside the interval).
    """
    prob = aliased("hdi_prob", hdi_prob, "prob", prob, 0.9)
    seed = aliased("random_seed", random_seed, "seed", seed, 0)
    if not 0 < prob < 1:
        raise SpecError(f"ppc_shares(prob=...) must be in (0, 1), got {prob!r}.")
    whole_number(draws, "ppc_shares(draws=...)", minimum=2)
    panel = result.panel if panel is None else panel
    rows = Rows.of(panel)
    betas = taste_draws(result, panel, max_draws=draws)
    rng = np.random.default_rng(seed)
    levels = level_codes(panel)
    reps = []
    step = draw_block(panel)
    for s0 in range(0, betas.shape[0], step):
        p = row_probabilities(panel, rows, betas[s0 : s0 + step])
        reps.append(share_statistics(replicate_choices(p, rows, rng), panel, levels))
    rep = np.concatenate(reps, axis=0)
    observed = share_statistics(rows.chosen_row[None], panel, levels)[0]
    names: list[tuple[str, str, str]] = [("alternative", "", a) for a in panel.alternatives]
    for attr, (lv, _) in levels.items():
        names += [("level", attr, lvl) for lvl in lv]
    lo_q, hi_q = (1 - prob) / 2, 1 - (1 - prob) / 2
    lower = np.quantile(rep, lo_q, axis=0)
    upper = np.quantile(rep, hi_q, axis=0)
    frame = pd.DataFrame({
        "statistic": [n[0] for n in names], "attribute": [n[1] for n in names], "level": [n[2] for n in names],
        "observed": observed, "replicated_mean": rep.mean(axis=0), "eti_low": lower, "eti_high": upper,
        "p_value": (rep >= observed[None, :] - 1e-12).mean(axis=0),
    })
    frame["outside"] = (frame["observed"] < frame["eti_low"]) | (frame["observed"] > frame["eti_high"])
    return frame


# --------------------------------------------------------------------------- prior predictive


def prior_predictive(panel: ChoicePanel, spec: Spec | Mapping[str, Any] | str | Path | None = None, *,
                     draws: int = 500, seed: int = 0, progressbar: bool | None = None) -> xr.Dataset:
    """Prior-predictive check: what choice behaviour do the priors imply on this design?

    Draws ``draws`` sets of population parameters and person tastes from the priors
    of :func:`hierchoice.build_model` (the likelihood is ignored), replicates one
    choice per task from each, and summarises.

    Returns
    -------
    Dataset, dim ``draw`` (and ``alternative``)
        ``share`` (draw, alternative): replicated choice shares; ``observed_share``
        (alternative); ``max_probability`` (draw): mean over tasks of the largest
        choice probability; ``near_deterministic`` (draw): share of tasks whose
        largest probability exceeds 0.99; ``hit_rate`` (draw): how often the prior
        draw's most probable alternative is the one observed (about the chance rate
        when the priors know nothing); ``chance_rate`` as an attribute. Priors that
        put much mass on near-deterministic choices are too wide for the design.

    With ``progressbar`` (None: in interactive use only) a status line names the tastes drawn, by the
    panel's attribute names; PyMC's own message, which lists its internal variables, is held back.
    """
    load_backend()
    import pymc as pm

    from ..model.build import build_model

    whole_number(draws, "prior_predictive(draws=...)")
    spec = panel.spec if spec is None else load_spec(spec)
    model = build_model(panel, spec)
    label = f"prior predictive: {draws} draws of the tastes for {', '.join(panel.attributes)}"
    with status(label, enabled=want_progress(progressbar)), quiet_pymc_logs(), warnings.catch_warnings():
        # the likelihood is a Potential, which prior sampling ignores: exactly what a prior check wants
        warnings.simplefilter("ignore", UserWarning)
        prior = pm.sample_prior_predictive(draws=draws, model=model, var_names=["person_taste"],
                                           random_seed=seed).prior
    beta = prior["person_taste"].transpose("chain", "draw", "person", "attribute").values
    beta = beta.reshape((-1,) + beta.shape[2:])
    rng = np.random.default_rng(seed + 1)
    rows = Rows.of(panel)
    n = panel.n_tasks
    n_j = len(panel.alternatives)
    shares, maxp, near, hits = [], [], [], []
    step = draw_block(panel)
    for s0 in range(0, beta.shape[0], step):
        p = row_probabilities(panel, rows, beta[s0 : s0 + step])  # (s, row)
        shares.append(counts(panel.cells.alt[replicate_choices(p, rows, rng)], n_j) / n)
        top = np.maximum.reduceat(p, rows.starts, axis=1)  # (s, task)
        maxp.append(top.sum(axis=1) / n)
        near.append((top > 0.99).sum(axis=1) / n)
        hits.append(task_hits(p, rows).mean(axis=1))
    observed = np.bincount(panel.cells.chosen, minlength=n_j) / n
    draw = np.arange(beta.shape[0])
    return xr.Dataset(
        {
            "share": (("draw", "alternative"), np.concatenate(shares)),
            "observed_share": (("alternative",), observed),
            "max_probability": (("draw",), np.concatenate(maxp)),
            "near_deterministic": (("draw",), np.concatenate(near)),
            "hit_rate": (("draw",), np.concatenate(hits)),
        },
        coords={"draw": draw, "alternative": list(panel.alternatives)},
        attrs={"chance_rate": panel.chance_rate, "draws": beta.shape[0], "seed": seed},
    )


# --------------------------------------------------------------------------- holdout


def holdout_split(panel: ChoicePanel, *, tasks: int = 1, method: str = "last",
                  seed: int = 0) -> tuple[ChoicePanel, ChoicePanel]:
    """Split each person's tasks into a training panel and a holdout panel.

    Parameters
    ----------
    panel : ChoicePanel
    tasks : int, default 1
        Tasks to hold out per person. A person keeps at least one training task, so
        a person with ``n <= tasks`` tasks holds out ``n - 1``.
    method : {"last", "random"}, default "last"
        ``last``: each person's last tasks (in task order); ``random``: tasks drawn
        per person with ``seed``.
    seed : int, default 0

    Returns
    -------
    (train, test) : tuple of ChoicePanel
        Every person is in ``train``; ``test`` has the persons with a held-out task.
    """
    whole_number(tasks, "holdout_split(tasks=...)")
    if method not in ("last", "random"):
        raise SpecError(f"holdout_split(method={method!r}) must be 'last' or 'random'.")
    cells = panel.cells
    n_i = np.diff(cells.person_ptr)
    k_i = np.minimum(tasks, n_i - 1)
    if k_i.sum() == 0:
        raise DataError("holdout_split: every person has a single task, so no task can be held out.")
    owner = cells.task_owner
    if method == "last":
        rank = np.arange(cells.n_tasks) - cells.person_ptr[owner]  # 0-based rank of each task within its person
        held_task = rank >= (n_i - k_i)[owner]
    else:
        rng = np.random.default_rng(seed)
        held_task = np.zeros(cells.n_tasks, dtype=bool)
        for i in np.nonzero(k_i)[0]:
            start = int(cells.person_ptr[i])
            held_task[start + rng.choice(int(n_i[i]), size=int(k_i[i]), replace=False)] = True
    # with_tasks takes (person, task) masks and re-packs the padded arrays: these masks are only (person, task)
    n_t = max(int(cells.position.max(initial=-1)) + 1, 1)
    mask = task_mask(panel, n_t)
    held = np.zeros_like(mask)
    held[owner[held_task], cells.position[held_task]] = True
    train = panel.with_tasks(mask & ~held, f"held out for validation ({method}, {tasks} per person)")
    test = panel.with_tasks(held, f"training tasks (not in the holdout, {method})")
    return train, test


def fixed_taste_spec(spec: Spec | Mapping[str, Any] | str | Path) -> Spec:
    """The same spec with every taste fixed: the conditional (multinomial) logit of the same utility.

    Lognormal tastes become fixed coefficients (their sign is then free);
    correlation and willingness-to-pay space are switched off, since both need
    random tastes.
    """
    table = load_spec(spec).to_dict()
    for entry in table["attributes"].values():
        entry["taste"] = "fixed"
        entry.pop("sign", None)
    if "constants" in table:
        table["constants"]["taste"] = "fixed"
    table.setdefault("dynamics", {})["taste"] = "fixed"
    model = table.setdefault("model", {})
    model["correlated"] = False
    model["wtp_space"] = False
    return Spec.from_dict(table)


def _fixed_taste_panel(panel: ChoicePanel, spec: Spec) -> ChoicePanel:
    """The same panel with every term's taste fixed (the model reads each term's taste from the panel)."""
    terms = [replace(t, taste="fixed", sign=None) for t in panel.terms]
    fixed = ChoicePanel(
        cells=panel.cells, Z=panel.Z, persons=panel.persons, alternatives=panel.alternatives, terms=terms,
        covariates=panel.covariates, summary=panel.summary, spec=spec,
    )
    fixed._dense = panel._dense  # padded arrays already built (if any) are shared, not rebuilt
    return fixed


def score_tasks(result: Any, panel: ChoicePanel, *, max_draws: int | None = None) -> pd.DataFrame:
    r"""Log predictive density and hit of every task of ``panel`` under the fit's person tastes.

    .. math::

        \mathrm{lpd}_{nt} = \log \frac1S \sum_{s=1}^S P_{nt}(\beta_n^{(s)}),

    with :math:`\beta_n^{(s)}` the posterior draws of person :math:`n`'s tastes
    (the persons of ``panel`` must be in the fit).

    Returns
    -------
    DataFrame, one row per real task
        ``person``, ``task`` (the user's task id), ``lpd``, ``hit`` (see
        :func:`hit_rate`; ties share the hit) and ``n_available``.
    """
    from scipy.special import logsumexp

    betas = taste_draws(result, panel, max_draws=max_draws)
    cells = panel.cells  # tasks in np.nonzero(task_mask)'s order
    ll = task_loglik_cells(cell_differences(cells), betas)  # (S, task), linear in the real cells
    lpd = logsumexp(ll, axis=0) - np.log(ll.shape[0])
    rows = Rows.of(panel)
    return pd.DataFrame({
        "person": np.asarray(panel.persons, dtype=object)[cells.task_owner],
        "task": cells.task_id,
        "lpd": lpd,
        "hit": task_hits(mean_probabilities(panel, rows, betas), rows),
        "n_available": np.diff(cells.row_ptr),
    })


@dataclass
class HoldoutResult:
    """What :func:`holdout_validation` found.

    Attributes
    ----------
    table : DataFrame
        Indexed by model (``mixed``, ``fixed`` when compared, ``chance``): ``hit_rate``,
        ``mean_lpd`` (mean log predictive density per held-out task), ``n_tasks``.
    tasks : DataFrame
        :func:`score_tasks` rows of every model, with a ``model`` column.
    train, test : ChoicePanel
    fits : dict of str to ChoiceFit
    """

    table: pd.DataFrame
    tasks: pd.DataFrame
    train: ChoicePanel
    test: ChoicePanel
    fits: dict[str, Any] = field(default_factory=dict)

    def _lines(self) -> list[tuple[str, str]]:
        return [(str(model), f"hit rate {row['hit_rate']:.3f}, mean log density {row['mean_lpd']:.3f}, "
                 f"{int(row['n_tasks'])} tasks") for model, row in self.table.iterrows()]

    def __repr__(self) -> str:
        head = (f"HoldoutResult({self.test.n_tasks} held-out tasks of {self.test.n_persons} persons, "
                f"fitted on {self.train.n_tasks} tasks)")
        return "\n".join([head] + [f"  {model:<7} {text}" for model, text in self._lines()])

    def _repr_html_(self) -> str:
        return html_table(f"Holdout: {self.test.n_tasks} held-out tasks of {self.test.n_persons} persons, "
                          f"fitted on {self.train.n_tasks} tasks", self._lines(),
                          notes=["The person's posterior tastes from the training tasks score each held-out task; "
                                 "chance picks uniformly among the available alternatives."])


def holdout_validation(
    panel: ChoicePanel,
    spec: Spec | Mapping[str, Any] | str | Path | None = None,
    *,
    tasks: int = 1,
    method: str = "last",
    random_seed: int = 0, seed: Any = NOT_GIVEN,
    compare_fixed: bool = True,
    draws: int | None = None,
    tune: int | None = None,
    chains: int | None = None,
    backend: str | None = None,
    fit_seed: int | None = None,
    progressbar: bool | None = None,
) -> HoldoutResult:
    """Fit on all but ``tasks`` tasks per person and predict the held-out ones.

    The mixed model (``spec``) and, with ``compare_fixed``, the fixed-taste model
    (:func:`fixed_taste_spec`) are fitted with :func:`hierchoice.fit` on the same
    training panel; each held-out task is scored from the person's posterior tastes
    (:func:`score_tasks`). The ``chance`` row is the hit rate and log density of
    picking uniformly among the available alternatives.

    Parameters
    ----------
    panel : ChoicePanel
    spec : Spec, mapping or path, optional
        Defaults to the panel's own. The tastes of the mixed model are those the
        panel was validated with (its terms); ``spec`` supplies the model and
        sampling options.
    tasks, method, seed
        See :func:`holdout_split`.
    compare_fixed : bool, default True
    draws, tune, chains, backend, fit_seed
        Passed to :func:`hierchoice.fit` (``fit_seed`` as its ``seed``).
    progressbar : bool or None, default None
        A progress bar over the fits and the samplers' own progress; None shows them in interactive use only
        (a terminal or a Jupyter kernel).

    Returns
    -------
    HoldoutResult
    """
    seed = aliased("random_seed", random_seed, "seed", seed, 0)
    from ..inference.sampling import fit

    spec = panel.spec if spec is None else load_spec(spec)
    train, test = holdout_split(panel, tasks=tasks, method=method, seed=seed)
    models = {"mixed": (train, spec)}
    if compare_fixed:
        fixed = fixed_taste_spec(spec)
        models["fixed"] = (_fixed_taste_panel(train, fixed), fixed)
    fits: dict[str, Any] = {}
    rows = {}
    scored = []
    show = want_progress(progressbar)
    with Progress("holdout validation", len(models), enabled=show, unit="models fitted and scored",
                  inline=False) as bar:
        for name, (data, s) in models.items():
            fits[name] = fit(data, s, draws=draws, tune=tune, chains=chains, seed=fit_seed, backend=backend,
                             progressbar=show)
            t = score_tasks(fits[name], test).assign(model=name)
            scored.append(t)
            rows[name] = {"hit_rate": float(t["hit"].mean()), "mean_lpd": float(t["lpd"].mean()),
                          "n_tasks": len(t)}
            bar.advance()
    n_avail = np.diff(test.cells.row_ptr)
    rows["chance"] = {"hit_rate": test.chance_rate, "mean_lpd": float(np.mean(-np.log(n_avail))),
                      "n_tasks": int(n_avail.size)}
    table = pd.DataFrame.from_dict(rows, orient="index")
    table.index.name = "model"
    return HoldoutResult(table=table, tasks=pd.concat(scored, ignore_index=True), train=train, test=test, fits=fits)
