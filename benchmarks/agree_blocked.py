"""The blocked sampler against NUTS where NUTS converges: one table row per population parameter.

    python benchmarks/agree_blocked.py --panel b1 --out agree_b1.json
    python benchmarks/agree_blocked.py --panel corr2000 --out agree_corr2000.json

Panels: ``b1`` = B1 (1,000 persons x 10 tasks x 3 alternatives x 4 independent normal tastes) and ``corr2000`` =
B3's design with 2,000 persons (12 tasks x 4 alternatives x 5 correlated normal tastes). Both methods fit the same
model (same priors); NUTS is the default backend. Per parameter (taste means, SDs, correlations): the posterior
means' difference in combined Monte Carlo SEs (ArviZ ``mcse``) and in posterior SDs (NUTS's), and the ratio of the
90 % equal-tailed interval widths. Targets (issue 15): |z| <= 3, |difference| <= 0.2 SD, widths within 10 %.
Prints a markdown table and each method's wall time, min bulk / tail ESS and max R-hat.
"""

import argparse
import json
import time

import numpy as np

PANELS = {"b1": dict(n_persons=1000, n_tasks=10, n_alternatives=3, n_attributes=4, correlated=False),
          "corr2000": dict(n_persons=2000, n_tasks=12, n_alternatives=4, n_attributes=5, correlated=True)}


def _flat(post, names):  # type: ignore[no-untyped-def]
    """(chain, draw, parameter) array and labels of the population parameters (upper-triangle correlations)."""
    arrays, labels = [], []
    for v in names:
        if v not in post:
            continue
        da = post[v]
        if v == "taste_corr":
            attrs = list(da.coords[da.dims[-1]].values)
            iu = np.triu_indices(len(attrs), 1)
            arrays.append(da.values[..., iu[0], iu[1]])
            labels += [f"corr[{attrs[i]},{attrs[j]}]" for i, j in zip(*iu, strict=True)]
        else:
            arrays.append(da.values)
            labels += [f"{v.removeprefix('taste_')}[{a}]" for a in da.coords[da.dims[-1]].values]
    return np.concatenate(arrays, axis=-1), labels


def _diagnostics(x):  # type: ignore[no-untyped-def]
    import arviz as az

    ds = az.convert_to_dataset({"x": x})
    return {"min_bulk_ess": float(az.ess(ds, method="bulk")["x"].min()),
            "min_tail_ess": float(az.ess(ds, method="tail")["x"].min()), "max_rhat": float(az.rhat(ds)["x"].max())}


def main() -> None:
    import arviz as az

    import hierchoice as hc

    p = argparse.ArgumentParser()
    p.add_argument("--panel", choices=sorted(PANELS), default="b1")
    p.add_argument("--chains", type=int, default=4)
    p.add_argument("--nuts-draws", type=int, default=1000)
    p.add_argument("--blocked-draws", type=int, default=2000)
    p.add_argument("--blocked-tune", type=int, default=500)
    p.add_argument("--seed", type=int, default=1)
    p.add_argument("--out", default=None)
    a = p.parse_args()
    sim = hc.benchmark_scenario(**PANELS[a.panel], seed=1)
    panel = hc.ChoicePanel.from_frame(sim.data, sim.spec)
    spec = hc.load_spec(sim.spec).with_sampling(store_person_draws=False)
    names = ["taste_mean", "taste_sd", "taste_corr"]
    fits, out = {}, {"panel": a.panel, **PANELS[a.panel], "chains": a.chains}
    for method, draws, tune in (("nuts", a.nuts_draws, a.nuts_draws), ("blocked", a.blocked_draws, a.blocked_tune)):
        t0 = time.perf_counter()
        res = hc.fit(panel, spec, method=method, draws=draws, tune=tune, chains=a.chains, seed=a.seed,
                     progressbar=False)
        wall = time.perf_counter() - t0
        x, labels = _flat(res.posterior, names)
        fits[method] = x
        out[method] = {"draws": draws, "tune": tune, "wall_s": round(wall, 1), **_diagnostics(x)}
    rows = []
    for i, lab in enumerate(labels):
        a_, b_ = fits["nuts"][..., i], fits["blocked"][..., i]
        se = float(np.hypot(az.mcse(a_), az.mcse(b_))[0])
        diff = float(b_.mean() - a_.mean())
        sd = float(a_.std())
        wa = float(np.subtract(*np.quantile(a_, [0.95, 0.05])))
        wb = float(np.subtract(*np.quantile(b_, [0.95, 0.05])))
        rows.append({"parameter": lab, "nuts_mean": float(a_.mean()), "blocked_mean": float(b_.mean()),
                     "z_mcse": diff / se, "diff_in_sd": diff / sd, "width_ratio": wb / wa})
    out["rows"] = rows
    out["worst"] = {"abs_z_mcse": max(abs(r["z_mcse"]) for r in rows),
                    "abs_diff_in_sd": max(abs(r["diff_in_sd"]) for r in rows),
                    "abs_width_change": max(abs(r["width_ratio"] - 1) for r in rows)}
    print("| parameter | NUTS mean | blocked mean | z (MCSE) | diff / SD | 90 % width ratio |")
    print("|---|---|---|---|---|---|")
    for r in rows:
        print(f"| {r['parameter']} | {r['nuts_mean']:.3f} | {r['blocked_mean']:.3f} | {r['z_mcse']:+.2f} | "
              f"{r['diff_in_sd']:+.3f} | {r['width_ratio']:.3f} |")
    print(json.dumps({k: v for k, v in out.items() if k != "rows"}, indent=1))
    if a.out:
        with open(a.out, "w") as f:
            json.dump(out, f, indent=1)


if __name__ == "__main__":
    main()
