"""Sampling the panel mixed logit with NUTS on the CPU, and the fit result object.

:func:`fit` builds the model (:func:`hierchoice.model.build_model`), samples it
with the chosen backend (PyMC's own NUTS, nutpie, or numpyro through JAX) and
returns a :class:`ChoiceFit` holding an ArviZ ``InferenceData`` that ArviZ uses whole:

``posterior``
    the reported variables, with ``chain`` and ``draw`` coordinates; the population
    parameters ``taste_mean``, ``taste_sd``, ``taste_corr``, ``covariate_effect`` and, when
    person draws are kept, ``person_taste`` (and ``person_wtp``) over ``person``;
``observed_data``, ``log_likelihood``, ``posterior_predictive``
    ``chosen`` on one dim ``obs``, one entry per real task, with coordinates ``obs_person``
    and ``obs_task`` holding the user's person and task ids: the observed alternative's
    position in ``attrs["alternatives"]``, its log-probability under each draw's person
    tastes, and (``fit(..., posterior_predictive=True)`` or :func:`add_posterior_predictive`)
    one replicated choice per draw;
``sample_stats``, ``constant_data``
    the sampler's per-draw statistics and the panel's arrays over (person, task, ...).

So ``az.loo(fit.idata)``, ``az.compare({"a": fit_a.idata, "b": fit_b.idata})``,
``az.plot_ppc(fit.idata)`` and ``az.loo_pit(fit.idata, y="chosen")`` work as they are.
The person tastes stay in the posterior, where every analysis reads them; ArviZ's summary
of the population alone is ``az.summary(fit.idata, var_names=["^taste_", "^covariate_effect$"],
filter_vars="regex")`` (one row per population parameter; without ``var_names`` it also
summarises every person's tastes: B1, 4,000 rows more).
"""

from __future__ import annotations

import datetime
import importlib.util
import logging
import time
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from .._backend import load_backend, quiet_pymc_logs
from .._display import Status
from ..data.panel import ChoicePanel, load_panel
from ..exceptions import DataError, FitError, SpecError
from ..model.build import POPULATION_VARS, build_model, model_layout
from ..model.likelihood import cell_differences, task_loglik_cells
from ..spec import Spec, load_spec
from .results import ChoiceFit, thin_draws

__all__ = ["fit", "as_panel", "choose_method", "AUTO_BLOCKED_PERSONS", "resolve_backend", "task_log_likelihood",
           "add_log_likelihood", "replicate_choices", "add_posterior_predictive", "REPORTED_VARS"]

log = logging.getLogger("hierchoice")

#: Posterior variables kept in the results (internal standardised variables are dropped).
REPORTED_VARS = POPULATION_VARS + ("person_taste", "person_wtp")


def resolve_backend(name: str) -> str:
    """Map ``auto`` to the measured default and check that the backend is installed."""
    if name == "auto":
        # measured (docs/performance.md): nutpie is fastest here when installed
        return "nutpie" if importlib.util.find_spec("nutpie") is not None else "pymc"
    needs = {"nutpie": "nutpie", "numpyro": "numpyro", "pymc": "pymc"}[name]
    if importlib.util.find_spec(needs) is None:
        extra = {"nutpie": "pip install nutpie", "numpyro": "pip install numpyro jax"}[name]
        raise FitError(f"Backend {name!r} is not installed: {extra}.")
    if name == "numpyro" and importlib.util.find_spec("jax") is None:
        raise FitError("Backend 'numpyro' needs jax: pip install jax numpyro.")
    return name


def _sample_pymc(model, *, draws, tune, chains, cores, seed, target_accept, var_names, progressbar, mass_matrix):  # type: ignore[no-untyped-def]
    load_backend()
    import pymc as pm

    # PyMC compiles the model (PyTensor) inside pm.sample before its progress bar starts: the status line ends
    # at the first draw, so it spans the compile and the start of the chains
    ready = Status("compiling the model for PyMC's NUTS (PyTensor)", enabled=progressbar, inline=False).begin()
    try:  # PyMC's own INFO lines name its internal variables ("NUTS: [mu_std, ...]"): held back
        with model, quiet_pymc_logs():
            idata = pm.sample(
                draws=draws, tune=tune, chains=chains, cores=cores, random_seed=seed, target_accept=target_accept,
                var_names=var_names, progressbar=progressbar, compute_convergence_checks=False,
                return_inferencedata=True, idata_kwargs={"log_likelihood": False},
                callback=lambda **_: ready.end(what="compiled, chains started"),
            )
    except BaseException:
        ready.end(ok=False)
        raise
    ready.end(what="compiled, chains started")
    return idata


