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
tastes (:func:`hierchoice.likelihood.choice_probabilities`), averaged over draws:

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
from ..model.likelihood import cell_differences, choice_probabilities, task_loglik_cells
from ..spec import Spec, load_spec

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

#: How many (draw, person, task, alternative) cells one vectorised block may hold.
_BLOCK_CELLS = 4_000_000


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


def _block(panel: ChoicePanel) -> int:
    cells = max(1, panel.X.shape[0] * panel.X.shape[1] * panel.X.shape[2])
    return max(1, _BLOCK_CELLS // cells)


def _probabilities(panel: ChoicePanel, beta: np.ndarray) -> np.ndarray:
    """Logit probabilities (..., person, task, alternative); padded tasks (nothing available) give 0."""
    with np.errstate(invalid="ignore"):  # a padded task's max over no alternative is -inf; its cells are 0
        return choice_probabilities(panel.X, panel.available, beta)


def _mean_probabilities(panel: ChoicePanel, draws: np.ndarray) -> np.ndarray:
    """Posterior-mean logit probabilities, shape (person, task, alternative); NaN on padded tasks."""
    total = np.zeros(panel.X.shape[:3])
    step = _block(panel)
    for s0 in range(0, draws.shape[0], step):
        total += _probabilities(panel, draws[s0 : s0 + step]).sum(axis=0)
    prob = total / draws.shape[0]
    prob[~panel.task_mask] = np.nan
    return prob


def _prob_array(panel: ChoicePanel, prob: np.ndarray) -> xr.DataArray:
    return xr.DataArray(
        prob, dims=("person", "task", "alternative"),
        coords={"person": list(panel.persons), "task": np.arange(prob.shape[1]),
                "alternative": list(panel.alternatives)},
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
    return _prob_array(panel, _mean_probabilities(panel, taste_draws(result, panel, max_draws=max_draws)))


def _task_hits(prob: np.ndarray, panel: ChoicePanel) -> np.ndarray:
    """Per-task hit, shape (person, task): 1 if the chosen alternative has the highest probability.

    Ties at the top share the hit (a tie between k alternatives scores 1/k when the
    chosen one is among them): the expected score of breaking ties at random. NaN on
    padded tasks.
    """
    p = np.where(panel.available, np.nan_to_num(prob, nan=0.0), -np.inf)
    top = p >= p.max(axis=-1, keepdims=True) - 1e-12
    c = np.clip(panel.chosen, 0, None)
    hit = np.take_along_axis(top, c[:, :, None], axis=2)[..., 0] / np.maximum(top.sum(axis=-1), 1)
    return np.where(panel.task_mask, hit, np.nan)


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
    prob = (posterior_choice_probabilities(result, panel=panel) if probabilities is None else probabilities).values
    hits = _task_hits(prob, panel)
    rate = float(np.nanmean(hits))
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
    prob = (posterior_choice_probabilities(result, panel=panel) if probabilities is None else probabilities).values
    cells = panel.available & panel.task_mask[:, :, None]
    chosen = panel.chosen[:, :, None] == np.arange(panel.X.shape[2])[None, None, :]
    p = prob[cells]
    y = chosen[cells].astype(float)
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


def _level_codes(panel: ChoicePanel) -> dict[str, tuple[list[str], np.ndarray]]:
    """For each categorical attribute: its levels and each alternative's level index (-1: none).

    Returns ``{attribute: (levels, codes)}`` with ``codes`` of shape (person, task,
    alternative); level 0 is the base. The opt-out, unavailable alternatives and
    padded tasks have no level.
    """
    out: dict[str, tuple[list[str], np.ndarray]] = {}
    spec = panel.spec
    real = panel.available & panel.task_mask[:, :, None]
    if spec.data.opt_out is not None and spec.data.opt_out in panel.alternatives:
        real = real.copy()
        real[:, :, panel.alternatives.index(spec.data.opt_out)] = False
    sources: dict[str, list[int]] = {}
    for k, t in enumerate(panel.terms):
        if t.kind in ("dummy", "effects"):
            sources.setdefault(t.source, []).append(k)
    for source, ks in sources.items():
        attr = spec.attributes.get(source)
        base = attr.base if attr is not None and attr.base is not None else "base"
        levels = [str(base)] + [str(panel.terms[k].level) for k in ks]
        codes = np.full(panel.X.shape[:3], -1, dtype=np.int64)
        cols = panel.X[..., ks]  # (P, T, J, L-1)
        is_level = cols == 1.0
        if panel.terms[ks[0]].kind == "effects":
            is_base = np.all(cols == -1.0, axis=-1)
        else:
            is_base = ~is_level.any(axis=-1)
        codes[is_base] = 0
        for i in range(len(ks)):
            codes[is_level[..., i]] = i + 1
        codes[~real] = -1
        out[source] = (levels, codes)
    return out


def _share_statistics(choice: np.ndarray, panel: ChoicePanel,
                      levels: Mapping[str, tuple[list[str], np.ndarray]]) -> np.ndarray:
    """Choice shares of a (replicate, person, task) array of chosen indices, shape (replicate, statistic).

    Statistics: the share of each alternative, then for each categorical attribute
    the share of tasks whose chosen alternative has each level (over all real tasks).
    """
    mask = panel.task_mask[None]
    n = panel.task_mask.sum()
    n_j = panel.X.shape[2]
    cols = [((choice == j) & mask).sum(axis=(1, 2)) / n for j in range(n_j)]
    c = np.clip(choice, 0, None)
    for names, codes in levels.values():
        picked = np.take_along_axis(np.broadcast_to(codes, choice.shape + (n_j,)), c[..., None], axis=-1)[..., 0]
        cols += [((picked == i) & mask).sum(axis=(1, 2)) / n for i in range(len(names))]
    return np.stack(cols, axis=-1)


def _replicate_choices(prob: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """One logit choice per task from probabilities of shape (..., alternative)."""
    cum = np.cumsum(prob, axis=-1)
    u = rng.random(prob.shape[:-1] + (1,)) * cum[..., -1:]
    return np.minimum((cum < u).sum(axis=-1), prob.shape[-1] - 1)


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
    betas = taste_draws(result, panel, max_draws=draws)
    rng = np.random.default_rng(seed)
    levels = _level_codes(panel)
    reps = []
    step = _block(panel)
    for s0 in range(0, betas.shape[0], step):
        p = _probabilities(panel, betas[s0 : s0 + step])
        reps.append(_share_statistics(_replicate_choices(p, rng), panel, levels))
    rep = np.concatenate(reps, axis=0)
    observed = _share_statistics(panel.chosen[None], panel, levels)[0]
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
    mask = panel.task_mask
    n = mask.sum()
    n_j = panel.X.shape[2]
    shares, maxp, near, hits = [], [], [], []
    step = _block(panel)
    for s0 in range(0, beta.shape[0], step):
        p = _probabilities(panel, beta[s0 : s0 + step])  # (s, P, T, J)
        c = _replicate_choices(p, rng)
        shares.append(np.stack([((c == j) & mask).sum(axis=(1, 2)) / n for j in range(n_j)], axis=-1))
        top = p.max(axis=-1)
        maxp.append(np.where(mask, top, 0).sum(axis=(1, 2)) / n)
        near.append(((top > 0.99) & mask).sum(axis=(1, 2)) / n)
        hits.append(np.array([np.nanmean(_task_hits(p_s, panel)) for p_s in p]))
    observed = np.array([((panel.chosen == j) & mask).sum() / n for j in range(n_j)])
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
    mask = panel.task_mask
    n_i = mask.sum(axis=1)
    k_i = np.minimum(tasks, n_i - 1)
    if k_i.sum() == 0:
        raise DataError("holdout_split: every person has a single task, so no task can be held out.")
    held = np.zeros_like(mask)
    if method == "last":
        position = np.cumsum(mask, axis=1) - 1  # 0-based rank of each real task within its person
        held = mask & (position >= (n_i - k_i)[:, None])
    else:
        rng = np.random.default_rng(seed)
        for i in np.nonzero(k_i)[0]:
            real = np.nonzero(mask[i])[0]
            held[i, rng.choice(real, size=int(k_i[i]), replace=False)] = True
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
    return ChoicePanel(
        X=panel.X, available=panel.available, task_mask=panel.task_mask, chosen=panel.chosen,
        task_ids=panel.task_ids, lag_missing=panel.lag_missing, Z=panel.Z, persons=panel.persons,
        alternatives=panel.alternatives, terms=terms, covariates=panel.covariates, summary=panel.summary, spec=spec,
    )


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
    hits = _task_hits(_mean_probabilities(panel, betas), panel)
    p_idx, t_idx = cells.task_owner, cells.position
    return pd.DataFrame({
        "person": np.asarray(panel.persons, dtype=object)[p_idx],
        "task": cells.task_id,
        "lpd": lpd,
        "hit": hits[p_idx, t_idx],
        "n_available": panel.available.sum(axis=2)[p_idx, t_idx],
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
    n_avail = test.available.sum(axis=2)[test.task_mask]
    rows["chance"] = {"hit_rate": test.chance_rate, "mean_lpd": float(np.mean(-np.log(n_avail))),
                      "n_tasks": int(n_avail.size)}
    table = pd.DataFrame.from_dict(rows, orient="index")
    table.index.name = "model"
    return HoldoutResult(table=table, tasks=pd.concat(scored, ignore_index=True), train=train, test=test, fits=fits)
