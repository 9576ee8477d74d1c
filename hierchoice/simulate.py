"""Invented panels with known tastes, for the demo, recovery tests and benchmarks.

The demo scenario, *Harbourline* (see ``docs/demo.md``), is a survey for an
invented commuter ferry across a city harbour: each respondent sees several
choice tasks with two ferry service options (``ferry_a``, ``ferry_b``) and the
option to keep their current commute (``none``, the opt-out). Options differ in
``fare``, ``crossing_time`` (minutes), ``departures_per_hour`` and the ``deck``
(open, covered, lounge).

Every simulated person has tastes drawn once from the population and kept for
all their tasks (the panel structure); each task's choice is a logit draw given
those tastes.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from ._args import NOT_GIVEN, aliased
from .exceptions import SpecError
from .model.transforms import TasteMap, latent_to_coefficient

__all__ = ["SimAttribute", "SimulatedPanel", "simulate_panel", "ferry_scenario", "benchmark_scenario",
           "draw_choices"]


@dataclass(frozen=True)
class SimAttribute:
    """One attribute of an invented design and its true population taste.

    ``levels`` are the values the design draws from (numbers for a numeric
    attribute, labels for a categorical one, whose first level is the base).
    ``mean`` and ``sd`` describe the taste: for ``lognormal`` they are the mean
    and SD of the underlying normal ``eta`` with coefficient ``sign * exp(eta)``.
    For a categorical attribute give one mean (and sd) per non-base level.
    """

    name: str
    levels: Sequence[Any]
    taste: str = "normal"
    mean: float | Sequence[float] = 0.0
    sd: float | Sequence[float] = 0.0
    sign: str | None = None
    categorical: bool = False

    def terms(self) -> list[str]:
        if self.categorical:
            return [f"{self.name}:{lvl}" for lvl in self.levels[1:]]
        return [self.name]


@dataclass
class SimulatedPanel:
    """An invented long table, the spec that reads it, and the true values behind it.

    ``truth`` holds ``taste_mean`` and ``taste_sd`` (pandas Series by model
    attribute; the underlying normal for lognormal tastes), ``taste_corr``
    (DataFrame over random attributes), ``person_taste`` (DataFrame: persons ×
    attributes, the coefficients in the user's units) and, where used,
    ``covariate_effect`` (DataFrame covariate × attribute) and
    ``state_dependence``.
    """

    data: pd.DataFrame
    spec: dict[str, Any]
    truth: dict[str, Any] = field(default_factory=dict)


def draw_choices(utility: np.ndarray, available: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Draw one logit choice per task: the argmax of utility plus i.i.d. Gumbel noise.

    ``utility`` and ``available`` share a shape whose last axis is the alternative.
    """
    noise = rng.gumbel(size=utility.shape)
    total = np.where(available, utility + noise, -np.inf)
    return np.argmax(total, axis=-1)


def _as_list(value: float | Sequence[float], n: int, what: str) -> list[float]:
    if isinstance(value, (int, float)):
        return [float(value)] * n
    out = [float(v) for v in value]
    if len(out) != n:
        raise SpecError(f"{what}: expected {n} values, got {len(out)}.")
    return out


@dataclass
class _Design:
    """The invented design: attribute values per (person, task, alternative) and the model terms they feed."""

    raw: dict[str, np.ndarray]  # attribute -> (P, T, J) values as designed (labels for a categorical one)
    columns: dict[str, np.ndarray]  # term -> (P, T, J) float model column (dummies for a categorical one)
    terms: list[str]  # the K model terms, in order
    term_taste: list[str]  # (K,) taste of each term
    term_sign: list[float]  # (K,) +1, or -1 for a negative lognormal
    means: list[float]  # (K,) true mean of the underlying normal
    sds: list[float]  # (K,) true SD of the underlying normal (0 for a fixed taste)


@dataclass
class _Tastes:
    """The population behind the panel and each person's coefficients."""

    mean: np.ndarray  # (K,)
    sd: np.ndarray  # (K,)
    random_idx: list[int]  # (R,) indices of the random terms among the K
    corr: np.ndarray  # (R, R) correlation of the random terms' underlying normals
    cov_names: list[str]  # (C,)
    Zc: np.ndarray  # (P, C) standard-normal person covariates
    gamma: np.ndarray  # (C, K) covariate shifts of the means
    beta: np.ndarray  # (P, K) coefficients in the user's units


def _task_counts(rng: np.random.Generator, n_persons: int, n_tasks: int | tuple[int, int]) -> np.ndarray:
    """Draw each person's number of tasks; returns the (P, T) mask of the tasks they see, T the most tasks."""
    lo, hi = (n_tasks, n_tasks) if isinstance(n_tasks, int) else n_tasks
    tasks_of = rng.integers(lo, hi + 1, size=n_persons)  # (P,)
    return np.arange(hi)[None, :] < tasks_of[:, None]  # (P, T)


def _design(rng: np.random.Generator, attributes: Sequence[SimAttribute], shape: tuple[int, int, int],
            opt_out: str | None) -> _Design:
    """Draw each attribute's level per (person, task, alternative), ``shape`` (P, T, J), one attribute at a time.

    With an opt-out (the last alternative) its model columns are 0.
    """
    design = _Design(raw={}, columns={}, terms=[], term_taste=[], term_sign=[], means=[], sds=[])
    for attr in attributes:
        idx = rng.integers(0, len(attr.levels), size=shape)  # (P, T, J) level index
        if attr.categorical:
            for i, lvl in enumerate(attr.levels[1:], start=1):
                design.columns[f"{attr.name}:{lvl}"] = (idx == i).astype(float)
            design.raw[attr.name] = np.asarray(attr.levels, dtype=object)[idx]
        else:
            values = np.asarray(attr.levels, dtype=float)[idx]  # shared by raw and columns
            design.columns[attr.name] = values
            design.raw[attr.name] = values
        t_names = attr.terms()
        design.terms += t_names
        design.term_taste += [attr.taste] * len(t_names)
        design.term_sign += [(-1.0 if attr.sign == "negative" else 1.0)] * len(t_names)
        design.means += _as_list(attr.mean, len(t_names), f"{attr.name}.mean")
        design.sds += (_as_list(attr.sd, len(t_names), f"{attr.name}.sd") if attr.taste != "fixed"
                       else [0.0] * len(t_names))
    if opt_out:
        for arr in design.columns.values():
            arr[..., -1] = 0.0  # (P, T) the opt-out; numeric raw values share these arrays
    return design


def _availability(rng: np.random.Generator, shape: tuple[int, int, int], n_design: int,
                  unavailable_rate: float) -> np.ndarray:
    """The (P, T, J) availability: each of the first ``n_design`` alternatives drops out at the rate, two stay."""
    available = np.ones(shape, dtype=bool)  # (P, T, J)
    if unavailable_rate > 0:
        n_persons, n_t, _ = shape
        drop = rng.random((n_persons, n_t, n_design)) < unavailable_rate  # (P, T, J_design)
        keep_two = np.argsort(rng.random((n_persons, n_t, n_design)), axis=-1)[..., :2]  # (P, T, 2)
        np.put_along_axis(drop, keep_two, False, axis=-1)
        available[..., :n_design] &= ~drop
    return available


def _taste_correlation(correlation: float | np.ndarray | None, n_random: int) -> np.ndarray:
    """The (R, R) correlation of the random tastes: identity, one number for every pair, or the given matrix."""
    corr = np.eye(n_random)
    if correlation is not None and n_random > 1:
        if np.isscalar(correlation):
            corr = np.full((n_random,) * 2, float(correlation))  # type: ignore[arg-type]
            np.fill_diagonal(corr, 1.0)
        else:
            corr = np.asarray(correlation, dtype=float)
    return corr


def _covariate_effects(covariates: Mapping[str, Mapping[str, float]] | None, terms: list[str]) -> np.ndarray:
    """The (C, K) shifts of the K term means per unit of each of the C covariates."""
    gamma = np.zeros((len(covariates or {}), len(terms)))
    for c, (cname, shifts) in enumerate((covariates or {}).items()):
        for term, value in shifts.items():
            if term not in terms:
                raise SpecError(f"covariates[{cname!r}] shifts unknown attribute {term!r}; known: {terms}.")
            gamma[c, terms.index(term)] = value
    return gamma


def _person_tastes(rng: np.random.Generator, design: _Design, n_persons: int,
                   correlation: float | np.ndarray | None,
                   covariates: Mapping[str, Mapping[str, float]] | None) -> _Tastes:
    """Draw the covariates, then each person's underlying normals ``eta`` and their coefficients ``beta``."""
    n_k = len(design.terms)
    mean = np.asarray(design.means)  # (K,)
    sd = np.asarray(design.sds)  # (K,)
    random_idx = [k for k in range(n_k) if design.term_taste[k] != "fixed"]  # (R,)
    corr = _taste_correlation(correlation, len(random_idx))  # (R, R)
    cov_names = list(covariates or {})
    Zc = rng.standard_normal((n_persons, len(cov_names)))  # (P, C)
    gamma = _covariate_effects(covariates, design.terms)  # (C, K)
    eta = np.tile(mean, (n_persons, 1)) + Zc @ gamma  # (P, K)
    if random_idx:
        chol = np.linalg.cholesky(corr)  # (R, R)
        e = rng.standard_normal((n_persons, len(random_idx))) @ chol.T  # (P, R)
        eta[:, random_idx] += e * sd[random_idx]
    beta = latent_to_coefficient(eta, TasteMap.of(design.term_taste, design.term_sign))  # (P, K)
    return _Tastes(mean=mean, sd=sd, random_idx=random_idx, corr=corr, cov_names=cov_names, Zc=Zc, gamma=gamma,
                   beta=beta)


def _draw_choices_over_tasks(rng: np.random.Generator, design: _Design, beta: np.ndarray, alts: list[str],
                             constants: Mapping[str, float] | None, state_dependence: float | None,
                             available: np.ndarray) -> np.ndarray:
    """Utilities and logit choices task by task (the lagged choice needs the previous one); returns (P, T)."""
    X = np.stack([design.columns[t] for t in design.terms], axis=-1)  # (P, T, J, K)
    n_persons, n_t, n_j, _ = X.shape
    base_u = np.einsum("ptjk,pk->ptj", X, beta)  # (P, T, J)
    asc = np.zeros(n_j)  # (J,)
    for alt, value in (constants or {}).items():
        asc[alts.index(alt)] = value
    base_u = base_u + asc
    chosen = np.zeros((n_persons, n_t), dtype=int)  # (P, T) index of the chosen alternative
    lagged = np.zeros((n_persons, n_t, n_j))  # (P, T, J) 1 where chosen in the previous task
    for t in range(n_t):
        u = base_u[:, t]  # (P, J)
        if state_dependence is not None and t > 0:
            lagged[:, t] = np.eye(n_j)[chosen[:, t - 1]]
            u = u + state_dependence * lagged[:, t]
        chosen[:, t] = draw_choices(u, available[:, t], rng)
    return chosen


def _long_table(attributes: Sequence[SimAttribute], design: _Design, tastes: _Tastes, names: Mapping[str, str],
                alts: list[str], opt_out: str | None, task_mask: np.ndarray, chosen: np.ndarray,
                available: np.ndarray, unavailable_rate: float) -> pd.DataFrame:
    """One row per (person, task, alternative) of the tasks each person sees, in that order."""
    n_persons, _ = task_mask.shape
    n_j = len(alts)
    p, t, j = np.nonzero(task_mask[:, :, None] & np.ones(n_j, dtype=bool))  # (N,) each
    person_ids = np.arange(1, n_persons + 1)  # (P,)
    data = pd.DataFrame({
        names["person"]: person_ids[p],
        names["task"]: t + 1,
        names["alternative"]: np.asarray(alts, dtype=object)[j],
        names["chosen"]: (chosen[p, t] == j).astype(int),
    })
    for attr in attributes:
        col = design.raw[attr.name][p, t, j]  # (N,)
        if opt_out:
            col = np.where(j == n_j - 1, None if attr.categorical else np.nan, col)
        data[attr.name] = col if attr.categorical else col.astype(float)
    if unavailable_rate > 0:
        data["available"] = available[p, t, j].astype(int)
    for c, cname in enumerate(tastes.cov_names):
        data[cname] = tastes.Zc[p, c]
    return data


def _spec_of(attributes: Sequence[SimAttribute], names: Mapping[str, str], alts: list[str], opt_out: str | None,
             constants: Mapping[str, float] | None, cov_names: list[str], state_dependence: float | None,
             correlation: float | np.ndarray | None, unavailable_rate: float) -> dict[str, Any]:
    """The spec dict that reads the long table."""
    spec: dict[str, Any] = {
        "columns": dict(names) | ({"available": "available"} if unavailable_rate > 0 else {}),
        "attributes": {},
    }
    for attr in attributes:
        entry: dict[str, Any] = {"taste": attr.taste}
        if attr.sign:
            entry["sign"] = attr.sign
        if attr.categorical:
            entry |= {"coding": "dummy", "base": str(attr.levels[0])}
        spec["attributes"][attr.name] = entry
    if opt_out or constants:
        free = [a for a in alts if not (constants or {}).get(a, 0.0)]
        if not opt_out and not free:
            raise SpecError(
                f"constants gives every alternative a non-zero constant ({dict(constants or {})}); leave one "
                "alternative out (its constant is 0: the reference the others are relative to)."
            )
        reference = opt_out or free[0]
        spec["constants"] = {"reference": reference}
        if opt_out:
            spec["data"] = {"opt_out": opt_out}
    if cov_names:
        spec["covariates"] = {"columns": cov_names}
    if state_dependence is not None:
        spec["dynamics"] = {"lagged_choice": True, "first_task": "drop"}
    if correlation is not None:
        spec["model"] = {"correlated": True}
    return spec


def _truth_of(design: _Design, tastes: _Tastes, spec: Mapping[str, Any], alts: list[str],
              constants: Mapping[str, float] | None, state_dependence: float | None) -> dict[str, Any]:
    """The true values behind the panel, the constants appended as fixed tastes when the spec estimates them."""
    terms = list(design.terms)  # K, then the constants
    mean, sd, beta, gamma = tastes.mean, tastes.sd, tastes.beta, tastes.gamma  # (K,), (K,), (P, K), (C, K)
    n_persons, cov_names = beta.shape[0], tastes.cov_names
    rnd_terms = [terms[k] for k in tastes.random_idx]
    asc_names = [f"asc:{a}" for a in alts if a != spec.get("constants", {}).get("reference")]
    if "constants" in spec:
        for name in asc_names:
            terms.append(name)
            mean = np.append(mean, (constants or {}).get(name[4:], 0.0))
            sd = np.append(sd, 0.0)
            beta = np.column_stack([beta, np.full(n_persons, (constants or {}).get(name[4:], 0.0))])
            gamma = np.column_stack([gamma, np.zeros(len(cov_names))])
    person_ids = np.arange(1, n_persons + 1)
    truth: dict[str, Any] = {
        "taste_mean": pd.Series(mean, index=terms, name="taste_mean"),
        "taste_sd": pd.Series(sd, index=terms, name="taste_sd")[[t for t in terms if t in rnd_terms]],
        "taste_corr": pd.DataFrame(tastes.corr, index=rnd_terms, columns=rnd_terms),
        "person_taste": pd.DataFrame(beta, index=pd.Index(person_ids, name="person"), columns=terms),
        "tastes": dict(zip(terms, design.term_taste + ["fixed"] * len(asc_names))),
    }
    if cov_names:
        truth["covariate_effect"] = pd.DataFrame(gamma, index=cov_names, columns=terms)
    if state_dependence is not None:
        truth["state_dependence"] = float(state_dependence)
    return truth


def simulate_panel(
    attributes: Sequence[SimAttribute],
    *,
    n_persons: int = 300,
    n_tasks: int | tuple[int, int] = 10,
    alternatives: Sequence[str] = ("a", "b", "c"),
    opt_out: str | None = None,
    constants: Mapping[str, float] | None = None,
    correlation: float | np.ndarray | None = None,
    covariates: Mapping[str, Mapping[str, float]] | None = None,
    state_dependence: float | None = None,
    unavailable_rate: float = 0.0,
    random_seed: int = 0, seed: Any = NOT_GIVEN,
    column_names: Mapping[str, str] | None = None,
) -> SimulatedPanel:
    """Simulate a long-format panel with known person tastes.

    Parameters
    ----------
    attributes : sequence of :class:`SimAttribute`
        The design's attributes with their true tastes.
    n_persons : int, default 300
    n_tasks : int or (min, max), default 10
        Tasks per person; a pair draws each person's count uniformly (an unbalanced panel).
    alternatives : sequence of str
        The designed alternatives (the opt-out, if any, is added after them).
    opt_out : str, optional
        Label of a no-choice alternative with utility 0 (plus nothing): constants
        of the other alternatives are relative to it.
    constants : mapping alternative -> float, optional
        Fixed alternative-specific constants (the missing ones are 0).
    correlation : float or array, optional
        Correlation of the random tastes' underlying normals: one number for every
        pair, or a full matrix over the random terms in order.
    covariates : mapping covariate -> {attribute: shift}, optional
        Standard-normal person covariates shifting the means of the named tastes.
    state_dependence : float, optional
        Coefficient of the lagged choice (1 if chosen in the previous task).
    unavailable_rate : float, default 0
        Chance that a designed alternative is unavailable in a task (at least two stay available).
    seed : int
    column_names : mapping, optional
        Names for the person/task/alternative/chosen columns.
    """
    seed = aliased("random_seed", random_seed, "seed", seed, 0)
    rng = np.random.default_rng(seed)
    names = {"person": "respondent", "task": "task", "alternative": "option", "chosen": "chosen"}
    names.update(column_names or {})
    alts = list(alternatives) + ([opt_out] if opt_out else [])

    task_mask = _task_counts(rng, n_persons, n_tasks)  # (P, T)
    shape = (*task_mask.shape, len(alts))  # (P, T, J)
    design = _design(rng, attributes, shape, opt_out)
    available = _availability(rng, shape, len(alternatives), unavailable_rate)  # (P, T, J)
    tastes = _person_tastes(rng, design, n_persons, correlation, covariates)
    chosen = _draw_choices_over_tasks(rng, design, tastes.beta, alts, constants, state_dependence, available)
    data = _long_table(attributes, design, tastes, names, alts, opt_out, task_mask, chosen, available,
                       unavailable_rate)
    spec = _spec_of(attributes, names, alts, opt_out, constants, tastes.cov_names, state_dependence, correlation,
                    unavailable_rate)
    truth = _truth_of(design, tastes, spec, alts, constants, state_dependence)
    return SimulatedPanel(data=data, spec=spec, truth=truth)


def ferry_scenario(
    n_persons: int = 300,
    n_tasks: int | tuple[int, int] = (8, 12),
    *,
    correlated: bool = True,
    seed: int = 7,
) -> SimulatedPanel:
    """The Harbourline commuter-ferry survey (the demo), with an opt-out and a lognormal fare taste."""
    attributes = [
        SimAttribute("fare", levels=[2.0, 3.0, 4.0, 5.0, 6.0, 7.0], taste="lognormal", mean=np.log(0.45),
                     sd=0.5, sign="negative"),
        SimAttribute("crossing_time", levels=[15.0, 20.0, 25.0, 30.0, 40.0], taste="normal", mean=-0.06, sd=0.03),
        SimAttribute("departures_per_hour", levels=[1.0, 2.0, 4.0, 6.0], taste="normal", mean=0.3, sd=0.2),
        # the deck is valued alike by everyone: a fixed taste (SDs of dummy tastes need many tasks to identify)
        SimAttribute("deck", levels=["open", "covered", "lounge"], taste="fixed", mean=[0.4, 0.7], categorical=True),
    ]
    sim = simulate_panel(
        attributes, n_persons=n_persons, n_tasks=n_tasks, alternatives=("ferry_a", "ferry_b"), opt_out="none",
        constants={"ferry_a": 2.0, "ferry_b": 2.0}, correlation=(0.3 if correlated else None), seed=seed,
    )
    sim.spec["model"] = sim.spec.get("model", {}) | {"price": "fare"}
    sim.spec["sampling"] = {"chains": 2, "draws": 1000, "tune": 1000}
    return sim


def benchmark_scenario(
    n_persons: int = 1000,
    n_tasks: int = 10,
    n_alternatives: int = 3,
    n_attributes: int = 4,
    *,
    correlated: bool = False,
    seed: int = 1,
) -> SimulatedPanel:
    """A generic panel of normal tastes (the B1 / B3 benchmark shapes)."""
    rng = np.random.default_rng(seed + 10_000)
    attributes = [
        SimAttribute(f"x{k + 1}", levels=np.round(np.linspace(-1.5, 1.5, 7), 2).tolist(), taste="normal",
                     mean=float(rng.choice([-1, 1]) * rng.uniform(0.4, 1.0)), sd=float(rng.uniform(0.3, 0.8)))
        for k in range(n_attributes)
    ]
    return simulate_panel(
        attributes, n_persons=n_persons, n_tasks=n_tasks,
        alternatives=tuple(f"alt{j + 1}" for j in range(n_alternatives)),
        correlation=(0.3 if correlated else None), seed=seed,
    )
