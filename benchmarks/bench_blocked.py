"""Blocked sampler on B3's design: ms per sweep, effective draws per sweep and R-hat of the population parameters.

    NUMBA_NUM_THREADS=2 python benchmarks/bench_blocked.py --persons 10000 --chains 4 --tune 500 --draws 1000
    python benchmarks/bench_blocked.py --persons 10000 --chains 1 --tune 100 --draws 200 --dask-workers 2

B3's panel (benchmarks/bench.py): benchmark_scenario(n_persons, 12 tasks, 4 alternatives, 5 correlated normal
tastes, seed=1). Chains run one after another, each person pass on NUMBA_NUM_THREADS threads. Only the population
parameters are kept (internal scale: ESS and R-hat do not depend on the unit factors).
"""

import argparse
import json
import time

import numpy as np


def main() -> None:
    import arviz as az

    import hierchoice as hc
    from hierchoice.inference import blocked as bl
    from hierchoice.inference.blocked.chain import _one_blas_thread
    from hierchoice.spec import load_spec

    p = argparse.ArgumentParser()
    p.add_argument("--persons", type=int, default=10_000)
    p.add_argument("--chains", type=int, default=4)
    p.add_argument("--tune", type=int, default=500)
    p.add_argument("--draws", type=int, default=1000)
    p.add_argument("--person-steps", type=int, default=2)
    p.add_argument("--asis-steps", type=int, default=2)
    p.add_argument("--seed", type=int, default=1)
    p.add_argument("--out", default=None)
    p.add_argument("--dask-workers", type=int, default=0,
                   help="also run one chain with the persons in one shard per worker of a local Dask cluster and "
                        "print ms per sweep in process and sharded, their ratio, and whether the draws are identical")
    a = p.parse_args()
    sim = hc.benchmark_scenario(a.persons, 12, 4, 5, correlated=True, seed=1)
    panel = hc.ChoicePanel.from_frame(sim.data, sim.spec)
    spec = load_spec(sim.spec)
    from dataclasses import replace

    spec = replace(spec, model=replace(spec.model, parameterization="centred"))
    prob = bl.blocked_problem(panel, spec)
    settings = bl.BlockedSettings(person_steps=a.person_steps, asis_steps=a.asis_steps)
    if a.dask_workers:
        _sharding_overhead(prob, settings, a)
        return
    res, times, cpu = [], [], []
    with _one_blas_thread():
        bl.run_chain(prob, np.random.default_rng(0), draws=2, tune=2, settings=settings, keep_persons=False)  # compile
        for child in np.random.SeedSequence(a.seed).spawn(a.chains):
            t0 = time.perf_counter()
            c0 = time.process_time()
            res.append(bl.run_chain(prob, np.random.default_rng(child), draws=a.draws, tune=a.tune, settings=settings,
                                    keep_persons=False))
            times.append(time.perf_counter() - t0)
            cpu.append(time.process_time() - c0)
    L = np.stack([r["L"] for r in res])  # (chain, draw, r, r)
    sd = np.sqrt(np.sum(L**2, axis=-1))
    corr = np.einsum("cdik,cdjk->cdij", L, L) / (sd[..., :, None] * sd[..., None, :])
    iu = np.triu_indices(L.shape[-1], 1)
    groups = {"taste_mean": np.stack([r["mu_std"] for r in res]), "taste_sd": sd, "taste_corr": corr[..., iu[0], iu[1]]}
    sweeps = a.chains * a.draws
    out = {"persons": a.persons, "chains": a.chains, "tune": a.tune, "draws": a.draws,
           "person_steps": a.person_steps, "asis_steps": a.asis_steps,
           "ms_per_sweep": 1000 * sum(times) / (a.chains * (a.tune + a.draws)), "wall_s": sum(times), "cpu_s": sum(cpu),
           "person_accept": float(np.mean([r["person_accept"].mean() for r in res])),
           "cov_accept": float(np.mean([r["cov_accept"].mean() for r in res])),
           "asis_accept": float(np.mean([r["asis_accept"].mean() for r in res]))}
    truth = sim.truth
    for name, x in groups.items():
        ds = az.convert_to_dataset({name: x})
        bulk = az.ess(ds, method="bulk")[name].values
        tail = az.ess(ds, method="tail")[name].values
        rhat = az.rhat(ds)[name].values
        out[name] = {"min_bulk_ess": float(bulk.min()), "min_tail_ess": float(tail.min()),
                     "bulk_ess_per_sweep": float(bulk.min() / sweeps), "tail_ess_per_sweep": float(tail.min() / sweeps),
                     "max_rhat": float(rhat.max()), "posterior_mean": np.round(x.mean((0, 1)), 3).tolist()}
    out["truth_sd_user_units"] = np.round(np.asarray(truth["taste_sd"]), 3).tolist()
    print(json.dumps(out, indent=1))
    if a.out:
        with open(a.out, "w") as f:
            json.dump(out, f, indent=1)


def _sharding_overhead(prob, settings, a) -> None:  # type: ignore[no-untyped-def]
    """One chain in this process, then the same chain with its persons on Dask workers: ms per sweep of each."""
    from dataclasses import replace

    import distributed

    from hierchoice.inference import blocked as bl
    from hierchoice.inference.blocked.chain import _one_blas_thread
    from hierchoice.validation.distributed import local_cluster

    sweeps = a.tune + a.draws
    child = np.random.SeedSequence(a.seed).spawn(1)[0]
    with _one_blas_thread():
        t0 = time.perf_counter()
        here = bl.run_chain(prob, np.random.default_rng(child), draws=a.draws, tune=a.tune, settings=settings,
                            keep_persons=False)
        t_here = time.perf_counter() - t0
    sharded = replace(settings, shards=a.dask_workers)
    with local_cluster(a.dask_workers) as cluster, distributed.Client(cluster) as client:
        bl.run_chain(prob, np.random.default_rng(0), draws=2, tune=2, settings=sharded, keep_persons=False,
                     client=client)  # workers compile (or load) the kernels
        t0 = time.perf_counter()
        there = bl.run_chain(prob, np.random.default_rng(child), draws=a.draws, tune=a.tune, settings=sharded,
                             keep_persons=False, client=client)
        t_there = time.perf_counter() - t0
    same = all(np.array_equal(here[k], there[k]) for k in ("mu_std", "L"))
    print(json.dumps({"persons": a.persons, "sweeps": sweeps, "dask_workers": a.dask_workers,
                      "ms_per_sweep_in_process": 1000 * t_here / sweeps,
                      "ms_per_sweep_sharded": 1000 * t_there / sweeps,
                      "sharded_over_in_process": t_there / t_here, "identical_draws": same}, indent=1))


if __name__ == "__main__":
    main()
