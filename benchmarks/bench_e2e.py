"""End-to-end cost of ``hierchoice fit`` as a user runs it: a new process, from start to exit.

Usage::

    python benchmarks/bench_e2e.py             # B1: 1000 persons x 10 tasks x 3 alternatives x 4 normal tastes
    python benchmarks/bench_e2e.py --tiny      # a tiny size so CI runs the script without measuring anything
    python benchmarks/bench_e2e.py --no-naive  # skip the naive model (the ESS/s ratio is then not printed)

What it does, in one run (the machine is shared and noisy: every ratio is against a baseline of the same run):

1. writes the size's panel (``benchmarks/bench.py``'s ``benchmark_scenario``, seed 1) as ``data.csv`` and its spec as
   ``spec.toml`` into a temporary folder, with empty numba and PyTensor cache folders (``NUMBA_CACHE_DIR``,
   ``PYTENSOR_FLAGS=base_compiledir=...``), so the first run pays every compile;
2. runs ``hierchoice fit data.csv --spec spec.toml --out ... --quiet`` in a new process, twice (first and second run
   of the design), through :func:`hierchoice.cli.main` with timers wrapped around its steps, and prints the profile
   of each process: interpreter start and import, data read and validation, model build, compile, tuning + draws,
   post-processing (the task-level log-likelihood), saving, and the rest up to exit;
3. after each run, in the same process, measures what the compact folder costs and keeps: its size (and the size of
   the same data as float64 without compression, the earlier layout), task-level LOO rebuilt from the folder against
   the in-memory fit's (relative difference), the time to rebuild the task-level log-likelihood from the folder, and
   the time to draw the posterior predictive (``fit(posterior_predictive=True)``);
4. runs the naive hand-written PyMC model (``benchmarks/bench.py``, configuration ``naive``) in a new process;
5. prints ESS/s of the population parameters (smallest bulk ESS of ``taste_mean`` and ``taste_sd`` over the process's
   whole wall time) for each, and the ratios.

Figures go to stdout and to ``benchmarks/results/<size>_e2e.json``.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from bench import SIZES, _panel  # noqa: E402  (the benchmark sizes and panels live in bench.py)

from hierchoice.spec import Spec  # noqa: E402

POPULATION = ["taste_mean", "taste_sd"]

# Run in the child process: hierchoice's CLI with timers around its steps. The steps are the module attributes
# the CLI looks up when it runs (they are imported inside the command), so the code that runs is the CLI's.
_CHILD = r"""
import json, os, sys, time
t_launch = float(os.environ["E2E_LAUNCH"])
t_python = time.time()
import hierchoice.cli as cli
t_import = time.time()
import hierchoice.data.panel as panel_mod
import hierchoice.inference.nutpie_compile as nc
import hierchoice.inference.results as results
marks = {}
def timed(mod, name, key, keep=None):
    inner = getattr(mod, name)
    def wrapper(*a, **k):
        t = time.time()
        out = inner(*a, **k)
        marks[key] = marks.get(key, 0.0) + time.time() - t
        if keep is not None:
            keep.append(out if key != "save" else a[0])
        return out
    setattr(mod, name, wrapper)
fits = []
timed(panel_mod, "load_panel", "read_validate")
timed(nc, "compile_nutpie", "compile")
timed(results, "save_fit", "save", fits)
code = cli.main(sys.argv[1:])
t_done = time.time()
info = fits[0].info if fits else {}
print(json.dumps({"code": code, "python_start": t_python - t_launch, "import": t_import - t_python,
                  "marks": marks, "info": info, "cli_seconds": t_done - t_launch}), file=sys.stderr)