def _sample_nutpie(model, *, draws, tune, chains, cores, seed, target_accept, var_names, progressbar, mass_matrix):  # type: ignore[no-untyped-def]
    import shutil
    import tempfile

    import arviz as az
    import nutpie

    from .nutpie_compile import compile_nutpie, text_progress

    compiled = compile_nutpie(model, var_names, progressbar=progressbar)
    options = {
        "draws": draws, "tune": tune, "chains": chains, "cores": cores, "seed": seed, "target_accept": target_accept,
        "progress_bar": progressbar, "save_warmup": False,
        # a low-rank update of the diagonal mass matrix follows the correlations between
        # population parameters (constants vs taste means, correlations vs SDs)
        "low_rank_modified_mass_matrix": mass_matrix == "low_rank",
        # hides nutpie's per-parameter arrays when it keeps its draws in memory (older nutpie, below)
        "store_unconstrained": False, "store_gradient": False, "store_mass_matrix": False, "store_divergences": False,
    }
    store_type = getattr(getattr(nutpie, "zarr_store", None), "LocalStore", None)
    if store_type is None:  # an older nutpie: the draws stay in its in-memory table
        with text_progress():
            return nutpie.sample(compiled, **options)
    # nutpie keeps each draw's unconstrained point and gradient (two doubles per free parameter, the person
    # deviations included) whatever the store_* options say; in its in-memory table that grew with
    # persons x draws (B1: 570 -> 786 MB for 250 -> 2000 draws per chain). Written to a zarr store in a
    # temporary folder (TMPDIR), the process stayed at 521-522 MB (docs/performance.md). Only the
    # per-draw statistics and the requested variables of the draws are read back; the folder is removed.
    folder = tempfile.mkdtemp(prefix="hierchoice-draws-")
    try:
        with text_progress():
            idata = nutpie.sample(compiled, zarr_store=store_type(folder), **options)
        # the store also holds the tuning phase (warmup_* groups, whatever save_warmup says), with the same
        # per-parameter arrays: reading those back had made the full B3 run peak at 6.4 GB
        stats = idata["sample_stats"]
        stats = stats[[v for v, da in stats.data_vars.items() if set(da.dims) <= {"chain", "draw"}]]
        return az.InferenceData(posterior=idata["posterior"].load(), sample_stats=stats.load())
    finally:
        shutil.rmtree(folder, ignore_errors=True)


def _sample_numpyro(model, *, draws, tune, chains, cores, seed, target_accept, var_names, progressbar, mass_matrix):  # type: ignore[no-untyped-def]
    from pymc.sampling.jax import sample_numpyro_nuts

    from ..model.logit_op import register_jax

    register_jax()  # the fused likelihood's JAX implementation
    with model:
        return sample_numpyro_nuts(
            draws=draws, tune=tune, chains=chains, random_seed=seed, target_accept=target_accept,
            var_names=var_names, progressbar=progressbar, chain_method="sequential" if cores == 1 else "parallel",
            idata_kwargs={"log_likelihood": False}, compute_convergence_checks=False,
        )


_SAMPLERS = {"pymc": _sample_pymc, "nutpie": _sample_nutpie, "numpyro": _sample_numpyro}


def _approximate_advi(model, *, draws, seed, iterations, var_names, progressbar):  # type: ignore[no-untyped-def]
    load_backend()
    import pymc as pm

    with model:
        # Adam with step 0.01 reached the NUTS means in fewer iterations than the default optimiser here
        approx = pm.fit(n=iterations, method="advi", random_seed=seed, progressbar=progressbar,
                        obj_optimizer=pm.adam(learning_rate=0.01))
        idata = approx.sample(draws=draws, random_seed=seed, return_inferencedata=True)
    post = idata.posterior[[v for v in var_names if v in idata.posterior]]
    import arviz as az

    return az.InferenceData(posterior=post)


