"""Sweeps, warm-up and chains of the blocked sampler, and the draws as InferenceData.

May import: :mod:`.updates`, :mod:`.shard`, :mod:`.problem`, :mod:`.kernels`, ``hierchoice.model``.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..._backend import load_backend
from ...data.panel import ChoicePanel
from ...model.build import build_model
from ...spec import Spec
from .problem import BlockedProblem, PopulationState, blocked_problem
from .shard import CHUNK, LocalShards
from .updates import _asis, _location_conjugate, _location_mala, _update_covariance, _update_persons


@dataclass(frozen=True)
class BlockedSettings:
    """Tuning of the sweep: MALA steps per person, random-walk steps of the location and ASIS blocks.

    ``shards``: how many pieces the persons are split into (``client``: on a Dask cluster; else in this
    process). The draws do not depend on it (:mod:`.shard`); they do depend on ``chunk``, the persons per
    chunk of the per-person random streams and sums.
    """

    person_steps: int = 2
    location_steps: int = 3
    covariance_steps: int = 2
    asis_steps: int = 2
    thin: int = 1
    precondition: str = "information"
    shards: int = 1
    chunk: int = CHUNK


def chain_key(rng: np.random.Generator) -> tuple[int, int]:
    """The key of a chain's per-chunk person streams, drawn from the chain's own generator."""
    return tuple(int(v) for v in rng.integers(0, 2**63 - 1, size=2))  # type: ignore[return-value]


def initial_state(prob: BlockedProblem, rng: np.random.Generator, shards: Any) -> PopulationState:
    """A dispersed start: means near 0, SDs at half their prior scale, persons at their means plus noise."""
    K = prob.n_attributes
    mu_free = rng.normal(0.0, 0.3, K) * np.minimum(prob.mean_sd, 1.0)
    gamma = np.zeros((prob.n_covariates, prob.shifted.size))
    L = np.diag(0.5 * prob.sd_sd)
    shards.call("start_chain", mu_free, gamma, L)
    return PopulationState(mu_free=mu_free, gamma=gamma, L=L)


def sweep(prob: BlockedProblem, state: PopulationState, shards: Any, rng: np.random.Generator,
          settings: BlockedSettings, adapt_rate: float | None, history: list[np.ndarray] | None) -> None:
    """One sweep: persons, location, covariance, interweaving."""
    _update_persons(prob, state, shards, settings.person_steps, adapt_rate, settings.precondition)
    if prob.conjugate:
        _location_conjugate(prob, state, shards, rng)
    else:
        _location_mala(prob, state, shards, rng, settings.location_steps, adapt_rate, history)
    _update_covariance(prob, state, shards, rng, settings.covariance_steps)
    if settings.asis_steps:
        _asis(prob, state, shards, rng, settings.asis_steps, adapt_rate)
    state.sweep += 1


STAT_NAMES = ("person_accept", "person_step_size", "location_accept", "cov_accept", "asis_accept", "asis_step_size")


def make_shards(prob: BlockedProblem, key: tuple[int, ...], settings: BlockedSettings, client: Any = None) -> Any:
    """The persons of one chain: in this process, or as actors on the Dask ``client``'s workers."""
    if client is None:
        return LocalShards(prob, key, settings.shards, settings.chunk)
    from .distributed import DaskShards

    return DaskShards(client, prob, key, settings.shards, settings.chunk)


