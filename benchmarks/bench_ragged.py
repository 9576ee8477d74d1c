"""Cost of one log-likelihood + gradient on a heavy-tailed purchase panel: ragged cells against padding.

A household purchase panel is far from a balanced conjoint design: purchases per household are heavy-tailed
and not every alternative is on the shelf at every purchase. This script builds such a panel (invented numbers,
numpy only: 5 alternatives, each on the shelf with probability 0.75 (at least 2), purchases per household from a
negative binomial with mean 25, capped at 300) and times, in the same run and interleaved:

* ``ragged``: the panel's real cells only (:func:`hierchoice.model.likelihood.ragged_differences`, the layout
  every sampler uses);
* ``balanced``: a balanced panel with the same persons and (to within one task per person) the same number of
  real cells, every alternative available;
* ``padded``: the same purchase panel padded to the longest household and to every alternative, with a mask
  (the layout before ragged storage), through the same kernel.

It prints milliseconds per evaluation (median of interleaved repeats), bytes of the likelihood's data, bytes per
real cell, and the ratios ragged / balanced (target <= 1.3) and padded / ragged.

    python benchmarks/bench_ragged.py --households 5000 --repeats 30

With ``--pipeline`` it measures instead the peak memory (tracemalloc: numpy and pandas allocations) of the whole
path from a long table to the likelihood's data (validation, the panel, the model's scaling, the ragged cells,
the Op's layout) at two panel sizes, per real row, against the size of the padded arrays the panel would hold.

    python benchmarks/bench_ragged.py --pipeline --households 5000
"""

from __future__ import annotations

import argparse
import time
import tracemalloc

import numpy as np
import pandas as pd

import hierchoice as hc
from hierchoice.model.build import model_layout
from hierchoice.model.likelihood import cell_differences, ragged_differences
from hierchoice.model.logit_op import batch_layout, loglik_and_grad, op_layout, padded_by_person


def purchase_panel(rng: np.random.Generator, n_p: int, n_j: int = 5, n_k: int = 6, mean_tasks: float = 25.0,
                   cap: int = 300) -> tuple[np.ndarray, ...]:
    """(X, available, task_mask, chosen) of a heavy-tailed panel; a negative binomial with shape 0.8 has a long tail."""
    shape = 0.8
    n_t = np.clip(1 + rng.negative_binomial(shape, shape / (shape + mean_tasks - 1), n_p), 1, cap)
    t_max = int(n_t.max())
    X = rng.normal(size=(n_p, t_max, n_j, n_k))
    available = rng.random((n_p, t_max, n_j)) < 0.75
    available[..., :2] |= available.sum(axis=2, keepdims=True) < 2
    task_mask = np.arange(t_max)[None, :] < n_t[:, None]
    u = np.where(available, rng.gumbel(size=available.shape), -np.inf)
    chosen = np.where(task_mask, u.argmax(axis=2), -1)
    return X, available, task_mask, chosen


def balanced_panel(rng: np.random.Generator, n_p: int, n_cells: int, n_j: int = 5, n_k: int = 6) -> tuple[np.ndarray, ...]:
    n_t = max(1, round(n_cells / (n_p * (n_j - 1))))
    X = rng.normal(size=(n_p, n_t, n_j, n_k))
    available = np.ones((n_p, n_t, n_j), dtype=bool)
    task_mask = np.ones((n_p, n_t), dtype=bool)
    chosen = rng.integers(0, n_j, (n_p, n_t))
    return X, available, task_mask, chosen


def long_table(X: np.ndarray, available: np.ndarray, task_mask: np.ndarray, chosen: np.ndarray) -> tuple[pd.DataFrame, dict]:
    """The panel as the long table a user would give: one row per offered alternative (absent rows: not offered)."""
    p, t, j = np.nonzero(available & task_mask[:, :, None])
    frame = pd.DataFrame({"household": p, "purchase": t, "product": np.array(list("ABCDE"))[j],
                          "bought": (chosen[p, t] == j).astype(int)})
    names = [f"a{k}" for k in range(X.shape[3])]
    for k, name in enumerate(names):
        frame[name] = X[p, t, j, k]
    spec = {"columns": {"person": "household", "task": "purchase", "alternative": "product", "chosen": "bought"},
            "attributes": {name: {"taste": "normal"} for name in names}}
    return frame, spec