#: Persons per batch of stochastic ADVI when ``person_batch="auto"`` (see :func:`fit`).
AUTO_PERSON_BATCH = 500


def _person_batch(person_batch: int | str | None, n_persons: int, method: str) -> int | None:
    """The ADVI person batch size to use (None: the whole panel)."""
    if person_batch is None:
        return None
    if person_batch == "auto":
        return AUTO_PERSON_BATCH if method == "advi" and n_persons > 2 * AUTO_PERSON_BATCH else None
    if isinstance(person_batch, bool) or not isinstance(person_batch, int) or person_batch < 1:
        raise SpecError(f"person_batch must be a positive whole number of persons, 'auto' or None; "
                        f"got {person_batch!r}.")
    if method != "advi":
        raise SpecError("person_batch applies to method='advi' only: NUTS needs the whole panel's likelihood.")
    return min(person_batch, n_persons)


def fit(
    panel: ChoicePanel | pd.DataFrame | str | Path,
    spec: Spec | Mapping[str, Any] | str | Path | None = None,
    *,
    draws: int | None = None,
    tune: int | None = None,
    chains: int | None = None,
    random_seed: int | None = None,
    seed: int | None = None,
    backend: str | None = None,
    target_accept: float | None = None,
    cores: int | None = None,
    progressbar: bool = True,
    method: str | None = None,
    advi_iterations: int = 15_000,
    person_batch: int | str | None = "auto",
    client: Any = None,
    posterior_predictive: bool = False,
) -> ChoiceFit:
    """Sample the panel mixed logit of ``panel`` with NUTS (or approximate it with ADVI).

    Keyword options override the spec's ``[sampling]`` table; the same seed gives
    the same posterior.

    Parameters
    ----------
    panel : ChoicePanel, DataFrame or path
        A validated panel (:func:`hierchoice.load_panel`), or the choice table itself (a DataFrame, or a CSV or
        Parquet file), which is then validated under ``spec`` first: ``fit(df, spec)`` is
        ``fit(load_panel(df, spec), spec)``.
    spec : Spec, mapping or path, optional
        Defaults to the panel's own spec; needed with a table.
    draws, tune, chains, random_seed, backend, target_accept, cores : optional
        See ``docs/spec.md`` ([sampling]); ``random_seed`` is ``sampling.seed``.
    seed : int, optional
        The older name of ``random_seed`` (either may be given, not both with different values).
    progressbar : bool, default True
    method : {"nuts", "blocked", "advi"}, optional
        Defaults to the spec's ``sampling.method``, whose default ``"auto"`` is
        :func:`choose_method`: NUTS, or the blocked sampler for panels of
        :data:`AUTO_BLOCKED_PERSONS` persons or more. ``"auto"`` never picks ``"advi"``.
        ``"blocked"`` samples the centred model exactly with the blocked Gibbs-style
        sampler of :mod:`hierchoice.inference.blocked` (vectorised per-person MALA,
        conjugate and sufficient-statistic population updates, interweaving): for
        panels of 10,000 persons and more. ``backend``, ``target_accept`` and
        ``cores`` do not apply to it.
        ``"advi"`` fits a mean-field Gaussian approximation (Kucukelbir et al. 2017,
        JMLR 18) by stochastic optimisation and draws from it: minutes instead of
        hours for panels beyond full NUTS on one machine (100,000 persons). With
        ``model.parameterization = "auto"`` (the default) it fits the centred model,
        whose population means it places within 2 NUTS posterior SDs on the B1
        benchmark (the non-centred one shrinks them; docs/performance.md). Its
        intervals are too narrow; the result is flagged ``approximate`` and the
        convergence checks do not apply to it.
    advi_iterations : int, default 15000
    person_batch : int, "auto" or None, default "auto"
        ADVI only: evaluate the likelihood on random batches of this many persons
        (stochastic variational inference, an unbiased estimate of the full
        likelihood; Hoffman et al. 2013), so each iteration costs the same however
        many persons the panel has. ``"auto"`` uses :data:`AUTO_PERSON_BATCH`
        persons when the panel has more than twice that many, else the whole panel;
        ``None`` always uses the whole panel.
    client : distributed.Client or str, optional
        Blocked sampler only: run the person block on this Dask cluster (a ``Client``
        or a scheduler address such as ``"tcp://host:8786"``), the persons split into
        one shard per worker, each worker keeping its shard's data and latent tastes
        and returning only sums per sweep. The draws are the same as in one process
        (``docs/blocked.md``, "Beyond one machine"). Workers should run one thread
        each with the variables of :data:`hierchoice.validation.distributed.SINGLE_THREAD_ENV`.

    Returns
    -------
    ChoiceFit
    """
    panel = as_panel(panel, spec)
    if random_seed is not None and seed is not None and random_seed != seed:
        raise SpecError(f"random_seed={random_seed!r} and its alias seed={seed!r} were both given; give one of them.")
    seed = random_seed if random_seed is not None else seed
    if method is None:
        method = (panel.spec if spec is None else load_spec(spec)).sampling.method
    if method == "auto":
        method = choose_method(panel, spec)
    if method not in ("nuts", "advi", "blocked"):
        raise SpecError(f"method must be 'nuts', 'advi' or 'blocked', got {method!r}.")
    batch = _person_batch(person_batch, panel.n_persons, method)
    spec = panel.spec if spec is None else load_spec(spec)
    spec = spec.with_sampling(draws=draws, tune=tune, chains=chains, seed=seed, backend=backend,
                              target_accept=target_accept, cores=cores, method=method).for_method(method)
    if posterior_predictive and not spec.sampling.store_person_draws:
        raise FitError("fit(posterior_predictive=True) replicates choices from the posterior person tastes, which "
                       "sampling.store_person_draws = false does not keep; set it to true, or leave "
                       "posterior_predictive off.")
    if method == "blocked":
        return _finish(_fit_blocked(panel, spec, progressbar=progressbar, client=client), posterior_predictive)
    if client is not None:
        raise SpecError(f"a Dask cluster (client=, fit --scheduler) serves the blocked sampler only, and this fit's "
                        f"method is {method!r}: ask for method='blocked' (fit --method blocked), or drop the cluster.")
    s = spec.sampling
    panel = panel.with_spec(spec)  # the spec's tastes, not those the panel was validated with
    chosen_backend = resolve_backend(s.backend)
    layout = model_layout(panel, spec)
    t0 = time.perf_counter()
    model = build_model(panel, spec, person_batch=batch, layout=layout)
    build_seconds = time.perf_counter() - t0
    keep = [v for v in REPORTED_VARS if v in model.named_vars]
    if not s.store_person_draws:
        keep = [v for v in keep if v not in ("person_taste", "person_wtp")]
    n_cores = s.cores or min(s.chains, 2)
    try:
        if method == "advi":
            log.info("fitting mean-field ADVI (%s iterations)", advi_iterations)
            idata = _approximate_advi(model, draws=s.draws, seed=s.seed, iterations=advi_iterations,
                                      var_names=keep, progressbar=progressbar)
        else:
            log.info("sampling %s chains x %s draws (%s tune) with %s", s.chains, s.draws, s.tune, chosen_backend)
            idata = _SAMPLERS[chosen_backend](
                model, draws=s.draws, tune=s.tune, chains=s.chains, cores=n_cores, seed=s.seed,
                target_accept=s.target_accept, var_names=keep, progressbar=progressbar, mass_matrix=s.mass_matrix,
            )
    except (SpecError, FitError):
        raise
    except Exception as err:  # the sampler's own failure, reported in our words
        raise FitError(f"Sampling with backend {chosen_backend!r} failed: {type(err).__name__}: {err}") from err
    wall = time.perf_counter() - t0
    idata = _tidy_idata(idata, panel, keep)
    info = {
        "backend": "pymc-advi" if method == "advi" else chosen_backend,
        "draws": s.draws, "tune": s.tune, "chains": 1 if method == "advi" else s.chains, "seed": s.seed,
        "target_accept": s.target_accept,
        "wall_seconds": round(wall, 3),
        # model build; compile + tuning + draws (the profile of a whole `fit` process: docs/performance.md)
        "build_seconds": round(build_seconds, 3), "sampling_seconds": round(wall - build_seconds, 3),
        "approximate": method == "advi",
        "method": "ADVI (mean-field)" if method == "advi" else "NUTS",
        # when the fit finished, in UTC (the report's "fitted" line)
        "created_at": datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds"),
    }
    if method == "advi":
        info["advi_iterations"] = advi_iterations
        info["person_batch"] = batch
    return _finish(ChoiceFit(idata=idata, panel=panel, spec=spec, layout=layout, info=info), posterior_predictive)