def run_chain(prob: BlockedProblem, rng: np.random.Generator, *, draws: int, tune: int,
              settings: BlockedSettings = BlockedSettings(), keep_persons: bool = True,
              progress: str | None = None, client: Any = None) -> dict[str, np.ndarray]:
    """Run one chain: ``tune`` adapting sweeps, then ``draws * thin`` sweeps keeping every ``thin``-th."""
    shards = make_shards(prob, chain_key(rng), settings, client)
    try:
        state = initial_state(prob, rng, shards)
        history: list[np.ndarray] = []
        r = prob.n_random
        out: dict[str, list[Any]] = {k: [] for k in ("mu_std", "gamma_std", "L", "eta_std") + STAT_NAMES}
        total = tune + draws * settings.thin
        t0 = time.perf_counter()
        for i in range(total):
            tuning = i < tune
            rate = (i + 1.0) ** -0.6 if tuning else None
            sweep(prob, state, shards, rng, settings, rate, history if tuning else None)
            if not tuning and (i - tune + 1) % settings.thin == 0:
                out["mu_std"].append(state.mu_free.copy())
                out["gamma_std"].append(state.gamma.copy())
                out["L"].append(state.L.copy())
                if keep_persons:
                    out["eta_std"].append(shards.gather_eta())
                for k in STAT_NAMES:
                    out[k].append(state.stats.get(k, math.nan))
            if progress is not None and (i + 1) % max(1, total // 10) == 0:
                print(f"{progress}: sweep {i + 1}/{total} ({time.perf_counter() - t0:.1f} s)", flush=True)
    finally:
        shards.close()
    res = {k: np.array(v) for k, v in out.items() if v}
    res["L"] = res["L"].reshape(-1, r, r)
    return res


def _free_dataset(prob: BlockedProblem, chains: list[dict[str, np.ndarray]], model: Any) -> Any:
    """The centred model's free variables, (chain, draw, ...), as an xarray Dataset named and shaped as PyMC's."""
    import xarray as xr

    layout = prob.layout
    r = prob.n_random
    data: dict[str, Any] = {}
    mu = np.stack([c["mu_std"] for c in chains])
    data["mu_std"] = (("chain", "draw", "attribute"), mu)
    if layout.shifted:
        data["gamma_std"] = (("chain", "draw", "covariate", "shifted_attribute"), np.stack([c["gamma_std"] for c in chains]))
    L = np.stack([c["L"] for c in chains])
    if layout.correlated:
        rows, cols = np.tril_indices(r)
        data["chol_std"] = (("chain", "draw", "chol_std_dim_0"), L[..., rows, cols])
    else:
        data["sd_std"] = (("chain", "draw", "random_attribute"), np.diagonal(L, axis1=-2, axis2=-1).copy())
    if "eta_std" in chains[0]:
        data["eta_std"] = (("chain", "draw", "person", "random_attribute"), np.stack([c["eta_std"] for c in chains]))
    coords = {k: list(v) for k, v in model.coords.items() if k in ("attribute", "covariate", "shifted_attribute",
                                                               "random_attribute", "person")}
    return xr.Dataset(data, coords={"chain": np.arange(len(chains)), "draw": np.arange(mu.shape[1]), **coords})


def _deterministics(free: Any, names: list[str], model: Any, prob: BlockedProblem, chunk: int = 50) -> Any:
    """The model's reported quantities from draws of its free variables (:func:`pymc.compute_deterministics`).

    PyMC's function wants every free variable. Without kept person draws the population quantities do not depend
    on the persons' latent tastes, so zeros stand in for them, a few draws at a time (memory stays small).
    """
    import pymc as pm
    import xarray as xr

    if "eta_std" in free or "eta_std" not in model.named_vars:
        return pm.compute_deterministics(free, var_names=names, model=model, progressbar=False)
    parts = []
    for start in range(0, free.sizes["draw"], chunk):
        block = free.isel(draw=slice(start, start + chunk))
        zeros = np.zeros((block.sizes["chain"], block.sizes["draw"], prob.n_persons, prob.n_random))
        block = block.assign(eta_std=(("chain", "draw", "person", "random_attribute"), zeros))
        parts.append(pm.compute_deterministics(block, var_names=names, model=model, progressbar=False))
    return xr.concat(parts, dim="draw").assign_coords(draw=free["draw"].values)


def _one_blas_thread() -> Any:
    """Limit BLAS to one thread while sampling (its threads spin against numba's on small matrices)."""
    import contextlib

    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # optional: without it, set OPENBLAS_NUM_THREADS=1
        return contextlib.nullcontext()
    return threadpool_limits(1, user_api="blas")


def sample_blocked(panel: ChoicePanel, spec: Spec, *, draws: int, tune: int, chains: int, seed: int | None,
                   keep: list[str], progressbar: bool = False, settings: BlockedSettings = BlockedSettings(),
                   client: Any = None) -> Any:
    """Sample the centred model of ``panel`` under ``spec`` with the blocked sampler; an InferenceData.

    The posterior holds the reported variables in ``keep`` (computed by the PyMC model
    from the sampled free variables), ``sample_stats`` the per-block acceptance rates
    and step sizes (``person_accept``, ``person_step_size``, ``location_accept``,
    ``cov_accept``, ``asis_accept``, ``asis_step_size``) and ``diverging`` (always
    False: no block integrates a trajectory). Chains run one after another, each
    person pass in parallel; chain ``c`` uses the ``c``-th child of
    ``numpy.random.SeedSequence(seed)``.
    """
    from dataclasses import replace

    import arviz as az
    load_backend()
    import xarray as xr

    spec = replace(spec, model=replace(spec.model, parameterization="centred"))
    prob = blocked_problem(panel, spec)
    model = build_model(panel, spec)
    keep_persons = any(v in keep for v in ("person_taste", "person_wtp"))
    children = np.random.SeedSequence(seed).spawn(chains)
    results = []
    with _one_blas_thread():
        for c, child in enumerate(children):
            rng = np.random.default_rng(child)
            results.append(run_chain(prob, rng, draws=draws, tune=tune, settings=settings, keep_persons=keep_persons,
                                     progress=f"blocked chain {c + 1}/{chains}" if progressbar else None,
                                     client=client))
    free = _free_dataset(prob, results, model)
    names = [v for v in keep if v in model.named_vars and (keep_persons or v not in ("person_taste", "person_wtp"))]
    post = _deterministics(free, names, model, prob)
    stats = {k: (("chain", "draw"), np.stack([res[k] for res in results])) for k in STAT_NAMES}
    stats["diverging"] = (("chain", "draw"), np.zeros((chains, post.sizes["draw"]), dtype=bool))
    sample_stats = xr.Dataset(stats, coords={"chain": post["chain"], "draw": post["draw"]})
    return az.InferenceData(posterior=post, sample_stats=sample_stats)