# after the command: what the compact folder keeps (not part of the timings above)
if fits and os.environ.get("E2E_CHECK") == "1":
    import numpy as np
    from hierchoice.diagnostics.loo import task_loo
    from hierchoice.inference.sampling import add_posterior_predictive, task_log_likelihood
    result = fits[0]
    out = sys.argv[sys.argv.index("--out") + 1]
    mem = task_loo(result)
    t = time.time(); again = results.load_fit(out); t_load = time.time() - t
    t = time.time(); task_log_likelihood(again); t_ll = time.time() - t
    disk = task_loo(again)
    t = time.time(); add_posterior_predictive(result); t_pp = time.time() - t
    pp_mb = result.idata.posterior_predictive["chosen"].nbytes / 1e6
    old = result.idata.copy()
    del old["posterior_predictive"]
    t = time.time(); old.to_netcdf(os.path.join(os.path.dirname(out), "format1.nc"), engine="h5netcdf"); t_old = time.time() - t
    print(json.dumps({"check": {
        "elpd_memory": float(mem.elpd_loo), "elpd_folder": float(disk.elpd_loo),
        "elpd_rel_diff": abs(float(disk.elpd_loo) / float(mem.elpd_loo) - 1),
        "p_loo_rel_diff": abs(float(disk.p_loo) / float(mem.p_loo) - 1),
        "max_abs_pareto_k_diff": float(np.max(np.abs(disk.pareto_k.values - mem.pareto_k.values))),
        "load_seconds": t_load, "rebuild_loglik_seconds": t_ll, "posterior_predictive_seconds": t_pp,
        "posterior_predictive_mb": pp_mb, "format1_with_loglik_save_seconds": t_old,
        "format1_with_loglik_mb": os.path.getsize(os.path.join(os.path.dirname(out), "format1.nc")) / 1e6}}),
        file=sys.stderr)