def _finish(result: ChoiceFit, posterior_predictive: bool) -> ChoiceFit:
    """The per-task groups of a fit with person draws: log-likelihood always, replicated choices on request."""
    t0 = time.perf_counter()
    if result.has_person_draws:
        add_log_likelihood(result)
        if posterior_predictive:
            add_posterior_predictive(result)
    result.info["postprocess_seconds"] = round(time.perf_counter() - t0, 3)
    return result


def as_panel(data: Any, spec: Spec | Mapping[str, Any] | str | Path | None = None) -> ChoicePanel:
    """A :class:`ChoicePanel` from a panel, or from a choice table (DataFrame, CSV or Parquet path) and a spec."""
    if isinstance(data, ChoicePanel):
        return data
    if isinstance(data, (pd.DataFrame, str, Path)):
        if spec is None:
            raise SpecError("A choice table needs a spec to be read: fit(table, spec) with the spec as a dict, a "
                            "TOML path or a Spec (or validate it first: hierchoice.load_panel(table, spec)).")
        return load_panel(data, spec)
    raise DataError(f"Expected a ChoicePanel (hierchoice.load_panel) or a choice table (a DataFrame, or a CSV or "
                    f"Parquet path) with a spec; got {type(data).__name__}.")


#: From this many persons ``method = "auto"`` uses the blocked sampler. Measured (docs/blocked.md): at 10,000 persons
#: with 5 correlated tastes (B3) NUTS reached max R-hat 1.60 and bulk ESS 6.8 in 16.9 minutes while the blocked
#: sampler reached ESS >= 400 everywhere in 7.3 minutes; on small panels (100 persons x 15 tasks) NUTS gave 4x the
#: smallest ESS in the same time. Sizes in between are not measured yet.
AUTO_BLOCKED_PERSONS = 10_000


