"""hierchoice benchmarks: sampling efficiency and the cost of one log-posterior gradient.

Usage::

    python benchmarks/bench.py                 # B1: 1000 persons x 10 tasks x 3 alternatives x 4 normal tastes
    python benchmarks/bench.py --b3            # also B3: 10,000 x 12 x 4 x 5 correlated tastes (long)
    python benchmarks/bench.py --tiny          # a tiny size so CI runs the script without measuring anything
    python benchmarks/bench.py --scaling       # cost of one gradient at three sizes of persons, tasks, attributes

Each sampling configuration runs in its own subprocess so that its peak memory (ru_maxrss) is its own. Every figure
is measured in the same run as its baseline (this machine is shared and noisy): the ratios are what to read.
Figures go to stdout and to ``benchmarks/results/<size>.json``.

Configurations
--------------
naive
    What a user would write by hand: a per-row gather ``beta[person_index]``, ``pm.Categorical(logit_p=...)``,
    PyMC's default sampler; same priors on the same standardised attributes, same draws.
default
    ``hierchoice.inference.sampling`` with its defaults (nutpie, diagonal mass matrix, the fused likelihood Op), person draws
    not stored.
pymc
    ``hierchoice.inference.sampling`` with PyMC's own NUTS (the same model, compiled by PyTensor's C backend).
default_x4
    ``default`` with four times the draws: its peak memory against ``default``'s shows whether memory grows with
    draws (it should not, with person draws not stored).

Kernels (one log-posterior + gradient of the model, non-centred)
-----------------------------------------------------------------
numpy_floor   numpy's vectorised exp/log on the difference form, value and exact gradient (reference)
numba_fused   one fused pass in numba with scalar exp (reference); the floor is the faster of the two
graph_c       the model with the plain PyTensor likelihood graph, C backend
graph_numba   the same under PyTensor's numba backend (called natively, as nutpie does)
op_c          the model with the fused likelihood Op (the default), C backend (what PyMC's NUTS runs)
op_numba      the same under numba (what nutpie runs)
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

SIZES = {
    "tiny": dict(n_persons=30, n_tasks=4, n_alternatives=3, n_attributes=2, correlated=False, draws=30, tune=30,
                 chains=2),
    "B1": dict(n_persons=1000, n_tasks=10, n_alternatives=3, n_attributes=4, correlated=False, draws=500, tune=500,
               chains=2),
    "B3": dict(n_persons=10_000, n_tasks=12, n_alternatives=4, n_attributes=5, correlated=True, draws=1000,
               tune=500, chains=4),
    # B3's panel with a short run: steps per draw, seconds per draw and memory, in minutes instead of tens
    "B3short": dict(n_persons=10_000, n_tasks=12, n_alternatives=4, n_attributes=5, correlated=True, draws=200,
                    tune=300, chains=2),
}


def _panel(size: dict):
    import hierchoice as hc

    sim = hc.benchmark_scenario(size["n_persons"], size["n_tasks"], size["n_alternatives"], size["n_attributes"],
                                correlated=size["correlated"], seed=1)
    return sim, hc.ChoicePanel.from_frame(sim.data, sim.spec)


def _min_ess(idata, names) -> float:
    import arviz as az

    ess = az.ess(idata, var_names=[n for n in names if n in idata.posterior], method="bulk")
    return float(min(float(ess[v].min()) for v in ess.data_vars))


def _naive_model(panel):
    """The per-row gather model with pm.Categorical, on the same standardised attributes and priors."""
    import pymc as pm

    from hierchoice.model.build import PRIOR_SD, model_layout

    layout = model_layout(panel)
    p_idx, t_idx = np.nonzero(panel.task_mask)
    X = panel.X[p_idx, t_idx] / layout.scale  # (rows, J, K)
    y = panel.chosen[p_idx, t_idx]
    K = X.shape[-1]
    with pm.Model(coords={"attribute": list(panel.attributes)}) as model:
        mu = pm.Normal("taste_mean", 0, PRIOR_SD["mean"], dims="attribute")
        sd = pm.HalfNormal("taste_sd", PRIOR_SD["sd"], dims="attribute")
        e = pm.Normal("e", 0, 1, shape=(panel.n_persons, K))
        beta = mu + sd * e
        util = (X * beta[p_idx][:, None, :]).sum(-1)
        pm.Categorical("y", logit_p=util, observed=y)
    return model


def run_one(config: str, size_name: str) -> dict:
    """One sampling configuration; returns its figures (run in a subprocess)."""
    import pymc as pm

    import hierchoice as hc

    size = SIZES[size_name]
    sim, panel = _panel(size)
    t0 = time.perf_counter()
    if config == "naive":
        model = _naive_model(panel)
        with model:
            idata = pm.sample(draws=size["draws"], tune=size["tune"], chains=size["chains"], cores=2, random_seed=3,
                              progressbar=False, compute_convergence_checks=False)
        names = ["taste_mean", "taste_sd"]
        grads = int(idata.sample_stats["n_steps"].sum())
    else:
        backend = {"pymc": "pymc", "nutpie": "nutpie"}.get(config.removesuffix("_x4"), "auto")
        # *_x4: four times the draws, to show that memory does not grow with draws x persons
        draws = size["draws"] * (4 if config.endswith("_x4") else 1)
        spec = hc.Spec.from_dict(panel.spec.to_dict() | {"sampling": {"store_person_draws": False}})
        result = hc.fit(panel, spec, draws=draws, tune=size["tune"], chains=size["chains"], seed=3,
                        backend=backend, progressbar=False)
        idata = result.idata
        names = ["taste_mean", "taste_sd", "taste_corr"]
        stats = idata.sample_stats
        grads = int(stats["n_steps"].sum()) if "n_steps" in stats else -1
    wall = time.perf_counter() - t0
    ess = _min_ess(idata, names)
    peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    # PyMC's NUTS samples in child processes (one per core): their peak, the largest one's
    children_mb = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
    row = {"config": config, "wall_s": round(wall, 2), "min_bulk_ess": round(ess, 1),
           "ess_per_s": round(ess / wall, 3), "peak_mb": round(peak_mb, 1),
           "peak_child_mb": round(children_mb, 1), "gradient_evals_sampling": grads}
    if config != "naive":
        import arviz as az

        rhat = az.rhat(idata, var_names=[n for n in names if n in idata.posterior])
        row["max_rhat"] = round(max(float(rhat[v].max()) for v in rhat.data_vars), 4)
        row["steps_per_draw"] = round(float(idata.sample_stats["n_steps"].mean()), 1)
        row["divergences"] = int(idata.sample_stats["diverging"].sum())
    return row


# ---------------------------------------------------------------- kernels


def numpy_floor_kernel(D, mask, n_other, mu, log_sd, e):
    """Log-posterior and gradient of the non-centred normal-taste model, numpy vectorised (reference).

    ``D`` (attribute, person, task * other) and ``mask`` as in ``DifferenceData``. In-place
    operations and loops over the few other alternatives instead of reductions over a short
    last axis, which numpy does slowly.
    """
    sd = np.exp(log_sd)
    beta = mu + sd * e  # (P, K)
    n_k, P, R = D.shape
    delta = D[0] * beta[:, 0:1]
    tmp = np.empty_like(delta)
    for k in range(1, n_k):
        np.multiply(D[k], beta[:, k : k + 1], out=tmp)
        delta += tmp
    d3 = delta.reshape(P, -1, n_other)  # (person, task, other alternative)
    m = np.maximum(d3[..., 0], 0.0)
    for j in range(1, n_other):
        np.maximum(m, d3[..., j], out=m)
    ex = np.exp(d3 - m[..., None])
    ex *= mask.reshape(P, -1, n_other)
    tot = np.exp(-m)
    for j in range(n_other):
        tot += ex[..., j]
    ll = -(m.sum() + np.log(tot).sum())
    ex /= tot[..., None]
    q = ex.reshape(P, R)  # d ll / d delta = -q
    g_beta = np.empty_like(beta)
    for k in range(n_k):
        np.multiply(q, D[k], out=tmp)
        g_beta[:, k] = -tmp.sum(1)
    # priors: mu ~ N(0, 2.5), sd ~ HalfNormal(1) with log transform (+ Jacobian), e ~ N(0, 1)
    lp = ll - 0.5 * (mu**2).sum() / 2.5**2 - 0.5 * (sd**2).sum() + log_sd.sum() - 0.5 * (e**2).sum()
    g_mu = g_beta.sum(0) - mu / 2.5**2
    g_logsd = (g_beta * e).sum(0) * sd - sd**2 + 1.0
    g_e = g_beta * sd - e
    return lp, g_mu, g_logsd, g_e


def _numba_fused():
    import numba

    @numba.njit(fastmath=False, cache=False)
    def kernel(D, mask, n_other, mu, log_sd, e, g_e):
        n_k, P, R = D.shape
        sd = np.exp(log_sd)
        lp = 0.0
        g_mu = np.zeros(n_k)
        g_logsd = np.zeros(n_k)
        beta = np.empty(n_k)
        gb = np.empty(n_k)
        dl = np.empty(n_other)
        for p in range(P):
            for k in range(n_k):
                beta[k] = mu[k] + sd[k] * e[p, k]
                gb[k] = 0.0
            for t0 in range(0, R, n_other):
                m = 0.0
                for j in range(n_other):
                    v = 0.0
                    for k in range(n_k):
                        v += D[k, p, t0 + j] * beta[k]
                    dl[j] = v
                    if v > m:
                        m = v
                tot = np.exp(-m)
                for j in range(n_other):
                    dl[j] = np.exp(dl[j] - m) * mask[p, t0 + j]
                    tot += dl[j]
                lp -= m + np.log(tot)
                for j in range(n_other):
                    w = dl[j] / tot
                    for k in range(n_k):
                        gb[k] -= w * D[k, p, t0 + j]
            for k in range(n_k):
                g_mu[k] += gb[k]
                g_logsd[k] += gb[k] * e[p, k] * sd[k]
                g_e[p, k] = gb[k] * sd[k] - e[p, k]
                lp -= 0.5 * e[p, k] * e[p, k]
        for k in range(n_k):
            lp += -0.5 * mu[k] * mu[k] / 6.25 - 0.5 * sd[k] * sd[k] + log_sd[k]
            g_mu[k] -= mu[k] / 6.25
            g_logsd[k] += 1.0 - sd[k] * sd[k]
        return lp, g_mu, g_logsd

    return kernel


def _time(f, n=200) -> float:
    f()
    best = np.inf
    for _ in range(3):
        t = time.perf_counter()
        for _ in range(n):
            f()
        best = min(best, (time.perf_counter() - t) / n)
    return best * 1e3


def _model_gradient_fn(model, mode):
    """(callable x -> (logp, grad), n) for ``model``; under NUMBA the compiled function is called directly.

    Calling the numba-compiled function (as nutpie does, from native code) leaves out the
    Python wrapper that PyMC puts around every call; under the C backend that wrapper is
    part of what PyMC's own sampler pays, so it stays in.
    """
    from pytensor.compile.sharedvalue import SharedVariable

    f = model.logp_dlogp_function(ravel_inputs=True, mode=mode)
    f.set_extra_values({})
    n = sum(int(np.prod(v.shape)) for v in model.initial_point().values())
    if mode != "NUMBA":
        return f, n
    fn = f._pytensor_function
    shared = [i.get_value(borrow=True) if isinstance(i, SharedVariable) else None for i in fn.maker.fgraph.inputs]
    jit = fn.vm.jit_fn

    def call(x):
        return jit(*[x if v is None else v for v in shared])

    return call, n


def kernels(size_name: str) -> dict:
    """Milliseconds per log-posterior + gradient at ``size_name``: reference kernels and the model's graphs."""
    from hierchoice.model.build import build_model, model_layout
    from hierchoice.model.likelihood import difference_data

    size = SIZES[size_name]
    sim, panel = _panel(size)
    layout = model_layout(panel)
    data = difference_data(panel.X, panel.available, panel.task_mask, panel.chosen, scale=layout.scale)
    rng = np.random.default_rng(0)
    K = data.D.shape[0]
    mu, log_sd = rng.normal(0, 0.5, K), rng.normal(-0.5, 0.2, K)
    e = rng.normal(size=(panel.n_persons, K))
    out: dict[str, float] = {}
    n_rep = 200 if size_name != "B3" else 10
    out["numpy_floor_ms"] = _time(lambda: numpy_floor_kernel(data.D, data.mask, data.n_others, mu, log_sd, e), n_rep)
    fused = _numba_fused()
    g_e = np.empty_like(e)
    out["numba_fused_ms"] = _time(lambda: fused(data.D, data.mask, data.n_others, mu, log_sd, e, g_e), n_rep)
    x = np.concatenate([mu, log_sd, e.ravel()])
    _, g_mu, g_logsd, g_e_ref = numpy_floor_kernel(data.D, data.mask, data.n_others, mu, log_sd, e)
    ref_grad = np.concatenate([g_mu, g_logsd, g_e_ref.ravel()])
    variants = {"graph_c": ("graph", None), "graph_numba": ("graph", "NUMBA"), "op_c": ("fused", None),
                "op_numba": ("fused", "NUMBA")}
    for name, (likelihood, mode) in variants.items():
        f, n = _model_gradient_fn(build_model(panel, likelihood=likelihood), mode)
        if size["correlated"]:
            # the reference kernels are the independent-taste model's; a correlated model has the Cholesky
            # factor's parameters too, so it is timed at a random point of its own and not compared
            x_model = np.random.default_rng(0).normal(0, 0.3, n)
        else:
            x_model = x
            _, grad = f(x)
            # check against the reference before timing (the priors' normalising constants differ)
            out[f"{name}_max_grad_diff"] = float(np.max(np.abs(np.asarray(grad) - ref_grad)))
        out[f"{name}_ms"] = _time(lambda f=f, x_model=x_model: f(x_model), n_rep)
    floor = min(out["numpy_floor_ms"], out["numba_fused_ms"])
    out["floor_ms"] = floor
    for name in variants if not size["correlated"] else ():  # the floor is the independent-taste model's
        out[f"{name}_over_floor"] = out[f"{name}_ms"] / floor
    return {k: (float(f"{v:.4g}") if isinstance(v, float) else v) for k, v in out.items()}


