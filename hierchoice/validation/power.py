r"""Power analysis: how a target quantity improves with the number of respondents.

:func:`power_analysis`
    How many respondents does a design need? At several numbers of respondents,
    the expected width of the 90 % interval of a willingness to pay
    (:class:`WtpWidth`) or the probability of detecting taste heterogeneity
    (:class:`SdDetection`), with Monte Carlo standard errors.

May import: :mod:`~hierchoice.validation.recovery` (its fixed-truth simulation),
:mod:`~hierchoice.validation.fitters`, :mod:`~hierchoice.validation.results`,
:mod:`~hierchoice.validation.distributed` and the modules below ``hierchoice.validation``.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import xarray as xr

from ..data.panel import Term
from ..exceptions import FitError, SpecError, first_few
from ..simulate import SimAttribute
from ..spec import _positive_int
from .distributed import TaskFailure, run_tasks, task_seed
from .fitters import _STREAM_DATA, _STREAM_FIT, Fitter, NutsFitter, _call_fitter
from .recovery import _check_simulation, _SimItem, _simulate, _truth_labels
from .results import _first_success, _options_json, _per_fit_fields

__all__ = ["WtpWidth", "SdDetection", "power_analysis"]


def _term(terms: Sequence[Term], name: str, what: str) -> Term:
    for term in terms:
        if term.name == name:
            return term
    names = first_few([t.name for t in terms], 10)
    raise SpecError(f"{what} = {name!r} is not a model attribute; the design has {names}.")


def _mean_coefficient(term: Term, mean: np.ndarray, sd: np.ndarray | float) -> np.ndarray:
    r"""The population mean coefficient: :math:`\mu`, or :math:`s e^{\mu + \sigma^2/2}` for a lognormal taste."""
    if term.taste == "lognormal":
        sign = -1.0 if term.sign == "negative" else 1.0
        return sign * np.exp(np.asarray(mean) + np.asarray(sd) ** 2 / 2)
    return np.asarray(mean, dtype=float)


def _draws_of(post: xr.Dataset, var: str, dim: str, name: str) -> np.ndarray:
    if var not in post or name not in post[var][dim].values:
        raise FitError(f"The posterior has no {var}[{name}]; the target needs it.")
    return post[var].sel({dim: name}).values.ravel()


@dataclass(frozen=True)
class WtpWidth:
    r"""Target: the width of the central ``prob`` interval of the WTP at the population mean tastes.

    .. math:: \mathrm{WTP}_k = -\bar\beta_k / \bar\beta_{\text{price}},

    with :math:`\bar\beta` the population mean coefficient (:math:`\mu`, or
    :math:`s e^{\mu+\sigma^2/2}` for a lognormal taste), computed draw by draw.
    Reported per number of respondents: the mean width with its Monte Carlo
    standard error (the SD of the widths over replications / √R), and the
    coverage of the true WTP.
    """

    attribute: str
    price: str
    prob: float = 0.9

    kind = "width"

    def check(self, terms: Sequence[Term]) -> None:
        _term(terms, self.attribute, "WtpWidth.attribute")
        _term(terms, self.price, "WtpWidth.price")
        if not 0 < self.prob < 1:
            raise SpecError(f"WtpWidth.prob must be in (0, 1), got {self.prob!r}.")

    def _wtp(self, terms: Sequence[Term], mean: Callable[[str], Any], sd: Callable[[str], Any]) -> np.ndarray:
        a, p = _term(terms, self.attribute, "attribute"), _term(terms, self.price, "price")
        b_a = _mean_coefficient(a, mean(a.name), sd(a.name) if a.taste == "lognormal" else 0.0)
        b_p = _mean_coefficient(p, mean(p.name), sd(p.name) if p.taste == "lognormal" else 0.0)
        with np.errstate(divide="ignore", invalid="ignore"):
            return -b_a / b_p

    def evaluate(self, posterior: xr.Dataset, terms: Sequence[Term], truth: Mapping[str, float]) -> dict[str, float]:
        w = self._wtp(terms, lambda n: _draws_of(posterior, "taste_mean", "attribute", n),
                      lambda n: _draws_of(posterior, "taste_sd", "random_attribute", n))
        true = float(self._wtp(terms, lambda n: truth[f"taste_mean[{n}]"], lambda n: truth[f"taste_sd[{n}]"]))
        lo, hi = np.quantile(w, [(1 - self.prob) / 2, 1 - (1 - self.prob) / 2])
        return {"value": float(hi - lo), "hit": float(lo <= true <= hi), "truth": true}

    def describe(self) -> str:
        return (f"width of the {100 * self.prob:g} % interval of the WTP for {self.attribute} "
                f"(-mean coefficient of {self.attribute} / mean coefficient of {self.price})")


@dataclass(frozen=True)
class SdDetection:
    r"""Target: the probability of detecting heterogeneity in a taste.

    A replication *detects* it when the lower end of the central ``prob`` interval
    of ``taste_sd[attribute]`` lies above ``threshold`` (in the taste's units; for a
    lognormal taste, of the log-taste). Choose the threshold as the smallest SD that
    matters: every posterior of an SD is above 0. Reported per number of
    respondents: the share of replications that detect, with its binomial standard
    error :math:`\sqrt{p(1-p)/R}` (0 when no or every replication detects; then take
    more replications).
    """

    attribute: str
    threshold: float
    prob: float = 0.9

    kind = "probability"

    def check(self, terms: Sequence[Term]) -> None:
        term = _term(terms, self.attribute, "SdDetection.attribute")
        if term.taste == "fixed":
            raise SpecError(f"SdDetection.attribute = {self.attribute!r} has a fixed taste: it has no taste_sd.")
        if not 0 < self.prob < 1:
            raise SpecError(f"SdDetection.prob must be in (0, 1), got {self.prob!r}.")
        if not self.threshold >= 0:
            raise SpecError(f"SdDetection.threshold must be >= 0, got {self.threshold!r}.")

    def evaluate(self, posterior: xr.Dataset, terms: Sequence[Term], truth: Mapping[str, float]) -> dict[str, float]:
        s = _draws_of(posterior, "taste_sd", "random_attribute", self.attribute)
        lower = float(np.quantile(s, (1 - self.prob) / 2))
        return {"value": lower, "hit": float(lower > self.threshold),
                "truth": float(truth.get(f"taste_sd[{self.attribute}]", np.nan))}

    def describe(self) -> str:
        return (f"probability that the lower end of the {100 * self.prob:g} % interval of taste_sd[{self.attribute}] "
                f"is above {self.threshold:g}")


def _power_task(item: _SimItem, *, attributes: Sequence[SimAttribute], simulation: Mapping[str, Any],
                fitter: Fitter, target: WtpWidth | SdDetection) -> dict[str, Any]:
    options = dict(simulation) | {"n_persons": item.n_persons}
    panel, sim = _simulate(attributes, options, task_seed(item.seed, item.key, _STREAM_DATA))
    post, timing = _call_fitter(fitter, panel, panel.spec, task_seed(item.seed, item.key, _STREAM_FIT))
    return target.evaluate(post, panel.terms, _truth_labels(sim.truth)) | timing


def power_analysis(
    attributes: Sequence[SimAttribute],
    target: WtpWidth | SdDetection,
    *,
    persons: Sequence[int] = (100, 200, 400),
    replications: int = 20,
    simulation: Mapping[str, Any] | None = None,
    fitter: Fitter | None = None,
    seed: int = 0,
    client: Any = None,
    workers: int | None = None,
    retries: int = 2,
    progress: bool = True,
) -> xr.Dataset:
    r"""How a target quantity improves with the number of respondents, with Monte Carlo error.

    For each number of respondents in ``persons``, ``replications`` panels are
    simulated (:func:`hierchoice.simulate.simulate_panel` with the true tastes of
    ``attributes``), fitted, and scored by ``target``: :class:`WtpWidth` (the mean
    width of a WTP interval; standard error :math:`s/\sqrt R`) or
    :class:`SdDetection` (the probability of detecting a taste SD; binomial
    standard error :math:`\sqrt{p(1-p)/R}`).

    Parameters
    ----------
    attributes : sequence of SimAttribute
    target : WtpWidth or SdDetection
    persons : sequence of int, default (100, 200, 400)
    replications : int, default 20
        Per number of respondents.
    simulation : mapping, optional
        Other keyword arguments of :func:`~hierchoice.simulate.simulate_panel`
        (``n_tasks``, ``alternatives``, ...); ``n_persons`` comes from ``persons``.
    fitter, seed, client, workers, retries, progress :
        As for :func:`parameter_recovery`. The replication ``r`` at ``n`` persons
        depends only on ``(seed, n, r)``.

    Returns
    -------
    xarray.Dataset
        Over (persons, replication): ``value`` (the interval width, or the lower
        interval end of the SD), ``hit`` (WTP interval covers the truth / SD
        detected), ``failed``, ``error``, ``seconds``, ``divergences``; over persons:
        ``estimate`` (mean width / detection probability), ``mc_se``, ``n_ok``, and
        ``coverage`` for a width target. ``attrs["target"]`` describes the target.
    """
    if not isinstance(target, (WtpWidth, SdDetection)):
        raise SpecError(f"target must be a WtpWidth or an SdDetection, got {type(target).__name__}.")
    sizes = [_positive_int(n, "persons", minimum=2) for n in persons]
    if not sizes or len(set(sizes)) != len(sizes):
        raise SpecError(f"persons must list different numbers of respondents, got {list(persons)!r}.")
    _positive_int(replications, "replications")
    options = _check_simulation(simulation)
    if "n_persons" in options:
        raise SpecError("simulation must not set n_persons: the numbers of respondents come from persons.")
    fitter = NutsFitter() if fitter is None else fitter
    task_seed(seed, 0)
    panel, _ = _simulate(attributes, options | {"n_persons": sizes[0]}, 0)
    target.check(panel.terms)
    items = [_SimItem((n, r), seed, n) for n in sizes for r in range(replications)]
    results = run_tasks(_power_task, items,
                        common={"attributes": list(attributes), "simulation": options, "fitter": fitter,
                                "target": target},
                        client=client, workers=workers, retries=retries, progress=progress, label="power fits")
    _first_success(results, "power fits")
    shape = (len(sizes), replications)
    per_fit = {k: v.reshape(shape) for k, v in _per_fit_fields(results).items()}  # items are persons-major
    value, hit, truth = np.full(shape, np.nan), np.full(shape, np.nan), np.full(shape, np.nan)
    for item, res in zip(items, results):
        if not isinstance(res, TaskFailure):
            i, r = sizes.index(item.n_persons or 0), item.key[1]
            value[i, r], hit[i, r], truth[i, r] = res["value"], res["hit"], res["truth"]
    failed = per_fit["failed"]
    n_ok = (~failed).sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        if target.kind == "width":
            estimate = np.nanmean(value, axis=1)
            mc_se = np.nanstd(value, axis=1, ddof=1) / np.sqrt(n_ok)
        else:
            estimate = np.nanmean(hit, axis=1)
            mc_se = np.sqrt(estimate * (1 - estimate) / n_ok)
    data: dict[str, Any] = {
        "value": (("persons", "replication"), value), "hit": (("persons", "replication"), hit),
        "truth": (("persons", "replication"), truth),
        **{k: (("persons", "replication"), v) for k, v in per_fit.items()},
        "estimate": ("persons", estimate), "mc_se": ("persons", mc_se), "n_ok": ("persons", n_ok),
    }
    if target.kind == "width":
        data["coverage"] = ("persons", np.nanmean(hit, axis=1))
    ds = xr.Dataset(data, coords={"persons": sizes, "replication": np.arange(replications)})
    ds.attrs.update({"workload": "power analysis", "target": target.describe(), "target_kind": target.kind,
                     "target_repr": repr(target), "replications": int(replications), "seed": int(seed),
                     "fitter": repr(fitter), "failed_fits": int(failed.sum()),
                     "simulation": _options_json(options), "attributes": repr(list(attributes))})
    return ds