def choose_method(panel: ChoicePanel, spec: Spec | Mapping[str, Any] | str | Path | None = None) -> str:
    """What ``method = "auto"`` means for this panel: ``"blocked"`` from :data:`AUTO_BLOCKED_PERSONS` persons when
    the blocked sampler supports the model (no WTP space, at least one random taste), else ``"nuts"``."""
    if panel.n_persons < AUTO_BLOCKED_PERSONS:
        return "nuts"
    spec = panel.spec if spec is None else load_spec(spec)
    layout = model_layout(panel.with_spec(spec), spec)
    return "nuts" if layout.wtp_space or not layout.random else "blocked"


def _fit_blocked(panel: ChoicePanel, spec: Spec, *, progressbar: bool, client: Any = None) -> ChoiceFit:
    """``fit(..., method="blocked")``: the blocked sampler, the same result object as NUTS."""
    import contextlib
    from dataclasses import replace

    from .blocked import METHOD_NAME, BlockedSettings, sample_blocked

    # it samples the centred form's free variables (the posterior of the reported quantities is the same)
    spec = replace(spec, model=replace(spec.model, parameterization="centred"))
    s = spec.sampling
    panel = panel.with_spec(spec)
    layout = model_layout(panel, spec)
    keep = [v for v in REPORTED_VARS if s.store_person_draws or v not in ("person_taste", "person_wtp")]
    t0 = time.perf_counter()
    log.info("sampling %s chains x %s draws (%s tune) with the blocked sampler", s.chains, s.draws, s.tune)
    with contextlib.ExitStack() as stack:
        settings = BlockedSettings()
        if client is not None:
            client = stack.enter_context(_dask_client(client))
            settings = replace(settings, shards=max(1, len(client.scheduler_info()["workers"])))
        idata = sample_blocked(panel, spec, draws=s.draws, tune=s.tune, chains=s.chains, seed=s.seed, keep=keep,
                               progressbar=progressbar, settings=settings, client=client)
    wall = time.perf_counter() - t0
    idata = _tidy_idata(idata, panel, keep)
    info = {"backend": "blocked", "draws": s.draws, "tune": s.tune, "chains": s.chains, "seed": s.seed,
            "wall_seconds": round(wall, 3), "approximate": False, "method": METHOD_NAME,
            "created_at": datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds")}
    return ChoiceFit(idata=idata, panel=panel, spec=spec, layout=layout, info=info)


def _dask_client(client: Any) -> Any:
    """A context holding a ``distributed.Client``: the one given (left open), or one connected to an address."""
    import contextlib

    if not isinstance(client, str):
        return contextlib.nullcontext(client)
    try:
        import distributed
    except ImportError as exc:
        raise SpecError('a Dask scheduler address needs dask.distributed: pip install "dask[distributed]"') from exc
    try:
        return distributed.Client(client, timeout=30)
    except OSError as exc:
        raise SpecError(f"cannot reach the Dask scheduler at {client!r}: {exc}") from exc


def _obs_index(panel: ChoicePanel) -> tuple[np.ndarray, np.ndarray, dict[str, Any]]:
    """The real tasks in (person, task) order: their positions and the ``obs`` coordinates naming them.

    Every per-task quantity of a fit (observed choice, log-likelihood, replicated choices) lies on this one
    ``obs`` dim, with coordinates ``obs_person`` and ``obs_task`` holding the user's person and task ids.
    """
    cells = panel.cells  # tasks person after person, each person's in task order: np.nonzero(task_mask)'s order
    p_idx, t_idx = cells.task_owner, cells.position
    coords = {"obs": np.arange(p_idx.size),
              "obs_person": ("obs", np.array([str(v) for v in np.asarray(panel.persons, dtype=object)[p_idx]])),
              "obs_task": ("obs", np.array([str(v) for v in cells.task_id]))}
    return p_idx, t_idx, coords


def _tidy_idata(idata: Any, panel: ChoicePanel, keep: list[str]) -> Any:
    """Keep reported variables only, with chain/draw coordinates; add observed_data and constant_data groups.

    ``observed_data.chosen`` is the chosen alternative's position in ``alternatives`` (attribute
    ``alternatives``) over ``obs``, the dim of the log-likelihood and of replicated choices, so ArviZ
    pairs them; ``constant_data`` holds the panel's real rows (:meth:`ChoicePanel.cells_dataset`).
    """
    import arviz as az

    post = idata.posterior[[v for v in keep if v in idata.posterior]]
    groups: dict[str, Any] = {"posterior": post}
    if "sample_stats" in idata.groups():
        groups["sample_stats"] = idata.sample_stats
    for name, ds in list(groups.items()):
        groups[name] = ds.assign_coords({d: np.arange(ds.sizes[d]) for d in ("chain", "draw") if d in ds.dims})
    _, _, coords = _obs_index(panel)
    chosen = xr.DataArray(panel.cells.chosen.astype(np.int64), dims=("obs",), coords=coords, name="chosen",
                          attrs={"alternatives": [str(a) for a in panel.alternatives]})
    groups["observed_data"] = xr.Dataset({"chosen": chosen})
    # the panel's real rows only (linear in the data however unbalanced; padded grids are built on demand)
    groups["constant_data"] = panel.cells_dataset().drop_vars(["task_chosen"])
    return az.InferenceData(**groups)


def _person_draws(result: ChoiceFit, draws: xr.DataArray | None, max_draws: int | None = None) -> xr.DataArray:
    taste = result.posterior["person_taste"] if draws is None else draws
    return thin_draws(taste, max_draws).transpose("chain", "draw", "person", "attribute")


def task_log_likelihood(result: ChoiceFit, draws: xr.DataArray | None = None) -> xr.DataArray:
    """Pointwise log-likelihood of every real task under each posterior draw of the person tastes.

    Returns a DataArray with dims (chain, draw, obs), one ``obs`` per task, with
    coordinates ``obs_person`` and ``obs_task`` naming the person and task id (the
    dims and coordinates of ``observed_data.chosen``).

    A results folder does not store it: it is a function of the stored person tastes and the data, and
    rebuilding it costs less than reading it (B1, 1,000 draws x 10,000 tasks: ``docs/performance.md``).
    """
    panel = result.panel
    taste = _person_draws(result, draws)
    data = cell_differences(panel.cells)  # real cells only: tasks in the obs order
    _, _, coords = _obs_index(panel)
    values = taste.values
    n_c, n_d = values.shape[:2]
    out = np.empty((n_c, n_d, data.n_tasks))
    for c in range(n_c):
        out[c] = task_loglik_cells(data, values[c])  # (draw, task)
    return xr.DataArray(out, dims=("chain", "draw", "obs"),
                        coords={"chain": taste["chain"].values, "draw": taste["draw"].values, **coords}, name="chosen")


def add_log_likelihood(result: ChoiceFit) -> None:
    """Add the task-level log_likelihood group (needs person draws)."""
    ll = task_log_likelihood(result)
    if "log_likelihood" in result.idata.groups():
        del result.idata["log_likelihood"]
    result.idata.add_groups({"log_likelihood": xr.Dataset({"chosen": ll})})


def replicate_choices(result: ChoiceFit, *, seed: int | None = None, max_draws: int | None = None) -> xr.DataArray:
    """One replicated choice per real task and posterior draw: the posterior predictive of ``chosen``.

    Each draw's person tastes give the logit probabilities of every available alternative
    (:func:`hierchoice.model.likelihood.choice_probabilities`); one alternative is drawn from them by
    inverting the cumulative probabilities with a uniform number. The result has the dims and coordinates
    of ``observed_data.chosen``: (chain, draw, obs), the chosen alternative's position, as ``int8`` when
    there are fewer than 128 alternatives. Cost: memory chains x draws x tasks bytes (B1, 2 x 500 draws x
    10,000 tasks: 10 MB) and the time of one pass of the choice probabilities over the draws
    (``docs/performance.md``).
    """
    from ..model.likelihood import choice_probabilities

    panel = result.panel
    taste = _person_draws(result, None, max_draws)
    p_idx, t_idx, coords = _obs_index(panel)
    values = taste.values
    n_c, n_d = values.shape[:2]
    dtype = np.int8 if len(panel.alternatives) < 128 else np.int64
    out = np.empty((n_c, n_d, p_idx.size), dtype=dtype)
    rng = np.random.default_rng(result.info.get("seed") if seed is None else seed)
    step = max(1, int(2e7 // max(1, panel.X.size)))
    for c in range(n_c):
        for d0 in range(0, n_d, step):
            prob = choice_probabilities(panel.X, panel.available, values[c, d0 : d0 + step])[:, p_idx, t_idx]
            cum = np.cumsum(prob, axis=-1)
            u = rng.random(cum.shape[:-1] + (1,)) * cum[..., -1:]
            out[c, d0 : d0 + step] = np.minimum((cum < u).sum(axis=-1), prob.shape[-1] - 1)
    return xr.DataArray(out, dims=("chain", "draw", "obs"),
                        coords={"chain": taste["chain"].values, "draw": taste["draw"].values, **coords}, name="chosen",
                        attrs={"alternatives": [str(a) for a in panel.alternatives]})


def add_posterior_predictive(result: ChoiceFit, *, seed: int | None = None, max_draws: int | None = None) -> None:
    """Add a ``posterior_predictive`` group (``chosen``, see :func:`replicate_choices`) for ArviZ's
    ``plot_ppc`` and ``loo_pit``; a results folder stores it when present. Needs person draws."""
    result.person_draws("the posterior predictive of the choices")
    rep = replicate_choices(result, seed=seed, max_draws=max_draws)
    if "posterior_predictive" in result.idata.groups():
        del result.idata["posterior_predictive"]
    result.idata.add_groups({"posterior_predictive": xr.Dataset({"chosen": rep})})