def scaling() -> list[dict]:
    """Cost of one log-posterior + gradient of the default model (fused Op, numba) as each dimension grows."""
    from hierchoice.model.build import build_model

    rows = []
    base = dict(n_persons=1000, n_tasks=10, n_alternatives=3, n_attributes=4, correlated=False)
    grid = (("n_persons", [500, 1000, 4000]), ("n_tasks", [5, 10, 20]), ("n_alternatives", [2, 3, 5]),
            ("n_attributes", [2, 4, 8]))
    for key, values in grid:
        for v in values:
            size = base | {key: v}
            _, panel = _panel(size)
            f, n = _model_gradient_fn(build_model(panel), "NUMBA")
            x = np.random.default_rng(0).normal(0, 0.3, n)
            ms = _time(lambda: f(x), 100)
            cells = size["n_persons"] * size["n_tasks"] * (size["n_alternatives"] - 1) * size["n_attributes"]
            rows.append({"vary": key, "value": v, "ms_per_gradient": round(ms, 4),
                         "ns_per_cell": round(ms * 1e6 / cells, 3)})
    return rows


def _run_config(config: str, size: str, env: dict) -> dict:
    proc = subprocess.run([sys.executable, __file__, "--one", config, size], capture_output=True, text=True, env=env)
    if proc.returncode != 0:
        raise SystemExit(f"{config} on {size} failed:\n{proc.stderr[-3000:]}")
    return json.loads(proc.stdout.strip().splitlines()[-1])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--tiny", action="store_true", help="tiny size: exercise the script, measure nothing")
    parser.add_argument("--b3", action="store_true", help="also run B3 (long)")
    parser.add_argument("--b3-only", action="store_true", help="run only B3")
    parser.add_argument("--b3-short", action="store_true",
                        help="B3's panel, 2 chains x 200 draws after 300 tuning steps (default and default_x4)")
    parser.add_argument("--scaling", action="store_true", help="gradient cost at three sizes per dimension")
    parser.add_argument("--no-warm", action="store_true",
                        help="skip the tiny warm-up runs that fill the compilation caches before timing")
    parser.add_argument("--configs", help="comma-separated configurations to run instead of the size's usual ones "
                        "(naive, default, pymc, nutpie, and any of them with _x4 for four times the draws)")
    parser.add_argument("--one", nargs=2, metavar=("CONFIG", "SIZE"), help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.one:
        print(json.dumps(run_one(*args.one)))
        return
    if args.tiny:
        sizes = ["tiny"]
    elif args.b3_only:
        sizes = ["B3"]
    elif args.b3_short:
        sizes = ["B3short"]
    else:
        sizes = ["B1"] + (["B3"] if args.b3 else [])
    out_dir = Path(__file__).parent / "results"
    out_dir.mkdir(exist_ok=True)
    env = os.environ | {"PYTHONWARNINGS": "ignore"}
    if not (args.tiny or args.no_warm):
        # PyTensor and numba cache compiled code on disk, keyed by the graph and not by the data's size;
        # one tiny run of each configuration first means every timed run below starts from warm caches
        # (what a user sees from the second fit on), the naive model's C code included.
        for config in ("naive", "default", "pymc"):
            _run_config(config, "tiny", env)
    for size in sizes:
        configs = args.configs.split(",") if args.configs else {
            "B3": ["default"], "B3short": ["default", "default_x4"]}.get(size, ["naive", "default", "pymc", "default_x4"])
        figures: dict = {"size": size, "shape": SIZES[size], "machine": f"{os.cpu_count()} cores",
                         "load_average_at_start": os.getloadavg()[0], "runs": []}
        for config in configs:
            row = _run_config(config, size, env)
            figures["runs"].append(row)
            print(f"{size:5} {config:8} wall {row['wall_s']:8.1f} s  min bulk ESS {row['min_bulk_ess']:8.1f}  "
                  f"ESS/s {row['ess_per_s']:8.2f}  peak {row['peak_mb']:8.0f} MB (child {row['peak_child_mb']:.0f})  "
                  f"gradients {row['gradient_evals_sampling']}  steps/draw {row.get('steps_per_draw', '-')}  "
                  f"max R-hat {row.get('max_rhat', '-')}", flush=True)
        runs = {r["config"]: r for r in figures["runs"]}
        if "naive" in runs:
            for config in [c for c in ("default", "pymc", "nutpie") if c in runs]:
                ratio = runs[config]["ess_per_s"] / max(runs["naive"]["ess_per_s"], 1e-9)
                figures[f"{config}_over_naive_ess_per_s"] = round(ratio, 2)
                print(f"{size:5} ESS/s ratio {config} / naive: {ratio:.2f}")
        for config in [c for c in ("default", "pymc", "nutpie") if c in runs and f"{c}_x4" in runs]:
            key = "peak_child_mb" if runs[config]["peak_child_mb"] > runs[config]["peak_mb"] else "peak_mb"
            grow = runs[f"{config}_x4"][key] / runs[config][key]
            figures[f"{config}_peak_memory_ratio_x4_draws"] = round(grow, 3)
            print(f"{size:5} {config}: peak memory ({key}) with 4x the draws / 1x: {grow:.3f}")
        (out_dir / f"{size}.json").write_text(json.dumps(figures, indent=2))  # kept if what follows fails
        if size != "B3short":
            figures["kernels"] = kernels(size)
            for k, v in figures["kernels"].items():
                print(f"{size:5} kernel {k}: {v}")
        if args.scaling and size == "B1":
            figures["scaling"] = scaling()
            for row in figures["scaling"]:
                print(f"scaling {row['vary']}={row['value']}: {row['ms_per_gradient']} ms per gradient, "
                      f"{row['ns_per_cell']} ns per person-task-other-attribute cell")
        (out_dir / f"{size}.json").write_text(json.dumps(figures, indent=2))
        print(f"wrote {out_dir / (size + '.json')}")


if __name__ == "__main__":
    main()