def pipeline(n_p: int, seed: int) -> None:
    print(f"{'households':>11}{'real rows':>12}{'peak MB':>9}{'bytes/row':>11}{'padded X MB':>13}")
    for n in (n_p // 2, n_p):
        X, av, tm, ch = purchase_panel(np.random.default_rng(seed), n)
        frame, spec = long_table(X, av, tm, ch)
        padded_mb = (X.nbytes + av.nbytes + tm.nbytes + ch.nbytes) / 1e6
        del X, av, tm, ch
        tracemalloc.start()
        base = tracemalloc.get_traced_memory()[0]
        panel = hc.ChoicePanel.from_frame(frame, spec)
        layout = model_layout(panel, panel.spec)
        op = op_layout(cell_differences(panel.cells, scale=layout.scale))
        peak = tracemalloc.get_traced_memory()[1] - base
        tracemalloc.stop()
        assert panel._dense is None, "the padded arrays were built on the way to the likelihood"
        print(f"{n:>11}{len(frame):>12,}{peak / 1e6:>9.1f}{peak / len(frame):>11.0f}{padded_mb:>13.1f}")
        del panel, op, frame


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--households", type=int, default=5000)
    ap.add_argument("--repeats", type=int, default=30)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--pipeline", action="store_true", help="peak memory from a long table to the likelihood's data")
    args = ap.parse_args()
    if args.pipeline:
        pipeline(args.households, args.seed)
        return
    rng = np.random.default_rng(args.seed)
    n_p = args.households
    X, av, tm, ch = purchase_panel(rng, n_p)
    tasks = tm.sum(axis=1)
    ragged = ragged_differences(X, av, tm, ch)
    op = op_layout(ragged)
    bal = ragged_differences(*balanced_panel(rng, n_p, ragged.n_cells))
    op_bal = op_layout(bal)
    D_p, mask_p, n_o, n_t = padded_by_person(ragged)
    D_pad = np.ascontiguousarray(D_p.transpose(1, 2, 0, 3).reshape(ragged.n_attributes, -1))
    mask_pad = np.ascontiguousarray(mask_p.transpose(1, 0, 2).reshape(-1))
    _, owner_pad, buckets_pad = batch_layout(n_p, n_o, n_t)
    del X, av, tm, ch, D_p, mask_p
    beta = rng.normal(0, 0.5, (n_p, ragged.n_attributes))

    cases = {
        "ragged": lambda: loglik_and_grad(op.D, op.mask, op.owner, op.buckets, beta),
        "balanced": lambda: loglik_and_grad(op_bal.D, op_bal.mask, op_bal.owner, op_bal.buckets, beta),
        "padded": lambda: loglik_and_grad(D_pad, mask_pad, owner_pad, buckets_pad, beta),
    }
    ref = cases["padded"]()[0]
    assert abs(cases["ragged"]()[0] - ref) <= 1e-9 * abs(ref), "ragged and padded layouts disagree"
    times: dict[str, list[float]] = {k: [] for k in cases}
    for _ in range(args.repeats):
        for name, f in cases.items():
            t0 = time.perf_counter()
            f()
            times[name].append(time.perf_counter() - t0)
    ms = {k: 1e3 * float(np.median(v)) for k, v in times.items()}
    nbytes = {
        "ragged": sum(a.nbytes for a in op),
        "balanced": sum(a.nbytes for a in op_bal),
        "padded": D_pad.nbytes + mask_pad.nbytes + owner_pad.nbytes,
    }
    cells = {"ragged": ragged.n_cells, "balanced": bal.n_cells, "padded": ragged.n_cells}
    print(f"households {n_p}; purchases per household: median {np.median(tasks):.0f}, mean {tasks.mean():.1f}, "
          f"max {tasks.max()}; real cells {ragged.n_cells:,} (balanced panel: {bal.n_cells:,}); "
          f"padded cells {D_pad.shape[1]:,}")
    print(f"{'layout':<10}{'ms/eval':>10}{'ns/real cell':>14}{'data MB':>10}{'bytes/real cell':>17}")
    for k in cases:
        print(f"{k:<10}{ms[k]:>10.2f}{1e6 * ms[k] / cells[k]:>14.2f}{nbytes[k] / 1e6:>10.1f}"
              f"{nbytes[k] / cells[k]:>17.1f}")
    print(f"ragged / balanced time: {ms['ragged'] / ms['balanced']:.2f} (target <= 1.3); "
          f"padded / ragged time: {ms['padded'] / ms['ragged']:.2f}; "
          f"padded / ragged memory: {nbytes['padded'] / nbytes['ragged']:.1f}")


if __name__ == "__main__":
    main()