"""


def _last_json(text: str, key: str) -> dict:
    for line in reversed(text.strip().splitlines()):
        if line.startswith("{") and key in line:
            return json.loads(line)
    raise SystemExit(f"no {key!r} record in the output:\n{text[-3000:]}")


def _min_ess(folder: Path) -> float:
    import arviz as az

    from hierchoice.inference.results import load_fit

    ess = az.ess(load_fit(folder).idata, var_names=POPULATION, method="bulk")
    return float(min(float(ess[v].min()) for v in ess.data_vars))


def cli_run(work: Path, out: Path, env: dict, size: dict, check: bool, backend: str) -> dict:
    """One ``hierchoice fit`` in a new process; its profile, wall time, folder and ESS/s."""
    argv = ["fit", str(work / "data.csv"), "--spec", str(work / "spec.toml"), "--out", str(out), "--quiet",
            "--draws", str(size["draws"]), "--tune", str(size["tune"]), "--chains", str(size["chains"]),
            "--seed", "3", "--backend", backend]
    t0 = time.time()
    proc = subprocess.run([sys.executable, "-c", _CHILD, *argv], capture_output=True, text=True,
                          env=env | {"E2E_LAUNCH": repr(t0), "E2E_CHECK": "1" if check else "0"})
    if proc.returncode != 0:
        raise SystemExit(f"hierchoice fit failed:\n{proc.stderr[-3000:]}")
    rec = _last_json(proc.stderr, '"marks"')
    m, info = rec["marks"], rec["info"]
    cli = rec["cli_seconds"]
    sampling = info.get("sampling_seconds", 0.0)
    rows = {
        "interpreter start": rec["python_start"],
        "import hierchoice (+ the CLI)": rec["import"],
        "data read + validation": m.get("read_validate", 0.0),
        "model build": info.get("build_seconds", 0.0),
        "compile (nutpie: PyTensor -> numba)": m.get("compile", 0.0),
        "tuning + draws (PyMC's NUTS: + compile)": sampling - m.get("compile", 0.0),
        "post-processing (task log-likelihood)": info.get("postprocess_seconds", 0.0),
        "saving the results folder": m.get("save", 0.0),
    }
    rows["other (printing the summary, tidying, exit)"] = cli - sum(rows.values())
    files = {p.name: p.stat().st_size for p in out.iterdir() if p.is_file()}
    ess = _min_ess(out)
    row = {"wall_s": round(cli, 2), "profile_s": {k: round(v, 2) for k, v in rows.items()},
           "folder_mb": round(sum(files.values()) / 1e6, 2), "files": files, "min_bulk_ess": round(ess, 1),
           "ess_per_s": round(ess / cli, 3), "save_share_of_fit": round(m.get("save", 0.0) / cli, 4)}
    if check:
        row["check"] = _last_json(proc.stderr, '"check"')["check"]
    return row


def naive_run(env: dict, size_name: str) -> dict:
    t0 = time.time()
    proc = subprocess.run([sys.executable, str(HERE / "bench.py"), "--one", "naive", size_name], capture_output=True,
                          text=True, env=env)
    wall = time.time() - t0
    if proc.returncode != 0:
        raise SystemExit(f"naive model failed:\n{proc.stderr[-3000:]}")
    row = json.loads(proc.stdout.strip().splitlines()[-1])
    return {"wall_s": round(wall, 2), "fit_wall_s": row["wall_s"], "min_bulk_ess": row["min_bulk_ess"],
            "ess_per_s": round(row["min_bulk_ess"] / wall, 3)}


def _print_profile(label: str, row: dict) -> None:
    print(f"\n{label}: {row['wall_s']:.1f} s from launch to exit, folder {row['folder_mb']:.1f} MB, "
          f"min bulk ESS {row['min_bulk_ess']:.0f}, ESS/s {row['ess_per_s']:.2f}")
    for step, sec in row["profile_s"].items():
        print(f"  {step:45} {sec:8.2f} s  {100 * sec / row['wall_s']:5.1f} %")
    if "check" in row:
        for k, v in row["check"].items():
            print(f"  check {k:40} {v:.6g}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--tiny", action="store_true", help="tiny size: exercise the script, measure nothing")
    parser.add_argument("--no-naive", action="store_true", help="skip the naive model")
    parser.add_argument("--backends", default="nutpie",
                        help="comma-separated NUTS backends to run twice each (nutpie, pymc); default nutpie")
    args = parser.parse_args()
    size_name = "tiny" if args.tiny else "B1"
    size = SIZES[size_name]
    figures: dict = {"size": size_name, "shape": size, "machine": f"{os.cpu_count()} cores",
                     "load_average_at_start": os.getloadavg()[0]}
    with tempfile.TemporaryDirectory(prefix="hierchoice-e2e-") as tmp:
        work = Path(tmp)
        sim, _ = _panel(size)
        sim.data.to_csv(work / "data.csv", index=False)
        (work / "spec.toml").write_text(Spec.from_dict(sim.spec).to_toml(), encoding="utf-8")
        env = os.environ | {"PYTHONWARNINGS": "ignore", "NUMBA_CACHE_DIR": str(work / "numba-cache"),
                            "PYTENSOR_FLAGS": f"base_compiledir={work / 'pytensor-cache'}"}
        runs = []
        for backend in args.backends.split(","):
            for run, label in ((1, "first run (empty caches)"), (2, "second run (same design)")):
                key = f"{backend}_run{run}"
                row = cli_run(work, work / key, env, size, check=run == 2, backend=backend)
                figures[key] = row
                runs.append(key)
                _print_profile(f"{size_name} hierchoice fit --backend {backend}, {label}", row)
        if not args.no_naive:
            figures["naive"] = naive_run(env, size_name)
            n = figures["naive"]
            print(f"\n{size_name} naive model: {n['wall_s']:.1f} s from launch to exit ({n['fit_wall_s']:.1f} s build + "
                  f"compile + sampling), min bulk ESS {n['min_bulk_ess']:.0f}, ESS/s {n['ess_per_s']:.3f}")
            for key in runs:
                ratio = figures[key]["ess_per_s"] / max(n["ess_per_s"], 1e-9)
                figures[f"{key}_over_naive_ess_per_s"] = round(ratio, 2)
                print(f"{size_name} ESS/s end to end, hierchoice fit {key} / naive: {ratio:.2f}")
    figures["load_average_at_end"] = os.getloadavg()[0]
    print(f"load average (1 min) at start {figures['load_average_at_start']:.1f}, "
          f"at end {figures['load_average_at_end']:.1f}")
    out_dir = HERE / "results"
    out_dir.mkdir(exist_ok=True)
    (out_dir / f"{size_name}_e2e.json").write_text(json.dumps(figures, indent=2))
    print(f"wrote {out_dir / (size_name + '_e2e.json')}")


if __name__ == "__main__":
    main()
